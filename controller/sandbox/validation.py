"""Validation and defaulting of the built-in objects, as the API server does it for
the fields ratefit touches.

Sources (Kubernetes source, `pkg/apis/core/validation/validation.go` and
`pkg/apis/apps/validation/validation.go`; apimachinery `validation.IsDNS1123Subdomain`):
object names, container names and images, resource quantities (well formed,
non-negative, re-emitted canonically), request ≤ limit per resource
("must be less than or equal to cpu limit of 1"), Deployment/StatefulSet selectors
matching the template labels, immutable selectors. Defaulting: a Pod's missing request
defaults to its limit (`SetDefaults_Pod`), Deployment/StatefulSet defaults (replicas 1,
strategy, revisionHistoryLimit …). Everything else a real server checks is not checked
here — the sandbox is a stand-in.
"""

from __future__ import annotations

import re
from typing import Any

from ratefit.controller.sandbox import quantities
from ratefit.controller.sandbox.errors import (
    DUPLICATE,
    FORBIDDEN,
    INVALID,
    REQUIRED,
    TOO_LONG,
    ApiError,
    FieldError,
)

DNS1123_LABEL = r"[a-z0-9]([-a-z0-9]*[a-z0-9])?"
DNS1123_SUBDOMAIN = DNS1123_LABEL + r"(\." + DNS1123_LABEL + r")*"
_LABEL_RE = re.compile(f"^{DNS1123_LABEL}$")
_SUBDOMAIN_RE = re.compile(f"^{DNS1123_SUBDOMAIN}$")

# messages of apimachinery pkg/util/validation/validation.go
LABEL_MSG = ("a lowercase RFC 1123 label must consist of lower case alphanumeric characters or "
             "'-', and must start and end with an alphanumeric character (e.g. 'my-name',  or "
             "'123-abc', regex used for validation is '" + DNS1123_LABEL + "')")
SUBDOMAIN_MSG = ("a lowercase RFC 1123 subdomain must consist of lower case alphanumeric "
                 "characters, '-' or '.', and must start and end with an alphanumeric character "
                 "(e.g. 'example.com', regex used for validation is '" + DNS1123_SUBDOMAIN + "')")

#: resources whose requests may be lower than their limits (the rest must be equal)
_OVERCOMMIT = ("cpu", "memory", "ephemeral-storage")


def name_errors(name: Any, *, label: bool, path: str = "metadata.name") -> list[FieldError]:
    if not name:
        return [FieldError(path, REQUIRED, detail="name or generateName is required")]
    if not isinstance(name, str):
        return [FieldError(path, INVALID, name, "must be a string")]
    if label:
        errs = []
        if len(name) > 63:
            errs.append(FieldError(path, INVALID, name, "must be no more than 63 characters"))
        if not _LABEL_RE.match(name):
            errs.append(FieldError(path, INVALID, name, LABEL_MSG))
        return errs
    errs = []
    if len(name) > 253:
        errs.append(FieldError(path, INVALID, name, "must be no more than 253 characters"))
    if not _SUBDOMAIN_RE.match(name):
        errs.append(FieldError(path, INVALID, name, SUBDOMAIN_MSG))
    return errs


_LABEL_VALUE_RE = re.compile(r"^(([A-Za-z0-9][-A-Za-z0-9_.]*)?[A-Za-z0-9])?$")
_QNAME_RE = re.compile(r"^([A-Za-z0-9][-A-Za-z0-9_.]*)?[A-Za-z0-9]$")
LABEL_VALUE_MSG = ("a valid label must be an empty string or consist of alphanumeric characters, "
                   "'-', '_' or '.', and must start and end with an alphanumeric character (e.g. "
                   "'MyValue',  or 'my_value',  or '12345', regex used for validation is "
                   "'(([A-Za-z0-9][-A-Za-z0-9_.]*)?[A-Za-z0-9])?')")
