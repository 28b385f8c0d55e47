"""The Kubernetes REST semantics of the sandbox, independent of the HTTP layer.

`Api.handle(request)` routes `/api/v1/…` and `/apis/<group>/<version>/…` paths to the
verbs (get, list, watch, create, update, patch, delete, deletecollection) of the
resource types in the store, with the subresources `status` (writes ignore the rest of
the object; main-resource writes ignore status) and pods' `resize`. It implements
resourceVersion preconditions (409 Conflict), `generation` (moves on spec changes
only), `dryRun=All` (validate and answer, store nothing), the three patch types,
validation (422 Invalid with `details.causes`), CRD schemas for custom objects, and
watches fed from the store's change history.
"""

from __future__ import annotations

import base64
import copy
import json
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import yaml

from ratefit.controller.sandbox import errors as E
from ratefit.controller.sandbox import events, objects, quantities, schema, validation
from ratefit.controller.sandbox.patches import PatchError, json_patch, merge_patch, strategic_merge
from ratefit.controller.sandbox.resources import ResourceType, from_crd
from ratefit.controller.sandbox.selectors import parse_field_selector, parse_label_selector
from ratefit.controller.sandbox.store import Store
from ratefit.controller.sandbox.tables import to_table
from ratefit.controller.sandbox.workloads import Workloads, finish_resize, prepare_pod

JSON_PATCH = "application/json-patch+json"
MERGE_PATCH = "application/merge-patch+json"
STRATEGIC_PATCH = "application/strategic-merge-patch+json"

CRDS = ("apiextensions.k8s.io", "customresourcedefinitions")
#: allocatable resources of the pretend node `sandbox-node`
NODE_ALLOCATABLE = {"cpu": "16", "memory": "64Gi", "pods": "1000"}
PODS = ("", "pods")
NAMESPACES = ("", "namespaces")
_WORKLOADS = {("apps", "deployments"): "Deployment", ("apps", "statefulsets"): "StatefulSet",
              ("apps", "replicasets"): "ReplicaSet"}
_GENERATION = {("apps", "deployments"), ("apps", "statefulsets"), ("apps", "replicasets"),
               ("", "pods"), ("autoscaling", "horizontalpodautoscalers"), CRDS}


@dataclass
class Request:
    method: str
    path: str
    query: dict[str, list[str]] = field(default_factory=dict)
    headers: dict[str, str] = field(default_factory=dict)
    body: bytes = b""
    #: `Warning` header texts collected while serving (e.g. pruned unknown fields)
    warnings: list[str] = field(default_factory=list)

    def q(self, name: str, default: str | None = None) -> str | None:
        values = self.query.get(name)
        return values[-1] if values else default

    def flag(self, name: str) -> bool:
        return (self.q(name) or "").lower() in ("true", "1")


@dataclass
class Response:
    code: int
    body: Any = None
    headers: dict[str, str] = field(default_factory=dict)
    #: watch events; None items are idle ticks (nothing to send)
    stream: Iterator[dict | None] | None = None


@dataclass(frozen=True)
class Route:
    rtype: ResourceType
    namespace: str | None
    name: str | None
    sub: str | None


def _not_found_path() -> E.ApiError:
    return E.ApiError(404, "NotFound", "the server could not find the requested resource",
                      {})


