"""Just enough of Kubernetes' protobuf encoding to read a SelfSubjectAccessReview.

kubectl's typed clients send built-in kinds as ``application/vnd.kubernetes.protobuf``
(``kubectl auth can-i`` does for its SelfSubjectAccessReview). The sandbox otherwise
speaks JSON and YAML; this module decodes that one request. The encoding (Kubernetes
docs, "Kubernetes API concepts" → "Protobuf encoding"): the magic prefix ``k8s\\x00``,
then a ``runtime.Unknown`` message {1: typeMeta {1: apiVersion, 2: kind}, 2: raw bytes
of the object, 3: contentEncoding, 4: contentType}. The object's field numbers are
those of ``k8s.io/api/authorization/v1/generated.proto`` (from memory, confirmed by the
real kubectl in tests/test_sandbox_access.py): SelfSubjectAccessReview {1: metadata,
2: spec}; spec {1: resourceAttributes, 2: nonResourceAttributes}; ResourceAttributes
{1: namespace, 2: verb, 3: group, 4: version, 5: resource, 6: subresource, 7: name};
NonResourceAttributes {1: path, 2: verb}. Only the wire types protobuf uses for these
(varint, 64-bit, length-delimited, 32-bit) are read; anything malformed is a ValueError.
"""

from __future__ import annotations

from typing import Any

__all__ = ["MAGIC", "decode_ssar"]

MAGIC = b"k8s\x00"
_RESOURCE_FIELDS = {1: "namespace", 2: "verb", 3: "group", 4: "version", 5: "resource", 6: "subresource",
                    7: "name"}
_NON_RESOURCE_FIELDS = {1: "path", 2: "verb"}


def _varint(data: bytes, i: int) -> tuple[int, int]:
    value = shift = 0
    while True:
        if i >= len(data) or shift > 63:
            raise ValueError("truncated or over-long varint")
        b = data[i]
        i += 1
        value |= (b & 0x7F) << shift
        shift += 7
        if not b & 0x80:
            return value, i


def _fields(data: bytes) -> dict[int, bytes]:
    """Length-delimited fields of one message by number (the last one wins, as in
    protobuf); other wire types are skipped."""
    out: dict[int, bytes] = {}
    i = 0
    while i < len(data):
        key, i = _varint(data, i)
        num, wire = key >> 3, key & 7
        if wire == 0:
            _, i = _varint(data, i)
        elif wire == 1:
            i += 8
        elif wire == 5:
            i += 4
        elif wire == 2:
            n, i = _varint(data, i)
            if i + n > len(data):
                raise ValueError("truncated length-delimited field")
            out[num] = data[i:i + n]
            i += n
        else:
            raise ValueError(f"unsupported protobuf wire type {wire}")
        if i > len(data):
            raise ValueError("truncated field")
    return out


def _strings(data: bytes, names: dict[int, str]) -> dict[str, str]:
    return {names[k]: v.decode("utf-8") for k, v in _fields(data).items() if k in names}


def decode_ssar(body: bytes) -> dict[str, Any]:
    """A protobuf SelfSubjectAccessReview as the JSON-shaped dict the API uses."""
    if not body.startswith(MAGIC):
        raise ValueError("not a Kubernetes protobuf message (no k8s\\x00 prefix)")
    unknown = _fields(body[len(MAGIC):])
    type_meta = _strings(unknown.get(1, b""), {1: "apiVersion", 2: "kind"})
    if type_meta.get("kind") not in (None, "SelfSubjectAccessReview"):
        raise ValueError(f"the sandbox reads only SelfSubjectAccessReview as protobuf, not {type_meta.get('kind')}")
    obj = _fields(unknown.get(2, b""))
    spec_fields = _fields(obj.get(2, b""))
    spec: dict[str, Any] = {}
    if 1 in spec_fields:
        spec["resourceAttributes"] = _strings(spec_fields[1], _RESOURCE_FIELDS)
    if 2 in spec_fields:
        spec["nonResourceAttributes"] = _strings(spec_fields[2], _NON_RESOURCE_FIELDS)
    return {"apiVersion": type_meta.get("apiVersion", "authorization.k8s.io/v1"),
            "kind": "SelfSubjectAccessReview", "spec": spec}