QNAME_MSG = ("name part must consist of alphanumeric characters, '-', '_' or '.', and must start "
             "and end with an alphanumeric character (e.g. 'MyName',  or 'my.name',  or "
             "'123-abc', regex used for validation is "
             "'([A-Za-z0-9][-A-Za-z0-9_.]*)?[A-Za-z0-9]')")
#: apimachinery TotalAnnotationSizeLimitB
ANNOTATIONS_MAX = 256 * 1024


def _qualified_name_errors(key: Any, path: str) -> list[FieldError]:
    """`validation.IsQualifiedName`: [prefix/]name, prefix a DNS subdomain, name ≤ 63."""
    if not isinstance(key, str) or not key:
        return [FieldError(path, INVALID, key, "name part must be non-empty")]
    prefix, _, name = key.rpartition("/")
    errs = []
    if prefix and (len(prefix) > 253 or not _SUBDOMAIN_RE.match(prefix)):
        errs.append(FieldError(path, INVALID, key, "prefix part " + SUBDOMAIN_MSG))
    if len(name) > 63:
        errs.append(FieldError(path, INVALID, key, "name part must be no more than 63 "
                               "characters"))
    if not _QNAME_RE.match(name):
        errs.append(FieldError(path, INVALID, key, QNAME_MSG))
    return errs


def metadata_errors(md: dict) -> list[FieldError]:
    """Label keys/values and annotation keys (apimachinery ValidateObjectMeta)."""
    errs: list[FieldError] = []
    labels = md.get("labels") or {}
    if not isinstance(labels, dict):
        return [FieldError("metadata.labels", INVALID, labels, "must be a map")]
    for k, v in labels.items():
        errs += _qualified_name_errors(k, "metadata.labels")
        if not isinstance(v, str) or len(v) > 63 or not _LABEL_VALUE_RE.match(v):
            errs.append(FieldError("metadata.labels", INVALID, v, LABEL_VALUE_MSG))
    annotations = md.get("annotations") or {}
    if not isinstance(annotations, dict):
        return errs + [FieldError("metadata.annotations", INVALID, annotations, "must be a map")]
    size = 0
    for k, v in annotations.items():
        errs += _qualified_name_errors(k, "metadata.annotations")
        if not isinstance(v, str):
            errs.append(FieldError(f"metadata.annotations[{k}]", INVALID, v,
                                   "must be a string"))
            continue
        size += len(k) + len(v)
    if size > ANNOTATIONS_MAX:
        errs.append(FieldError("metadata.annotations", TOO_LONG,
                               detail=f"may not be more than {ANNOTATIONS_MAX} bytes"))
    return errs


class QuantityDecodeError(Exception):
    """A malformed quantity: the API server refuses the body while decoding it (400)."""


def canonicalize_resources(resources: Any) -> None:
    """Re-emit requests/limits canonically in place ("0.5" → "500m")."""
    if not isinstance(resources, dict):
        return
    for part in ("requests", "limits"):
        values = resources.get(part)
        if not isinstance(values, dict):
            continue
        for res, q in list(values.items()):
            try:
                values[res] = quantities.canonicalize(q)
            except quantities.QuantityError as exc:
                raise QuantityDecodeError(str(exc)) from exc


def canonicalize_pod_spec(spec: Any) -> None:
    if not isinstance(spec, dict):
        return
    for field in ("containers", "initContainers"):
        for c in spec.get(field) or []:
            if isinstance(c, dict):
                canonicalize_resources(c.get("resources"))
    if isinstance(spec.get("overhead"), dict):
        canonicalize_resources({"limits": spec["overhead"]})