class Api:
    """REST verbs over a `Store`; controllers (`Workloads`) run after each write."""

    def __init__(self, store: Store, *, bookmark_interval: float = 1.0,
                 stopping: threading.Event | None = None,
                 node_allocatable: dict[str, str] | None = None,
                 startup_seconds: float = 0.0) -> None:
        self.store = store
        #: what the one (pretend) node can give a pod; larger resizes are Infeasible
        self.node_allocatable = dict(node_allocatable or NODE_ALLOCATABLE)
        self.workloads = Workloads(store, startup_seconds=startup_seconds)
        self.bookmark_interval = bookmark_interval
        self.stopping = stopping or threading.Event()

    # --- routing ------------------------------------------------------------------------
    def route(self, path: str) -> Route:
        parts = [p for p in path.split("/") if p]
        if parts[:2] == ["api", "v1"]:
            group, version, rest = "", "v1", parts[2:]
        elif parts[:1] == ["apis"] and len(parts) >= 3:
            group, version, rest = parts[1], parts[2], parts[3:]
        else:
            raise _not_found_path()
        if not rest:
            raise _not_found_path()
        ns: str | None = None
        if rest[0] == "namespaces" and len(rest) >= 3 and not (
                len(rest) == 3 and rest[2] in ("status", "finalize")):
            ns, rest = rest[1], rest[2:]
        plural = rest[0]
        name = rest[1] if len(rest) > 1 else None
        sub = rest[2] if len(rest) > 2 else None
        if len(rest) > 3:
            raise _not_found_path()
        rtype = self.store.find_type(group, version, plural)
        if rtype is None:
            raise _not_found_path()
        if ns is not None and not rtype.namespaced:
            raise _not_found_path()
        if rtype.namespaced and ns is None and name is not None:
            raise _not_found_path()
        if sub is not None and sub not in rtype.subresources:
            raise _not_found_path()
        return Route(rtype, ns, name, sub)

    def handle(self, req: Request) -> Response:
        resp = self._handle(req)
        if req.warnings:
            # RFC 9110 Warning-style header as the API server sends it: 299 - "text"
            resp.headers["Warning"] = ", ".join(
                '299 - "' + w.replace('\\', '\\\\').replace('"', '\\"') + '"'
                for w in req.warnings)
        return resp

    def _handle(self, req: Request) -> Response:
        try:
            r = self.route(req.path)
            m = req.method
            table = "as=Table" in req.headers.get("accept", "").replace(" ", "")
            if m == "GET" and r.name is None:
                if req.flag("watch"):
                    return self.watch(r, req)
                out = self.list(r, req)
                return Response(200, to_table(r.rtype, out["items"], out["metadata"])
                                if table else out)
            if m == "GET" and r.sub == "scale":
                return Response(200, self._scale_view(r.rtype, self._lookup(r)))
            if m == "GET":
                obj = self.get(r)
                return Response(200, to_table(r.rtype, [obj], {"resourceVersion":
                                obj["metadata"].get("resourceVersion", "")}) if table else obj)
            if m == "POST" and r.name is None and r.sub is None:
                return Response(201, self.create(r, req))
            if m == "PUT" and r.name is not None:
                return Response(200, self.update(r, req))
            if m == "PATCH" and r.name is not None:
                return Response(200, self.patch(r, req))
            if m == "DELETE" and r.name is not None and r.sub is None:
                return Response(200, self.delete(r, req))
            if m == "DELETE" and r.name is None:
                return Response(200, self.delete_collection(r, req))
            raise E.method_not_allowed(m, req.path)
        except E.ApiError as exc:
            return Response(exc.code, exc.status(), dict(exc.headers))

    # --- helpers ------------------------------------------------------------------------
    def _shape(self, rt: ResourceType, obj: dict) -> dict:
        """The stored object as the route's API version shows it."""
        if rt.group == "events.k8s.io":
            return events.to_events_v1(obj)
        obj["apiVersion"] = rt.group_version
        obj["kind"] = rt.kind
        return obj

    def _to_storage(self, rt: ResourceType, obj: dict) -> dict:
        if rt.group == "events.k8s.io":
            return events.to_core(obj)
        return obj

    def _load_body(self, req: Request) -> Any:
        ctype = req.headers.get("content-type", "application/json").split(";")[0].strip()
        if ctype == "application/vnd.kubernetes.protobuf":
            # A real API server also takes protobuf (kubectl's `create namespace|deployment …`
            # generators send it); the stand-in speaks JSON and YAML only — say so plainly.
            raise E.unsupported_media(ctype, ["application/json", "application/yaml"])
        try:
            if "yaml" in ctype:
                return yaml.safe_load(req.body.decode() or "null")
            return json.loads(req.body.decode() or "null")
        except (ValueError, yaml.YAMLError) as exc:
            raise E.bad_request(f"the request body is not valid JSON: {exc}") from exc

    def _dry_run(self, req: Request) -> bool:
        values = req.query.get("dryRun") or []
        for v in values:
            if v != "All":
                raise E.bad_request(f'dryRun: Unsupported value: "{v}": supported values: "All"')
        return bool(values)

    def _lookup(self, r: Route) -> dict:
        obj = self.store.raw(r.rtype.key, r.namespace or "", r.name or "")
        if obj is None:
            raise E.not_found(r.rtype.plural, r.rtype.group, r.name or "")
        return copy.deepcopy(obj)

    def get(self, r: Route) -> dict:
        return self._shape(r.rtype, self._lookup(r))

    def list(self, r: Route, req: Request) -> dict:
        """List, with `limit`/`continue` paging: the continue token holds the position
        after the last item of the page (ordered by namespace/name) and the list's
        resourceVersion; later pages show objects as they are now (not a snapshot)."""
        labels = parse_label_selector(req.q("labelSelector"))
        fields = parse_field_selector(req.q("fieldSelector"))
        try:
            limit = int(req.q("limit") or 0)
        except ValueError as exc:
            raise E.bad_request("limit must be an integer") from exc
        after: tuple[str, str] | None = None
        token = req.q("continue")
        with self.store.lock:
            rv = str(self.store.resource_version)
            if token:
                try:
                    state = json.loads(base64.urlsafe_b64decode(token.encode()))
                    after, rv = (state["ns"], state["name"]), state["rv"]
                except (ValueError, KeyError, TypeError) as exc:
                    raise E.bad_request("continue key is not valid: malformed token") from exc
                if int(rv) < self.store.compacted:
                    raise E.ApiError(410, "Expired", "The provided continue parameter is too "
                                     "old to display a consistent list result. You can start a "
                                     "new list without the continue parameter.")
            matched = []
            for o in self.store.iter_raw(r.rtype.key, r.namespace):
                md = o["metadata"]
                if after is not None and (md.get("namespace", ""), md["name"]) <= after:
                    continue
                if labels(md.get("labels") or {}) and fields(o):
                    matched.append(o)
            meta: dict[str, Any] = {"resourceVersion": rv}
            if limit > 0 and len(matched) > limit:
                last = matched[limit - 1]["metadata"]
                meta["continue"] = base64.urlsafe_b64encode(json.dumps(
                    {"ns": last.get("namespace", ""), "name": last["name"], "rv": rv}).encode()
                ).decode()
                meta["remainingItemCount"] = len(matched) - limit
                matched = matched[:limit]
            items = [self._shape(r.rtype, copy.deepcopy(o)) for o in matched]
        return {"kind": f"{r.rtype.kind}List", "apiVersion": r.rtype.group_version,
                "metadata": meta, "items": items}

    # --- create -------------------------------------------------------------------------
    def create(self, r: Route, req: Request) -> dict:
        body = self._load_body(req)
        if not isinstance(body, dict):
            raise E.bad_request("the request body must be a JSON object")
        self._check_type(r.rtype, body)
        md = body.setdefault("metadata", {})
        if not isinstance(md, dict):
            raise E.bad_request("metadata must be an object")
        if r.namespace is not None:
            if md.get("namespace") not in (None, "", r.namespace):
                raise E.bad_request("the namespace of the provided object does not match the "
                                    "namespace sent on the request")
            md["namespace"] = r.namespace
        else:
            md.pop("namespace", None)
        if not md.get("name") and md.get("generateName"):
            md["name"] = f"{md['generateName']}{objects.rand_suffix()}"
        dry = self._dry_run(req)
        with self.store.lock:
            if r.namespace is not None and self.store.raw(NAMESPACES, "", r.namespace) is None:
                raise E.not_found("namespaces", "", r.namespace)
            name = md.get("name") or ""
            if name and self.store.raw(r.rtype.key, r.namespace or "", name) is not None:
                raise E.already_exists(r.rtype.plural, r.rtype.group, name)
            for k in ("resourceVersion", "deletionTimestamp", "deletionGracePeriodSeconds"):
                md.pop(k, None)
            md["uid"] = objects.new_uid()
            md["creationTimestamp"] = objects.now()
            if r.rtype.key in _GENERATION or r.rtype.custom:
                md["generation"] = 1
            if r.rtype.has_status and r.rtype.key != PODS:
                body.pop("status", None)
            if r.rtype.key == NAMESPACES:
                body["status"] = {"phase": "Active"}
                body.setdefault("spec", {}).setdefault("finalizers", ["kubernetes"])
                md.setdefault("labels", {})["kubernetes.io/metadata.name"] = md.get("name", "")
            obj = self._to_storage(r.rtype, self._admit(r.rtype, body, None, req))
            if dry:
                obj["metadata"].pop("resourceVersion", None)
                return self._shape(r.rtype, obj)
            saved = self.store.save(r.rtype.key, obj, None)
            if r.rtype.key == PODS:
                self.workloads.after_pod_create(saved)
            self._after_write(r.rtype, saved)
            return self._shape(r.rtype, saved)

    def _check_type(self, rt: ResourceType, body: dict) -> None:
        av, kind = body.get("apiVersion"), body.get("kind")
        if av and av != rt.group_version:
            if rt.group or av.split("/")[0] != rt.version:
                raise E.bad_request(f"the API version in the data ({av}) does not match the "
                                    f"expected API version ({rt.group_version})")
        if kind and kind != rt.kind:
            raise E.bad_request(f"the kind in the data ({kind}) does not match the expected "
                                f"kind ({rt.kind})")
        body["apiVersion"], body["kind"] = rt.group_version, rt.kind

    # --- admission: defaulting, canonical form, validation ------------------------------
    def _admit(self, rt: ResourceType, obj: dict, old: dict | None, req: Request) -> dict:
        md = obj["metadata"]
        key = rt.key
        name = md.get("name") or ""
        errs: list[E.FieldError] = []
        errs += validation.name_errors(name, label=key == NAMESPACES)
        errs += validation.metadata_errors(md)
        if rt.custom:
            errs += self._admit_custom(rt, obj, req)
        elif key == PODS:
            try:
                validation.canonicalize_pod_spec(obj.get("spec"))
            except validation.QuantityDecodeError as exc:
                raise validation.bad_quantity(rt.kind, rt.version, exc) from exc
            errs += validation.pod_spec_errors(obj.get("spec"), "spec")
            if old is None and not errs:
                prepare_pod(obj, pending=self.workloads.delayed)
            elif old is not None:
                errs += validation.pod_update_errors(obj, old)
        elif key in _WORKLOADS:
            kind = _WORKLOADS[key]
            try:
                validation.canonicalize_pod_spec(((obj.get("spec") or {}).get("template")
                                                  or {}).get("spec"))
            except validation.QuantityDecodeError as exc:
                raise validation.bad_quantity(rt.kind, rt.version, exc) from exc
            validation.default_workload(kind, obj)
            errs += validation.workload_errors(kind, obj, old)
        elif key == CRDS:
            errs += self._crd_errors(obj)
        elif rt.group == "events.k8s.io" and old is None:
            for f in ("eventTime", "reportingController", "reportingInstance", "action",
                      "reason"):
                if not obj.get(f):
                    errs.append(E.FieldError(f, E.REQUIRED))
            if obj.get("type") not in ("Normal", "Warning"):
                errs.append(E.FieldError("type", E.UNSUPPORTED, obj.get("type", ""),
                                         'supported values: "Normal", "Warning"'))
        elif key == ("autoscaling", "horizontalpodautoscalers"):
            spec = obj.get("spec") or {}
            if not spec.get("scaleTargetRef"):
                errs.append(E.FieldError("spec.scaleTargetRef", E.REQUIRED))
            if not isinstance(spec.get("maxReplicas"), int) or spec["maxReplicas"] < 1:
                errs.append(E.FieldError("spec.maxReplicas", E.INVALID, spec.get("maxReplicas"),
                                         "must be greater than or equal to 1"))
        if errs:
            raise E.invalid(rt.kind, rt.group, name, errs)
        if old is not None and (key in _GENERATION or rt.custom):
            sep_status = rt.has_status
            if objects.body_of(obj, status=not sep_status) != \
                    objects.body_of(old, status=not sep_status):
                md["generation"] = old["metadata"].get("generation", 1) + 1
            else:
                md["generation"] = old["metadata"].get("generation", 1)
        return obj

    def _admit_custom(self, rt: ResourceType, obj: dict, req: Request) -> list[E.FieldError]:
        sch = rt.schema or {}
        schema.apply_defaults(sch, obj)
        dropped = schema.prune(sch, obj, root=True)
        mode = (req.q("fieldValidation") or "").lower()
        if dropped and mode == "strict":
            raise E.bad_request(
                f'{rt.kind} in version "{rt.version}" cannot be handled as a {rt.kind}: '
                "strict decoding error: " + ", ".join(f'unknown field "{d}"' for d in dropped))
        if dropped and mode != "ignore":
            req.warnings += [f'unknown field "{d}"' for d in dropped]
        return schema.validate({k: v for k, v in sch.items()}, obj)

    def _crd_errors(self, crd: dict) -> list[E.FieldError]:
        spec = crd.get("spec") or {}
        names = spec.get("names") or {}
        errs = []
        for f in ("group", "scope"):
            if not spec.get(f):
                errs.append(E.FieldError(f"spec.{f}", E.REQUIRED))
        for f in ("plural", "kind"):
            if not names.get(f):
                errs.append(E.FieldError(f"spec.names.{f}", E.REQUIRED))
        if spec.get("scope") not in (None, "Namespaced", "Cluster"):
            errs.append(E.FieldError("spec.scope", E.UNSUPPORTED, spec["scope"],
                                     'supported values: "Cluster", "Namespaced"'))
        if names.get("plural") and spec.get("group") and \
                crd["metadata"].get("name") != f"{names['plural']}.{spec['group']}":
            errs.append(E.FieldError("metadata.name", E.INVALID, crd["metadata"].get("name"),
                                     'must be spec.names.plural+"."+spec.group'))
        versions = spec.get("versions") or []
        if not versions:
            errs.append(E.FieldError("spec.versions", E.INVALID, [],
                                     "must have exactly one version marked as storage version"))
        elif sum(1 for v in versions if v.get("storage")) != 1:
            errs.append(E.FieldError("spec.versions", E.INVALID, versions,
                                     "must have exactly one version marked as storage version"))
        for i, v in enumerate(versions):
            if not (v.get("schema") or {}).get("openAPIV3Schema"):
                errs.append(E.FieldError(f"spec.versions[{i}].schema.openAPIV3Schema",
                                         E.REQUIRED, detail="schemas are required"))
        return errs

    def _crd_status(self, crd: dict) -> None:
        t = objects.now()
        names = (crd.get("spec") or {}).get("names") or {}
        accepted = dict(names)
        accepted.setdefault("singular", names.get("kind", "").lower())
        accepted.setdefault("listKind", f"{names.get('kind', '')}List")
        crd["spec"]["names"] = accepted
        crd["status"] = {
            "acceptedNames": accepted,
            "conditions": [
                {"type": "NamesAccepted", "status": "True", "lastTransitionTime": t,
                 "reason": "NoConflicts", "message": "no conflicts found"},
                {"type": "Established", "status": "True", "lastTransitionTime": t,
                 "reason": "InitialNamesAccepted", "message": "the initial names have been "
                 "accepted"},
            ],
            "storedVersions": [v["name"] for v in crd["spec"].get("versions") or []
                               if v.get("storage")],
        }

    def _after_write(self, rt: ResourceType, saved: dict) -> None:
        if rt.key == CRDS:
            spec = saved["spec"]
            self.store.unregister_group_plural(spec["group"], spec["names"]["plural"])
            for t in from_crd(saved):
                self.store.register(t)
            if not saved.get("status", {}).get("acceptedNames"):
                new = copy.deepcopy(saved)
                self._crd_status(new)
                self.store.save(CRDS, new, saved)
        elif rt.key in _WORKLOADS:
            self.workloads.after_write(rt.key, saved)

    # --- update / patch -----------------------------------------------------------------
    def update(self, r: Route, req: Request) -> dict:
        body = self._load_body(req)
        if not isinstance(body, dict):
            raise E.bad_request("the request body must be a JSON object")
        md = body.get("metadata") if isinstance(body.get("metadata"), dict) else {}
        if r.rtype.custom and not md.get("resourceVersion"):
            # custom resources allow no unconditional update (apiextensions strategy
            # AllowUnconditionalUpdate() == false)
            raise E.invalid(r.rtype.kind, r.rtype.group, r.name or "", [E.FieldError(
                "metadata.resourceVersion", E.INVALID, 0, "must be specified for an update")])
        with self.store.lock:
            old = self._lookup(r)
            return self._write(r, req, old, body)

    def patch(self, r: Route, req: Request) -> dict:
        ctype = req.headers.get("content-type", "").split(";")[0].strip().lower()
        # server-side apply (application/apply-patch+yaml) is not implemented: 415
        accepted = [JSON_PATCH, MERGE_PATCH]
        if not r.rtype.custom:
            accepted.append(STRATEGIC_PATCH)
        if ctype not in accepted:
            raise E.unsupported_media(ctype, accepted)
        patch = self._load_body(req)
        with self.store.lock:
            old = self._lookup(r)
            view = self._scale_view(r.rtype, old) if r.sub == "scale" else \
                self._shape(r.rtype, copy.deepcopy(old))
            try:
                if ctype == JSON_PATCH:
                    new = json_patch(view, patch)
                elif ctype == MERGE_PATCH:
                    if not isinstance(patch, dict):
                        raise PatchError("a merge patch must be a JSON object", malformed=True)
                    new = merge_patch(view, patch)
                else:
                    new = strategic_merge(view, patch)
            except PatchError as exc:
                if exc.malformed:
                    raise E.bad_request(str(exc)) from exc
                raise E.ApiError(422, "Invalid", str(exc)) from exc
            if not isinstance(new, dict):
                raise E.bad_request("the patch did not result in an object")
            new.setdefault("metadata", {})
            return self._write(r, req, old, new)

    def _write(self, r: Route, req: Request, old: dict, body: dict) -> dict:
        rt = r.rtype
        md = body.get("metadata")
        if not isinstance(md, dict):
            raise E.bad_request("metadata must be an object")
        if md.get("name") not in (None, r.name):
            raise E.bad_request(f"the name of the object ({md.get('name')}) does not match the "
                                f"name on the URL ({r.name})")
        want_rv = md.get("resourceVersion")
        if want_rv and want_rv != old["metadata"]["resourceVersion"]:
            raise E.conflict(rt.plural, rt.group, r.name or "")
        if r.sub == "scale":
            return self._write_scale(r, req, old, body)
        self._check_type(rt, body)
        body = self._to_storage(rt, body)
        if r.sub == "status":
            new = copy.deepcopy(old)
            if "status" in body:
                new["status"] = body["status"]
            else:
                new.pop("status", None)
        elif r.sub == "resize":
            new = self._resize(rt, old, body)
        else:
            new = body
            if rt.has_status:
                if "status" in old:
                    new["status"] = old["status"]
                else:
                    new.pop("status", None)
            for k in ("uid", "creationTimestamp", "namespace", "name", "generation",
                      "deletionTimestamp"):
                if k in old["metadata"]:
                    new["metadata"][k] = old["metadata"][k]
                else:
                    new["metadata"].pop(k, None)
        new["metadata"]["resourceVersion"] = old["metadata"]["resourceVersion"]
        dry = self._dry_run(req)
        if r.sub == "resize":
            admitted = new
        elif r.sub == "status" and not rt.custom:
            admitted = new
        else:
            admitted = self._admit(rt, new, old, req)
        if admitted == old or dry:
            return self._shape(rt, admitted)
        saved = self.store.save(rt.key, admitted, old)
        if r.sub is None:
            self._after_write(rt, saved)
        elif r.sub == "resize":
            self.workloads.after_resize(saved)
        return self._shape(rt, self.store.get(*rt.key, r.namespace, r.name or "") or saved)

    # --- scale subresource --------------------------------------------------------------
    def _scale_view(self, rt: ResourceType, obj: dict) -> dict:
        """autoscaling/v1 Scale of a Deployment or StatefulSet (what `kubectl scale` uses)."""
        md = obj["metadata"]
        sel = ((obj.get("spec") or {}).get("selector") or {}).get("matchLabels") or {}
        return {"kind": "Scale", "apiVersion": "autoscaling/v1",
                "metadata": {k: md[k] for k in ("name", "namespace", "uid", "resourceVersion",
                                                "creationTimestamp") if k in md},
                "spec": {"replicas": (obj.get("spec") or {}).get("replicas", 1)},
                "status": {"replicas": (obj.get("status") or {}).get("replicas", 0),
                           "selector": ",".join(f"{k}={v}" for k, v in sorted(sel.items()))}}

    def _write_scale(self, r: Route, req: Request, old: dict, body: dict) -> dict:
        replicas = (body.get("spec") or {}).get("replicas")
        if not isinstance(replicas, int) or replicas < 0:
            raise E.invalid("Scale", "autoscaling", r.name or "", [E.FieldError(
                "spec.replicas", E.INVALID, replicas, "must be greater than or equal to 0")])
        new = self._shape(r.rtype, copy.deepcopy(old))
        new["spec"]["replicas"] = replicas
        main = Route(r.rtype, r.namespace, r.name, None)
        self._write(main, req, old, new)
        return self._scale_view(r.rtype, self._lookup(main))

    # --- pods/resize --------------------------------------------------------------------
    def _resize(self, rt: ResourceType, old: dict, body: dict) -> dict:
        """Apply only containers' resources (CPU and memory) from `body`, at once."""
        new = copy.deepcopy(old)
        errs: list[E.FieldError] = []
        wanted = {c.get("name"): c for c in (body.get("spec") or {}).get("containers") or []
                  if isinstance(c, dict)}
        try:
            for c in wanted.values():
                validation.canonicalize_resources(c.get("resources"))
        except validation.QuantityDecodeError as exc:
            raise validation.bad_quantity("Pod", "v1", exc) from exc
        for i, c in enumerate(new["spec"].get("containers") or []):
            if c.get("name") not in wanted:
                continue
            want = wanted[c["name"]].get("resources") or {}
            have = c.get("resources") or {}
            path = f"spec.containers[{i}].resources"
            for part in ("requests", "limits"):
                before, after = have.get(part) or {}, want.get(part) or {}
                for res in set(before) | set(after):
                    if res not in ("cpu", "memory") and before.get(res) != after.get(res):
                        errs.append(E.FieldError(f"{path}.{part}[{res}]", E.FORBIDDEN,
                                                 detail="only cpu and memory resources are "
                                                 "mutable"))
                    elif res in before and res not in after:
                        errs.append(E.FieldError(f"{path}.{part}[{res}]", E.FORBIDDEN,
                                                 detail="resource removal is not supported"))
            c["resources"] = {k: v for k, v in want.items() if k in ("requests", "limits", "claims")}
            errs += validation.resource_errors(c["resources"], path)
        if not errs and validation.qos_class(new["spec"]) != validation.qos_class(old["spec"]):
            errs.append(E.FieldError("spec", E.FORBIDDEN,
                                     detail="Pod QOS Class may not change as a result of resizing"))
        if errs:
            raise E.invalid("Pod", "", old["metadata"]["name"], errs)
        if new["spec"] != old["spec"]:
            gen = old["metadata"].get("generation", 1) + 1
            new["metadata"]["generation"] = gen
            status = new.setdefault("status", {})
            conds = [c for c in status.get("conditions") or []
                     if c.get("type") not in ("PodResizePending", "PodResizeInProgress")]
            short = self._infeasible(new["spec"])
            if short:
                # the kubelet cannot fit the pod on its node at all: the desired resources
                # stay in spec, the actual ones in status (resize docs, PodResizePending)
                conds.append({"type": "PodResizePending", "status": "True",
                              "reason": "Infeasible", "message": short,
                              "lastProbeTime": None, "lastTransitionTime": objects.now()})
                status["conditions"] = conds
                status["observedGeneration"] = gen
                return new
            status["conditions"] = conds
            status["observedGeneration"] = gen
            if self.workloads.delayed:
                # the kubelet admitted the resize (allocatedResources) and is actuating it
                for cs in status.get("containerStatuses") or []:
                    spec_c = next((c for c in new["spec"]["containers"]
                                   if c.get("name") == cs.get("name")), {})
                    if (spec_c.get("resources") or {}).get("requests"):
                        cs["allocatedResources"] = dict(spec_c["resources"]["requests"])
                conds.append({"type": "PodResizeInProgress", "status": "True",
                              "lastProbeTime": None, "lastTransitionTime": objects.now()})
            else:
                finish_resize(new)
        return new

    def _infeasible(self, spec: dict) -> str:
        """Why a pod's requests exceed the node's allocatable resources ("" if they fit)."""
        for res, unit, scale in (("cpu", "m", 1000), ("memory", "", 1)):
            cap = quantities.parse_value(self.node_allocatable.get(res, "0"))
            want = sum((quantities.parse_value(((c.get("resources") or {}).get("requests")
                                                or {}).get(res, "0"))
                        for c in spec.get("containers") or []), start=quantities.Decimal(0))
            if cap and want > cap:
                return (f"Node didn't have enough capacity: {res}, requested: "
                        f"{int(want * scale)}, capacity: {int(cap * scale)}")
        return ""

    # --- delete -------------------------------------------------------------------------
    def delete(self, r: Route, req: Request) -> dict:
        dry = self._dry_run(req)
        precond: dict = {}
        policy = req.q("propagationPolicy") or ""
        if req.body:
            opts = self._load_body(req) or {}
            if isinstance(opts, dict):
                precond = opts.get("preconditions") or {}
                policy = opts.get("propagationPolicy") or policy
                if opts.get("dryRun"):
                    dry = True
        with self.store.lock:
            obj = self._lookup(r)
            if precond.get("resourceVersion") and \
                    precond["resourceVersion"] != obj["metadata"]["resourceVersion"]:
                raise E.conflict(r.rtype.plural, r.rtype.group, r.name or "",
                                 f"the ResourceVersion in the precondition "
                                 f"({precond['resourceVersion']}) does not match the "
                                 f"ResourceVersion in record "
                                 f"({obj['metadata']['resourceVersion']}). The object might "
                                 f"have been modified")
            if precond.get("uid") and precond["uid"] != obj["metadata"].get("uid"):
                raise E.conflict(r.rtype.plural, r.rtype.group, r.name or "",
                                 "the UID in the precondition does not match the UID in record")
            if not dry:
                self._delete_one(r.rtype, r.namespace or "", r.name or "",
                                 orphan=policy == "Orphan")
        if r.rtype.key == PODS or r.rtype.custom:
            return self._shape(r.rtype, obj)
        return {"kind": "Status", "apiVersion": "v1", "metadata": {}, "status": "Success",
                "details": {"name": r.name, "group": r.rtype.group, "kind": r.rtype.plural,
                            "uid": obj["metadata"].get("uid")}}

    def _delete_one(self, rt: ResourceType, ns: str, name: str, *, orphan: bool = False) -> None:
        if orphan:
            gone = self.store.remove(rt.key, ns, name)
            uid = (gone or {}).get("metadata", {}).get("uid")
            for key, dns, dname in self.store.dependent_keys(uid or ""):
                obj = self.store.raw(key, dns, dname)
                if obj is None:
                    continue
                new = copy.deepcopy(obj)
                new["metadata"]["ownerReferences"] = [
                    ref for ref in obj["metadata"].get("ownerReferences") or []
                    if ref.get("uid") != uid]
                self.store.save(key, new, obj)
            return
        if rt.key == NAMESPACES:
            for key, items in list(self.store._objects.items()):
                for (ons, oname) in list(items):
                    if ons == name:
                        self.workloads.delete_tree(key, ons, oname)
        gone = self.workloads.delete_tree(rt.key, ns, name)
        if gone is None:
            return
        if rt.key == CRDS:
            spec = gone["spec"]
            group, plural = spec["group"], spec["names"]["plural"]
            for (ons, oname) in list(self.store._objects.get((group, plural), {})):
                self.store.remove((group, plural), ons, oname)
            self.store.unregister_group_plural(group, plural)
        elif rt.key == PODS:
            self.workloads.after_pod_delete(gone)

    def delete_collection(self, r: Route, req: Request) -> dict:
        dry = self._dry_run(req)
        labels = parse_label_selector(req.q("labelSelector"))
        fields = parse_field_selector(req.q("fieldSelector"))
        with self.store.lock:
            items = [o for o in self.store.list(*r.rtype.key, r.namespace)
                     if labels(o["metadata"].get("labels") or {}) and fields(o)]
            if not dry:
                for o in items:
                    self._delete_one(r.rtype, o["metadata"].get("namespace", ""),
                                     o["metadata"]["name"])
            rv = str(self.store.resource_version)
        return {"kind": f"{r.rtype.kind}List", "apiVersion": r.rtype.group_version,
                "metadata": {"resourceVersion": rv},
                "items": [self._shape(r.rtype, o) for o in items]}

    # --- watch --------------------------------------------------------------------------
    def watch(self, r: Route, req: Request) -> Response:
        labels = parse_label_selector(req.q("labelSelector"))
        fields = parse_field_selector(req.q("fieldSelector"))
        rt, ns = r.rtype, r.namespace
        try:
            timeout = float(req.q("timeoutSeconds") or 1800)
        except ValueError as exc:
            raise E.bad_request("timeoutSeconds must be a number") from exc
        bookmarks = req.flag("allowWatchBookmarks")
        rv_text = req.q("resourceVersion") or ""
        try:
            start = int(rv_text) if rv_text not in ("", "0") else None
        except ValueError as exc:
            raise E.bad_request(f"invalid resource version: {rv_text!r}") from exc

        def matches(obj: dict | None) -> bool:
            if obj is None:
                return False
            md = obj.get("metadata", {})
            if ns is not None and md.get("namespace", "") != ns:
                return False
            return labels(md.get("labels") or {}) and fields(obj)

        table = "as=Table" in req.headers.get("accept", "").replace(" ", "")

        def event(kind: str, obj: dict) -> dict:
            shown = self._shape(rt, copy.deepcopy(obj))
            if table:   # kubectl get -w: each event carries a one-row Table
                shown = to_table(rt, [shown], {"resourceVersion":
                                               shown["metadata"].get("resourceVersion", "")})
            return {"type": kind, "object": shown}

        def gen() -> Iterator[dict | None]:
            with self.store.lock:
                if start is None:
                    last = self.store.resource_version
                    initial = [event("ADDED", o) for o in self.store.list(*rt.key, ns)
                               if matches(o)]
                else:
                    last = start
                    initial = []
                    if start < self.store.compacted:
                        initial = None
            if start is not None and start > self.store.resource_version:
                # a version from the future (e.g. from before a sandbox restart): like the
                # watch cache, wait up to 3 s for it, then 504 "Too large resource version"
                with self.store.changed:
                    self.store.changed.wait_for(
                        lambda: self.store.resource_version >= start or self.store.closed,
                        timeout=3.0)
                if start > self.store.resource_version:
                    yield {"type": "ERROR", "object": E.ApiError(
                        504, "Timeout", f"Too large resource version: {start}, current: "
                        f"{self.store.resource_version}",
                        {"causes": [{"reason": "ResourceVersionTooLarge",
                                     "message": "Too large resource version"}],
                         "retryAfterSeconds": 1}).status()}
                    return
            if initial is None:
                yield {"type": "ERROR",
                       "object": E.expired(start or 0, self.store.compacted + 1).status()}
                return
            yield from initial
            deadline = time.monotonic() + timeout
            next_bookmark = time.monotonic() + self.bookmark_interval
            while not self.stopping.is_set():
                now = time.monotonic()
                if now >= deadline:
                    return
                wait = min(deadline, next_bookmark if bookmarks else deadline) - now
                with self.store.changed:
                    if self.store.resource_version <= last and not self.store.closed:
                        self.store.changed.wait(timeout=max(0.0, min(wait, 0.5)))
                    changes = self.store.changes_after(last)
                    head = self.store.resource_version
                if self.store.closed or self.stopping.is_set():
                    return
                yield None   # a tick: lets the HTTP layer notice a client that went away
                if changes is None:
                    yield {"type": "ERROR",
                           "object": E.expired(last, self.store.compacted + 1).status()}
                    return
                for c in changes:
                    last = c.rv
                    if c.key != rt.key:
                        continue
                    new_ok, old_ok = matches(c.obj), matches(c.old)
                    if c.type == "MODIFIED":
                        if new_ok and old_ok:
                            yield event("MODIFIED", c.obj)
                        elif new_ok:
                            yield event("ADDED", c.obj)
                        elif old_ok:
                            yield event("DELETED", c.obj)
                    elif new_ok:
                        yield event(c.type, c.obj)
                if not changes:
                    last = max(last, head) if head > last else last
                if bookmarks and time.monotonic() >= next_bookmark:
                    next_bookmark = time.monotonic() + self.bookmark_interval
                    yield {"type": "BOOKMARK", "object": {
                        "kind": rt.kind, "apiVersion": rt.group_version,
                        "metadata": {"resourceVersion": str(max(last, head))}}}
                    last = max(last, head)

        return Response(200, None, {}, gen())
