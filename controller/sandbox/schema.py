"""A CRD's `openAPIV3Schema` enforced on custom objects: defaults, pruning, validation.

What the apiextensions API server does for structural schemas, for the keywords a
controller's CRD uses: `type` (object, array, string, integer, number, boolean),
`properties`, `required`, `additionalProperties`, `items`, `enum`, `minimum`/`maximum`
(+ `exclusiveMinimum`/`exclusiveMaximum`), `minLength`/`maxLength`, `pattern`,
`minItems`/`maxItems`, `nullable`, `default`, `x-kubernetes-preserve-unknown-fields`,
`x-kubernetes-int-or-string`. Unknown fields are pruned (or rejected with
`fieldValidation=Strict`). Not enforced (a stand-in): CEL `x-kubernetes-validations`,
`format`, `oneOf`/`anyOf`/`allOf`/`not`, list-type uniqueness.

Messages follow kube-openapi's validation errors as the API server words them, e.g.
`spec.mode: Unsupported value: "x": supported values: "dry-run", "apply"`.
"""

from __future__ import annotations

import copy
import json
import re
from typing import Any

from ratefit.controller.sandbox.errors import (
    INVALID,
    REQUIRED,
    TOO_LONG,
    TOO_MANY,
    UNSUPPORTED,
    FieldError,
)

_ROOT_KEEP = {"apiVersion", "kind", "metadata"}


def _type_name(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    return "object"


def _child(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def apply_defaults(schema: dict | None, value: Any) -> Any:
    """Fill `default`s of absent properties, recursively (structural defaulting)."""
    if not schema:
        return value
    if isinstance(value, dict):
        for key, sub in (schema.get("properties") or {}).items():
            if key not in value and "default" in sub:
                value[key] = copy.deepcopy(sub["default"])
            if key in value:
                value[key] = apply_defaults(sub, value[key])
        extra = schema.get("additionalProperties")
        if isinstance(extra, dict):
            for key in value:
                if key not in (schema.get("properties") or {}):
                    value[key] = apply_defaults(extra, value[key])
    elif isinstance(value, list) and isinstance(schema.get("items"), dict):
        return [apply_defaults(schema["items"], v) for v in value]
    return value


def prune(schema: dict | None, value: Any, path: str = "", *, root: bool = False) -> list[str]:
    """Drop fields the schema does not know; return their paths."""
    dropped: list[str] = []
    if not schema or schema.get("x-kubernetes-preserve-unknown-fields"):
        if isinstance(value, dict) and schema:
            for key, sub in (schema.get("properties") or {}).items():
                if key in value:
                    dropped += prune(sub, value[key], _child(path, key))
        return dropped
    if isinstance(value, dict):
        props = schema.get("properties")
        extra = schema.get("additionalProperties")
        for key in list(value):
            if root and key in _ROOT_KEEP:
                continue
            if props is not None and key in props:
                dropped += prune(props[key], value[key], _child(path, key))
            elif isinstance(extra, dict):
                dropped += prune(extra, value[key], _child(path, key))
            elif extra is True:
                continue
            elif props is not None or schema.get("type") == "object":
                value.pop(key)
                dropped.append(_child(path, key))
    elif isinstance(value, list) and isinstance(schema.get("items"), dict):
        for i, item in enumerate(value):
            dropped += prune(schema["items"], item, f"{path}[{i}]")
    return dropped


def validate(schema: dict | None, value: Any, path: str = "") -> list[FieldError]:
    """Errors of `value` against `schema` (empty list when valid)."""
    if not schema:
        return []
    errs: list[FieldError] = []
    where = path or "<root>"
    if value is None:
        if schema.get("nullable"):
            return []
        if "type" in schema:
            return [FieldError(path, INVALID, "null",
                               f"{where} in body must be of type {schema['type']}: \"null\"")]
        return []
    want = schema.get("type")
    actual = _type_name(value)
    if schema.get("x-kubernetes-int-or-string"):
        if actual not in ("integer", "string"):
            errs.append(FieldError(path, INVALID, actual,
                                   f"{where} in body must be of type integer,string: "
                                   f"{json.dumps(actual)}"))
            return errs
    elif want:
        ok = actual == want or (want == "number" and actual == "integer")
        if not ok:
            return [FieldError(path, INVALID, actual,
                               f"{where} in body must be of type {want}: {json.dumps(actual)}")]
    if "enum" in schema and value not in schema["enum"]:
        supported = ", ".join(json.dumps(v) for v in schema["enum"])
        errs.append(FieldError(path, UNSUPPORTED, value, f"supported values: {supported}"))
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        lo, hi = schema.get("minimum"), schema.get("maximum")
        if lo is not None:
            if schema.get("exclusiveMinimum") and not value > lo:
                errs.append(FieldError(path, INVALID, value,
                                       f"{where} in body should be greater than {lo}"))
            elif value < lo:
                errs.append(FieldError(path, INVALID, value,
                                       f"{where} in body should be greater than or equal to {lo}"))
        if hi is not None:
            if schema.get("exclusiveMaximum") and not value < hi:
                errs.append(FieldError(path, INVALID, value,
                                       f"{where} in body should be less than {hi}"))
            elif value > hi:
                errs.append(FieldError(path, INVALID, value,
                                       f"{where} in body should be less than or equal to {hi}"))
    if isinstance(value, str):
        if "maxLength" in schema and len(value) > schema["maxLength"]:
            errs.append(FieldError(path, TOO_LONG, value,
                                   f"may not be more than {schema['maxLength']} bytes"))
        if "minLength" in schema and len(value) < schema["minLength"]:
            errs.append(FieldError(path, INVALID, value,
                                   f"{where} in body should be at least {schema['minLength']} "
                                   "chars long"))
        if "pattern" in schema and not re.search(schema["pattern"], value):
            errs.append(FieldError(path, INVALID, value,
                                   f"{where} in body should match '{schema['pattern']}'"))
    if isinstance(value, list):
        if "maxItems" in schema and len(value) > schema["maxItems"]:
            errs.append(FieldError(path, TOO_MANY, len(value),
                                   f"must have at most {schema['maxItems']} items"))
        if "minItems" in schema and len(value) < schema["minItems"]:
            errs.append(FieldError(path, INVALID, len(value),
                                   f"{where} in body should have at least {schema['minItems']} "
                                   "items"))
        items = schema.get("items")
        if isinstance(items, dict):
            for i, item in enumerate(value):
                errs += validate(items, item, f"{path}[{i}]")
    if isinstance(value, dict):
        props = schema.get("properties") or {}
        for req in schema.get("required") or []:
            if req not in value:
                errs.append(FieldError(_child(path, req), REQUIRED))
        for key, item in value.items():
            if key in props:
                if path == "" and key == "metadata":
                    continue
                errs += validate(props[key], item, _child(path, key))
            elif isinstance(schema.get("additionalProperties"), dict):
                errs += validate(schema["additionalProperties"], item, _child(path, key))
    return errs