def resource_errors(resources: Any, path: str) -> list[FieldError]:
    """`ValidateContainerResourceRequirements` for what the sandbox serves."""
    if not resources:
        return []
    errs: list[FieldError] = []
    requests = resources.get("requests") or {}
    limits = resources.get("limits") or {}
    req_path, lim_path = f"{path}.requests", f"{path}.limits"
    for res, q in limits.items():
        if quantities.parse_value(q) < 0:
            errs.append(FieldError(f"{lim_path}[{res}]", INVALID, q,
                                   "must be greater than or equal to 0"))
    for res, q in requests.items():
        value = quantities.parse_value(q)
        if value < 0:
            errs.append(FieldError(f"{req_path}[{res}]", INVALID, q,
                                   "must be greater than or equal to 0"))
        if res in limits:
            limit_q = limits[res]
            limit = quantities.parse_value(limit_q)
            # Kubernetes: field.Invalid(reqPath, quantity.String(),
            #   fmt.Sprintf("must be less than or equal to %s limit of %s", resourceName,
            #   limitQuantity.String()))  — on the `requests` path, not `requests[cpu]`
            if res not in _OVERCOMMIT and not res.startswith("hugepages-") and value != limit:
                errs.append(FieldError(req_path, INVALID, q,
                                       f"must be equal to {res} limit of {limit_q}"))
            elif value > limit:
                errs.append(FieldError(req_path, INVALID, q,
                                       f"must be less than or equal to {res} limit of {limit_q}"))
    return errs


def pod_spec_errors(spec: Any, path: str) -> list[FieldError]:
    if not isinstance(spec, dict):
        return [FieldError(path, REQUIRED)]
    errs: list[FieldError] = []
    containers = spec.get("containers")
    if not containers:
        errs.append(FieldError(f"{path}.containers", REQUIRED))
    seen: set[str] = set()
    for field in ("initContainers", "containers"):
        for i, c in enumerate(spec.get(field) or []):
            cpath = f"{path}.{field}[{i}]"
            if not isinstance(c, dict):
                errs.append(FieldError(cpath, INVALID, c, "must be an object"))
                continue
            name = c.get("name")
            if not name:
                errs.append(FieldError(f"{cpath}.name", REQUIRED))
            else:
                errs += name_errors(name, label=True, path=f"{cpath}.name")
                if name in seen:
                    errs.append(FieldError(f"{cpath}.name", DUPLICATE, name))
                seen.add(name)
            if not c.get("image"):
                errs.append(FieldError(f"{cpath}.image", REQUIRED))
            errs += resource_errors(c.get("resources"), f"{cpath}.resources")
    return errs


def default_pod_spec(spec: dict) -> None:
    """`SetDefaults_PodSpec` / `SetDefaults_Container` (the fields clients look at)."""
    spec.setdefault("restartPolicy", "Always")
    spec.setdefault("terminationGracePeriodSeconds", 30)
    spec.setdefault("dnsPolicy", "ClusterFirst")
    spec.setdefault("securityContext", {})
    spec.setdefault("schedulerName", "default-scheduler")
    for field in ("initContainers", "containers"):
        for c in spec.get(field) or []:
            image = str(c.get("image", ""))
            tag = image.rsplit("/", 1)[-1]
            latest = ":" not in tag or tag.endswith(":latest")
            c.setdefault("imagePullPolicy", "Always" if latest and "@" not in image
                         else "IfNotPresent")
            c.setdefault("terminationMessagePath", "/dev/termination-log")
            c.setdefault("terminationMessagePolicy", "File")
            c.setdefault("resources", {})


def default_pod_requests(spec: dict) -> None:
    """`SetDefaults_Pod`: a resource with a limit and no request gets request = limit."""
    for field in ("initContainers", "containers"):
        for c in spec.get(field) or []:
            res = c.get("resources") or {}
            limits = res.get("limits") or {}
            if limits:
                requests = res.setdefault("requests", {})
                for k, v in limits.items():
                    requests.setdefault(k, v)
                c["resources"] = res


def qos_class(spec: dict) -> str:
    """Pod QoS class (Kubernetes docs "Pod Quality of Service Classes")."""
    containers = list(spec.get("containers") or []) + list(spec.get("initContainers") or [])
    any_set = False
    guaranteed = True
    for c in containers:
        res = c.get("resources") or {}
        req, lim = res.get("requests") or {}, res.get("limits") or {}
        if any(k in ("cpu", "memory") for k in list(req) + list(lim)):
            any_set = True
        for r in ("cpu", "memory"):
            if r not in lim:
                guaranteed = False
            elif r in req and quantities.parse_value(req[r]) != quantities.parse_value(lim[r]):
                guaranteed = False
    if not any_set:
        return "BestEffort"
    return "Guaranteed" if guaranteed else "Burstable"


