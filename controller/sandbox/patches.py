"""The three PATCH bodies the API server accepts, applied to plain JSON objects.

- JSON merge patch (RFC 7386): maps merge recursively, `null` deletes, lists are
  replaced whole.
- JSON patch (RFC 6902): add/remove/replace/move/copy/test with JSON pointers (RFC 6901).
- Strategic merge patch (Kubernetes): like merge patch, but lists of objects that carry a
  merge key merge element-wise (`containers` by `name`, `env` by `name`, `ports` by
  `containerPort`, `conditions` by `type`, …), primitive lists with a merge strategy
  (finalizers) are unioned, and the directives `$patch: replace|delete|merge`,
  `$setElementOrder/<list>`, `$deleteFromPrimitiveList/<list>` and `$retainKeys` are
  honoured. Kubernetes takes merge keys from the Go struct tags of each type; the sandbox
  keys them by field name for the types it serves (see MERGE_KEYS) — a stand-in, not the
  full schema.
"""

from __future__ import annotations

import copy
from typing import Any


class PatchError(ValueError):
    """A patch that cannot be applied (422 for a failed JSON patch op, 400 for malformed)."""

    def __init__(self, message: str, *, malformed: bool = False) -> None:
        super().__init__(message)
        self.malformed = malformed


# --- RFC 7386 ---------------------------------------------------------------------------

def merge_patch(target: Any, patch: Any) -> Any:
    """RFC 7386 section 2 MergePatch(Target, Patch)."""
    if not isinstance(patch, dict):
        return copy.deepcopy(patch)
    result = copy.deepcopy(target) if isinstance(target, dict) else {}
    for key, value in patch.items():
        if value is None:
            result.pop(key, None)
        else:
            result[key] = merge_patch(result.get(key), value)
    return result


# --- RFC 6902 ---------------------------------------------------------------------------

def _pointer(path: str) -> list[str]:
    if path == "":
        return []
    if not path.startswith("/"):
        raise PatchError(f"JSON pointer {path!r} must start with '/'", malformed=True)
    return [p.replace("~1", "/").replace("~0", "~") for p in path[1:].split("/")]


def _index(container: list, token: str, *, for_add: bool) -> int:
    if token == "-" and for_add:
        return len(container)
    if not token.isdigit() or (token != "0" and token.startswith("0")):
        raise PatchError(f"invalid array index {token!r}")
    idx = int(token)
    if idx > len(container) or (idx == len(container) and not for_add):
        raise PatchError(f"array index {idx} out of bounds")
    return idx


def _walk(doc: Any, tokens: list[str], path: str) -> Any:
    """The node the pointer tokens lead to (the one JSON-pointer walk of this module)."""
    node = doc
    for tok in tokens:
        if isinstance(node, dict) and tok in node:
            node = node[tok]
        elif isinstance(node, list):
            node = node[_index(node, tok, for_add=False)]
        else:
            raise PatchError(f"doc is missing path: {path!r}")
    return node


def _parent(doc: Any, tokens: list[str], path: str) -> Any:
    return _walk(doc, tokens[:-1], path)


def _get(doc: Any, path: str) -> Any:
    return _walk(doc, _pointer(path), path)


def _add(doc: Any, path: str, value: Any) -> Any:
    tokens = _pointer(path)
    if not tokens:
        return copy.deepcopy(value)
    parent = _parent(doc, tokens, path)
    last = tokens[-1]
    if isinstance(parent, dict):
        parent[last] = copy.deepcopy(value)
    elif isinstance(parent, list):
        parent.insert(_index(parent, last, for_add=True), copy.deepcopy(value))
    else:
        raise PatchError(f"doc is missing path: {path!r}")
    return doc


def _remove(doc: Any, path: str) -> tuple[Any, Any]:
    tokens = _pointer(path)
    if not tokens:
        raise PatchError("cannot remove the whole document")
    parent = _parent(doc, tokens, path)
    last = tokens[-1]
    if isinstance(parent, dict):
        if last not in parent:
            raise PatchError(f"unable to remove nonexistent key: {last}: missing value")
        return doc, parent.pop(last)
    if isinstance(parent, list):
        return doc, parent.pop(_index(parent, last, for_add=False))
    raise PatchError(f"doc is missing path: {path!r}")


def json_patch(doc: Any, ops: Any) -> Any:
    """Apply an RFC 6902 operation list; raises PatchError on a failed op."""
    if not isinstance(ops, list):
        raise PatchError("a JSON patch must be a list of operations", malformed=True)
    doc = copy.deepcopy(doc)
    for op in ops:
        if not isinstance(op, dict) or "op" not in op or "path" not in op:
            raise PatchError(f"invalid JSON patch operation: {op!r}", malformed=True)
        kind, path = op["op"], op["path"]
        if kind in ("add", "replace", "test") and "value" not in op:
            raise PatchError(f"operation {kind!r} needs a value", malformed=True)
        if kind == "add":
            doc = _add(doc, path, op["value"])
        elif kind == "remove":
            doc, _ = _remove(doc, path)
        elif kind == "replace":
            _get(doc, path)  # must exist (RFC 6902 4.3)
            doc, _ = _remove(doc, path) if _pointer(path) else (doc, None)
            doc = _add(doc, path, op["value"])
        elif kind == "move":
            src = op.get("from")
            if src is None:
                raise PatchError("operation 'move' needs 'from'", malformed=True)
            doc, value = _remove(doc, src)
            doc = _add(doc, path, value)
        elif kind == "copy":
            src = op.get("from")
            if src is None:
                raise PatchError("operation 'copy' needs 'from'", malformed=True)
            doc = _add(doc, path, _get(doc, src))
        elif kind == "test":
            if _get(doc, path) != op["value"]:
                raise PatchError(f"testing value {path} failed: test failed")
        else:
            raise PatchError(f"unexpected kind of operation: {kind!r}", malformed=True)
    return doc


