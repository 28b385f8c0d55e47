"""Kubernetes-style API errors of the sandbox: `Status` objects and field errors.

The shapes follow apimachinery's `k8s.io/apimachinery/pkg/api/errors` (NewNotFound,
NewAlreadyExists, NewConflict, NewInvalid, …) and `pkg/util/validation/field`
(`field.Error.Error()` = "<field>: <type>: <value>: <detail>"), so clients that
inspect `reason`, `code` and `details.causes` see what a real API server sends.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

# field.ErrorType strings and their CauseType (apimachinery field/errors.go)
REQUIRED = ("Required value", "FieldValueRequired")
INVALID = ("Invalid value", "FieldValueInvalid")
UNSUPPORTED = ("Unsupported value", "FieldValueNotSupported")
FORBIDDEN = ("Forbidden", "FieldValueForbidden")
DUPLICATE = ("Duplicate value", "FieldValueDuplicate")
NOT_FOUND = ("Not found", "FieldValueNotFound")
TOO_LONG = ("Too long", "FieldValueTooLong")
TOO_MANY = ("Too many", "FieldValueTooMany")

_NO_VALUE = object()


def _go_value(value: Any) -> str:
    """Render a bad value like Go's `%q` for strings and `%#v`-ish for the rest."""
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "null"
    if isinstance(value, (int, float)):
        return repr(value)
    return json.dumps(value, separators=(",", ":"))


@dataclass(frozen=True)
class FieldError:
    """One `field.Error`: a path like `spec.template.spec.containers[0].resources.requests`."""

    path: str
    kind: tuple[str, str]
    value: Any = _NO_VALUE
    detail: str = ""

    def body(self) -> str:
        type_text = self.kind[0]
        if self.kind in (REQUIRED, FORBIDDEN, TOO_LONG) or self.value is _NO_VALUE:
            text = type_text
        else:
            text = f"{type_text}: {_go_value(self.value)}"
        if self.detail:
            text += f": {self.detail}"
        return text

    def message(self) -> str:
        return f"{self.path}: {self.body()}"

    def cause(self) -> dict[str, Any]:
        return {"reason": self.kind[1], "message": self.body(), "field": self.path}


@dataclass
class ApiError(Exception):
    """An error answered as a Kubernetes `Status` object."""

    code: int
    reason: str
    message: str
    details: dict[str, Any] | None = None
    headers: dict[str, str] = field(default_factory=dict)

    def __str__(self) -> str:
        return f"{self.code} {self.reason}: {self.message}"

    def status(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kind": "Status",
            "apiVersion": "v1",
            "metadata": {},
            "status": "Failure",
            "message": self.message,
            "reason": self.reason,
            "code": self.code,
        }
        if self.details:
            out["details"] = self.details
        return out


def qualified(plural_or_kind: str, group: str) -> str:
    """`schema.GroupResource.String()`: "deployments.apps", or "pods" for core."""
    return f"{plural_or_kind}.{group}" if group else plural_or_kind


def not_found(plural: str, group: str, name: str) -> ApiError:
    return ApiError(404, "NotFound", f"{qualified(plural, group)} {json.dumps(name)} not found",
                    {"name": name, "group": group, "kind": plural} if group else
                    {"name": name, "kind": plural})


def already_exists(plural: str, group: str, name: str) -> ApiError:
    return ApiError(409, "AlreadyExists",
                    f"{qualified(plural, group)} {json.dumps(name)} already exists",
                    {"name": name, "group": group, "kind": plural} if group else
                    {"name": name, "kind": plural})


def conflict(plural: str, group: str, name: str,
             why: str = "the object has been modified; please apply your changes to the "
             "latest version and try again") -> ApiError:
    return ApiError(409, "Conflict",
                    f"Operation cannot be fulfilled on {qualified(plural, group)} "
                    f"{json.dumps(name)}: {why}",
                    {"name": name, "group": group, "kind": plural} if group else
                    {"name": name, "kind": plural})


def invalid(kind: str, group: str, name: str, errors: list[FieldError]) -> ApiError:
    """`errors.NewInvalid`: `Kind.group "name" is invalid: <aggregate>` (422)."""
    if len(errors) == 1:
        agg = errors[0].message()
    else:
        agg = "[" + ", ".join(e.message() for e in errors) + "]"
    details: dict[str, Any] = {"name": name, "kind": kind,
                               "causes": [e.cause() for e in errors]}
    if group:
        details["group"] = group
    return ApiError(422, "Invalid", f"{qualified(kind, group)} {json.dumps(name)} is invalid: {agg}",
                    details)


def bad_request(message: str) -> ApiError:
    return ApiError(400, "BadRequest", message)


def unsupported_media(content_type: str, accepted: list[str]) -> ApiError:
    return ApiError(415, "UnsupportedMediaType",
                    f"the body of the request was in an unknown format - accepted media types "
                    f"include: {', '.join(accepted)}")


def method_not_allowed(verb: str, what: str) -> ApiError:
    return ApiError(405, "MethodNotAllowed",
                    f"the server does not allow this method on the requested resource ({verb} {what})")


def expired(requested: int, oldest: int) -> ApiError:
    return ApiError(410, "Expired", f"too old resource version: {requested} ({oldest})")


def too_many_requests(retry_after: int | None) -> ApiError:
    err = ApiError(429, "TooManyRequests", "Too many requests, please try again later.",
                   {"retryAfterSeconds": retry_after} if retry_after is not None else None)
    if retry_after is not None:
        err.headers["Retry-After"] = str(retry_after)
    return err


def for_status_code(code: int, message: str) -> ApiError:
    """A generic error for an injected status code (reasons per apimachinery StatusReason)."""
    reasons = {400: "BadRequest", 401: "Unauthorized", 403: "Forbidden", 404: "NotFound",
               409: "Conflict", 410: "Expired", 422: "Invalid", 429: "TooManyRequests",
               500: "InternalError", 503: "ServiceUnavailable", 504: "Timeout"}
    reason = reasons.get(code, "InternalError" if code >= 500 else "BadRequest")
    if reason == "InternalError":
        message = f"Internal error occurred: {message}"
    return ApiError(code, reason, message, {"causes": [{"message": message}]}
                    if reason == "InternalError" else None)