def _labels_match(selector: dict, labels: dict) -> bool:
    from ratefit.controller.sandbox.selectors import selector_from_label_selector

    return selector_from_label_selector(selector)(labels or {})


def default_workload(kind: str, obj: dict) -> None:
    spec = obj.setdefault("spec", {})
    spec.setdefault("replicas", 1)
    spec.setdefault("revisionHistoryLimit", 10)
    if kind == "Deployment":
        spec.setdefault("progressDeadlineSeconds", 600)
        strategy = spec.setdefault("strategy", {"type": "RollingUpdate"})
        if strategy.get("type", "RollingUpdate") == "RollingUpdate":
            strategy.setdefault("type", "RollingUpdate")
            strategy.setdefault("rollingUpdate", {"maxUnavailable": "25%", "maxSurge": "25%"})
    elif kind == "StatefulSet":
        spec.setdefault("podManagementPolicy", "OrderedReady")
        spec.setdefault("updateStrategy", {"type": "RollingUpdate",
                                           "rollingUpdate": {"partition": 0}})
    template = spec.get("template")
    if isinstance(template, dict) and isinstance(template.get("spec"), dict):
        default_pod_spec(template["spec"])


def workload_errors(kind: str, obj: dict, old: dict | None) -> list[FieldError]:
    spec = obj.get("spec") or {}
    errs: list[FieldError] = []
    selector = spec.get("selector")
    if not selector:
        errs.append(FieldError("spec.selector", REQUIRED))
    elif not (selector.get("matchLabels") or selector.get("matchExpressions")):
        errs.append(FieldError("spec.selector", INVALID, selector,
                               "empty selector is invalid for deployment"))
    replicas = spec.get("replicas", 1)
    if not isinstance(replicas, int) or replicas < 0:
        errs.append(FieldError("spec.replicas", INVALID, replicas,
                               "must be greater than or equal to 0"))
    template = spec.get("template") or {}
    labels = (template.get("metadata") or {}).get("labels") or {}
    if selector and not _labels_match(selector, labels):
        errs.append(FieldError("spec.template.metadata.labels", INVALID, labels,
                               "`selector` does not match template `labels`"))
    errs += pod_spec_errors(template.get("spec"), "spec.template.spec")
    if old is not None and selector and (old.get("spec") or {}).get("selector") != selector:
        errs.append(FieldError("spec.selector", INVALID, selector, "field is immutable"))
    return errs


_POD_MUTABLE_MSG = ("pod updates may not change fields other than `spec.containers[*].image`,"
                    "`spec.initContainers[*].image`,`spec.activeDeadlineSeconds`,"
                    "`spec.tolerations` (only additions to existing tolerations),"
                    "`spec.terminationGracePeriodSeconds` (allow it to be set to 1 if it was "
                    "previously negative)")


def pod_update_errors(new: dict, old: dict) -> list[FieldError]:
    """`ValidatePodUpdate`: only images, activeDeadlineSeconds and tolerations may change."""
    def strip(spec: dict) -> dict:
        spec = dict(spec)
        for k in ("activeDeadlineSeconds", "tolerations", "terminationGracePeriodSeconds"):
            spec.pop(k, None)
        for field in ("containers", "initContainers"):
            if field in spec:
                spec[field] = [{k: v for k, v in c.items() if k != "image"}
                               for c in spec[field]]
        return spec

    if strip(new.get("spec") or {}) != strip(old.get("spec") or {}):
        return [FieldError("spec", FORBIDDEN, detail=_POD_MUTABLE_MSG)]
    return []


def bad_quantity(kind: str, version: str, exc: Exception) -> ApiError:
    """What the server answers when a body does not decode (a malformed quantity)."""
    return ApiError(400, "BadRequest",
                    f'{kind} in version "{version}" cannot be handled as a {kind}: {exc}')