# --- strategic merge patch -------------------------------------------------------------

#: list field -> merge key, from the `patchMergeKey` struct tags of the core/apps types
#: the sandbox serves (k8s.io/api core/v1 and apps/v1 types.go)
MERGE_KEYS: dict[str, str] = {
    "containers": "name",
    "initContainers": "name",
    "ephemeralContainers": "name",
    "volumes": "name",
    "imagePullSecrets": "name",
    "env": "name",
    "ports": "containerPort",
    "volumeMounts": "mountPath",
    "volumeDevices": "devicePath",
    "conditions": "type",
    "ownerReferences": "uid",
    "hostAliases": "ip",
    "resourceClaims": "name",
    "schedulingGates": "name",
    "topologySpreadConstraints": "topologyKey",
}
#: primitive lists with `patchStrategy:"merge"` (set union)
MERGE_PRIMITIVES = {"finalizers"}

_ORDER = "$setElementOrder/"
_DELETE_PRIM = "$deleteFromPrimitiveList/"


def strategic_merge(original: Any, patch: Any) -> Any:
    """Apply a strategic merge patch to a JSON object."""
    if not isinstance(patch, dict):
        raise PatchError("a strategic merge patch must be a JSON object", malformed=True)
    return _smp_map(copy.deepcopy(original) if isinstance(original, dict) else {}, patch)


def _smp_map(orig: dict, patch: dict) -> dict:
    directive = patch.get("$patch")
    if directive == "replace":
        return {k: copy.deepcopy(v) for k, v in patch.items() if k != "$patch"}
    if directive == "delete":
        return {}
    orders: dict[str, list] = {}
    for key, value in patch.items():
        if key in ("$patch", "$retainKeys"):
            continue
        if key.startswith(_ORDER):
            orders[key[len(_ORDER):]] = value
            continue
        if key.startswith(_DELETE_PRIM):
            field = key[len(_DELETE_PRIM):]
            if isinstance(orig.get(field), list):
                orig[field] = [x for x in orig[field] if x not in value]
            continue
        if value is None:
            orig.pop(key, None)
        elif isinstance(value, dict):
            cur = orig.get(key)
            merged = _smp_map(cur if isinstance(cur, dict) else {}, value)
            if value.get("$patch") == "delete":
                orig.pop(key, None)
            else:
                orig[key] = merged
        elif isinstance(value, list):
            orig[key] = _smp_list(key, orig.get(key), value)
        else:
            orig[key] = copy.deepcopy(value)
    if "$retainKeys" in patch and isinstance(patch["$retainKeys"], list):
        keep = set(patch["$retainKeys"])
        for k in list(orig):
            if k not in keep and k not in patch:
                orig.pop(k)
    for field, order in orders.items():
        if isinstance(orig.get(field), list) and isinstance(order, list):
            orig[field] = _apply_order(field, orig[field], order)
    return orig


def _smp_list(field: str, orig: Any, patch: list) -> list:
    current = orig if isinstance(orig, list) else []
    key = MERGE_KEYS.get(field)
    if field == "ports" and any(isinstance(x, dict) and "port" in x and "containerPort" not in x
                                for x in patch + current):
        key = "port"  # Service ports merge by `port`, container ports by `containerPort`
    if key and all(isinstance(x, dict) for x in patch) and \
            all(isinstance(x, dict) for x in current):
        if any(x.get("$patch") == "replace" for x in patch):
            return [copy.deepcopy({k: v for k, v in x.items() if k != "$patch"})
                    for x in patch if x.get("$patch") != "replace"]
        result = [copy.deepcopy(x) for x in current]
        for item in patch:
            if key not in item:
                raise PatchError(f"map: {item!r} does not contain declared merge key: {key}")
            pos = next((i for i, x in enumerate(result) if x.get(key) == item[key]), None)
            if item.get("$patch") == "delete":
                if pos is not None:
                    result.pop(pos)
                continue
            if pos is None:
                result.append(_smp_map({}, item))
            else:
                result[pos] = _smp_map(result[pos], item)
        return result
    if field in MERGE_PRIMITIVES:
        result = list(current)
        for x in patch:
            if x not in result:
                result.append(x)
        return result
    return copy.deepcopy([x for x in patch if not (isinstance(x, dict) and "$patch" in x)])


def _apply_order(field: str, items: list, order: list) -> list:
    key = MERGE_KEYS.get(field)
    if key:
        wanted = [o.get(key) for o in order if isinstance(o, dict)]
        pos = {v: i for i, v in enumerate(wanted)}
        return sorted(items, key=lambda x: pos.get(x.get(key) if isinstance(x, dict) else None,
                                                   len(pos)))
    pos = {v: i for i, v in enumerate(order) if isinstance(v, (str, int, float))}
    return sorted(items, key=lambda x: pos.get(x, len(pos)) if isinstance(x, (str, int, float))
                  else len(pos))
