"""Who may do what in the sandbox: request attributes, SelfSubjectAccessReview, deny rules.

The sandbox has no authentication and no RBAC: by default every request is allowed.
This module gives it what a client needs to *ask* and what a test needs to *see*:

- :func:`request_attributes` — the authorization attributes of an HTTP request as the
  Kubernetes docs define them ("Authorization" → "Determine the request verb"):
  POST → create; GET/HEAD → get on one object, list on a collection, watch with
  ``?watch=true``; PUT → update; PATCH → patch; DELETE → delete on one object,
  deletecollection on a collection; plus API group, resource, subresource, namespace
  and name. Paths outside ``/api`` and ``/apis/<group>/<version>`` are non-resource
  requests (``nonResourceURL``). The request log carries these attributes.
- :func:`review` — answers ``POST /apis/authorization.k8s.io/v1/selfsubjectaccessreviews``
  (``status.allowed``/``denied``/``reason`` as the API reference describes them), so
  ``kubectl auth can-i`` and ``AuthorizationV1Api.create_self_subject_access_review`` work.
- :class:`AccessRules` — a fault mode for tests: deny rules (verb, group, resource,
  subresource, namespace; "*" or empty matches all) make reviews answer "no" and, like
  RBAC, make matching requests fail with 403 Forbidden. Set in-process
  (``server.access.deny(...)``) or over HTTP (``POST /_sandbox/access``).
"""

from __future__ import annotations

import threading
from dataclasses import asdict, dataclass
from typing import Any

from ratefit.controller.sandbox import errors as E

__all__ = ["Attributes", "AccessRules", "DenyRule", "request_attributes", "review", "SSAR_PATH"]

SSAR_PATH = "/apis/authorization.k8s.io/v1/selfsubjectaccessreviews"
#: a collection's verb by method; one object's verb is in _ONE
_COLLECTION = {"GET": "list", "HEAD": "list", "POST": "create", "DELETE": "deletecollection"}
_ONE = {"GET": "get", "HEAD": "get", "PUT": "update", "PATCH": "patch", "DELETE": "delete", "POST": "create"}


@dataclass(frozen=True)
class Attributes:
    """Authorization attributes of one request (Kubernetes docs, "Authorization")."""

    verb: str
    group: str = ""
    resource: str = ""
    subresource: str = ""
    namespace: str = ""
    name: str = ""
    #: set for non-resource requests (discovery, /version, /healthz …)
    non_resource_url: str = ""

    @property
    def is_resource(self) -> bool:
        return not self.non_resource_url

    def to_json(self) -> dict[str, str]:
        """The non-empty attributes, named as the SubjectAccessReview API names them."""
        names = {"non_resource_url": "nonResourceURL"}
        return {names.get(k, k): v for k, v in asdict(self).items() if v}


def request_attributes(method: str, path: str, query: dict[str, list[str]] | None = None) -> Attributes:
    """The attributes an authorizer would see for ``method path?query``."""
    method = method.upper()
    query = query or {}
    parts = [p for p in path.split("/") if p]
    if parts[:2] == ["api", "v1"]:
        group, rest = "", parts[2:]
    elif parts[:1] == ["apis"] and len(parts) >= 3:
        group, rest = parts[1], parts[3:]
    else:
        rest = []
    if not rest:
        return Attributes(verb=method.lower() if method != "HEAD" else "get", non_resource_url=path or "/")
    if rest[:1] == ["watch"]:  # the deprecated /watch/ path prefix
        rest, watch = rest[1:], True
    else:
        watch = (query.get("watch") or ["false"])[-1].lower() in ("true", "1")
    namespace = ""
    if rest[0] == "namespaces" and len(rest) >= 3 and not (len(rest) == 3 and rest[2] in ("status", "finalize")):
        namespace, rest = rest[1], rest[2:]
    resource = rest[0]
    name = rest[1] if len(rest) > 1 else ""
    subresource = rest[2] if len(rest) > 2 else ""
    if resource == "namespaces" and name and not namespace:
        namespace = name  # a namespace's own namespace is itself (as the apiserver records it)
    if watch and method in ("GET", "HEAD"):
        verb = "watch"
    elif name:
        verb = _ONE.get(method, method.lower())
    else:
        verb = _COLLECTION.get(method, method.lower())
    return Attributes(verb=verb, group=group, resource=resource, subresource=subresource,
                      namespace=namespace, name=name)


@dataclass(frozen=True)
class DenyRule:
    """Deny ``verb`` on ``group``/``resource``/``subresource`` in ``namespace``;
    "*" matches anything (empty group is the core group, empty namespace: every one)."""

    verb: str = "*"
    group: str = "*"
    resource: str = "*"
    subresource: str = "*"
    namespace: str = ""

    def matches(self, a: Attributes) -> bool:
        if not a.is_resource:
            return False
        return (self.verb in ("*", a.verb) and self.group in ("*", a.group)
                and self.resource in ("*", a.resource) and self.subresource in ("*", a.subresource)
                and self.namespace in ("", "*", a.namespace))

    def to_json(self) -> dict[str, str]:
        return asdict(self)

    def spelling(self) -> str:
        """The rule as ``--deny`` spells it, plus its namespace: patch:deployments.apps."""
        what = self.resource + (f".{self.group}" if self.group not in ("", "*") else "")
        what += f"/{self.subresource}" if self.subresource not in ("", "*") else ""
        return f"{self.verb}:{what}" + (f" in {self.namespace}" if self.namespace else "")


class AccessRules:
    """The deny rules of one sandbox (empty: allow all)."""

    _FIELDS = ("verb", "group", "resource", "subresource", "namespace")

    def __init__(self) -> None:
        self._rules: list[DenyRule] = []
        self._lock = threading.Lock()

    def deny(self, verb: str = "*", resource: str = "*", *, group: str = "*", subresource: str = "*",
             namespace: str = "") -> DenyRule:
        rule = DenyRule(verb=verb, group=group, resource=resource, subresource=subresource, namespace=namespace)
        with self._lock:
            self._rules.append(rule)
        return rule

    def deny_json(self, spec: Any) -> DenyRule:
        if not isinstance(spec, dict):
            raise ValueError("a deny rule is a JSON object with verb, group, resource, subresource, namespace")
        unknown = set(spec) - set(self._FIELDS)
        if unknown:
            raise ValueError(f"unknown deny-rule fields {sorted(unknown)}; known: {list(self._FIELDS)}")
        if any(not isinstance(v, str) for v in spec.values()):
            raise ValueError("deny-rule fields are strings")
        return self.deny(spec.get("verb", "*"), spec.get("resource", "*"), group=spec.get("group", "*"),
                         subresource=spec.get("subresource", "*"), namespace=spec.get("namespace", ""))

    def clear(self) -> None:
        with self._lock:
            self._rules.clear()

    @property
    def rules(self) -> list[DenyRule]:
        with self._lock:
            return list(self._rules)

    def denied_by(self, a: Attributes) -> DenyRule | None:
        with self._lock:
            return next((r for r in self._rules if r.matches(a)), None)

    def check(self, a: Attributes) -> None:
        """Raise 403 Forbidden (the apiserver's wording) when a deny rule matches."""
        if self.denied_by(a) is None:
            return
        what = a.resource + (f"/{a.subresource}" if a.subresource else "")
        scope = f' in the namespace "{a.namespace}"' if a.namespace else " at the cluster scope"
        group = f'in API group "{a.group}"'
        raise E.ApiError(403, "Forbidden",
                         f'{what} "{a.name}" is forbidden: User "ratefit-sandbox" cannot {a.verb} '
                         f'resource "{what}" {group}{scope} (sandbox deny rule)' if a.name else
                         f'{what} is forbidden: User "ratefit-sandbox" cannot {a.verb} resource '
                         f'"{what}" {group}{scope} (sandbox deny rule)',
                         {"group": a.group, "kind": a.resource, **({"name": a.name} if a.name else {})})


def review(body: Any, rules: AccessRules) -> dict[str, Any]:
    """The answer to a SelfSubjectAccessReview (authorization.k8s.io/v1): the request
    object with ``status`` filled in. Raises a 400 ApiError for a malformed review."""
    if not isinstance(body, dict):
        raise E.bad_request("the request body must be a SelfSubjectAccessReview object")
    if body.get("kind") not in (None, "SelfSubjectAccessReview"):
        raise E.bad_request(f"the kind in the data ({body.get('kind')}) does not match the expected kind "
                            "(SelfSubjectAccessReview)")
    spec = body.get("spec")
    if not isinstance(spec, dict):
        raise E.bad_request("spec: Required value")
    ra, nra = spec.get("resourceAttributes"), spec.get("nonResourceAttributes")
    if (ra is None) == (nra is None):
        raise E.ApiError(422, "Invalid", "SelfSubjectAccessReview.authorization.k8s.io is invalid: "
                         "spec.resourceAttributes: Invalid value: exactly one of nonResourceAttributes "
                         "or resourceAttributes must be specified",
                         {"kind": "SelfSubjectAccessReview", "group": "authorization.k8s.io",
                          "causes": [{"reason": "FieldValueInvalid", "field": "spec.resourceAttributes",
                                      "message": "exactly one of nonResourceAttributes or resourceAttributes "
                                                 "must be specified"}]})
    if ra is not None:
        if not isinstance(ra, dict) or any(not isinstance(v, str) for k, v in ra.items()
                                           if k in ("verb", "group", "resource", "subresource", "namespace", "name")):
            raise E.bad_request("spec.resourceAttributes: fields are strings")
        attrs = Attributes(verb=ra.get("verb", ""), group=ra.get("group", ""), resource=ra.get("resource", ""),
                           subresource=ra.get("subresource", ""), namespace=ra.get("namespace", ""),
                           name=ra.get("name", ""))
    else:
        if not isinstance(nra, dict):
            raise E.bad_request("spec.nonResourceAttributes must be an object")
        attrs = Attributes(verb=str(nra.get("verb", "")), non_resource_url=str(nra.get("path", "")) or "/")
    rule = rules.denied_by(attrs)
    status: dict[str, Any]
    if rule is None:
        status = {"allowed": True, "reason": "the sandbox allows every request (no RBAC)"}
    else:
        status = {"allowed": False, "denied": True,
                  "reason": f"sandbox deny rule {rule.spelling()} (fault injection)"}
    out = {"kind": "SelfSubjectAccessReview", "apiVersion": "authorization.k8s.io/v1",
           "metadata": {"creationTimestamp": None}, "spec": spec, "status": status}
    return out


def parse_deny(text: str) -> dict[str, str]:
    """``VERB:RESOURCE[.GROUP][/SUBRESOURCE]`` (kubectl's resource.group spelling; "*"
    for any) → the fields of a :class:`DenyRule`. E.g. ``patch:deployments.apps``,
    ``patch:pods/resize``, ``*:leases.coordination.k8s.io``."""
    verb, sep, what = text.partition(":")
    if not sep or not verb or not what:
        raise ValueError(f"--deny {text!r}: expected VERB:RESOURCE[.GROUP][/SUBRESOURCE], "
                         "e.g. patch:deployments.apps or patch:pods/resize")
    what, _, sub = what.partition("/")
    if what == "*":  # every resource of every group, with its subresources
        return {"verb": verb, "resource": "*", "group": "*", "subresource": sub or "*"}
    resource, _, group = what.partition(".")
    return {"verb": verb, "resource": resource, "group": group, "subresource": sub}
