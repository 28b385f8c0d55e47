"""Discovery and OpenAPI documents, built from the resource types the store serves.

Legacy (unaggregated) discovery: `/version`, `/api` (APIVersions), `/apis`
(APIGroupList), `/api/v1` and `/apis/<group>/<version>` (APIResourceList with verbs,
shortNames, namespaced, kind, categories). kubectl asks for aggregated discovery
first and falls back to these when the answer is plain `application/json`.

OpenAPI: a minimal `/openapi/v3` index and per-group-version documents whose paths
carry PATCH operations (with their parameters) tagged with `x-kubernetes-group-version-kind` and the
`fieldValidation` query parameter. That is what kubectl's field-validation check
(`--validate=strict`, the default of `kubectl apply`/`create`) looks for; finding it,
kubectl leaves validation to the server instead of downloading `/openapi/v2` (which
the sandbox does not serve: 404). The documents hold no schemas, so kubectl computes
strategic merge patches from its built-in types.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from ratefit.controller.sandbox.resources import GROUP_ORDER, ResourceType

VERSION = {
    "major": "1",
    "minor": "33",
    "gitVersion": "v1.33.0+ratefit-sandbox",
    "gitCommit": "0000000000000000000000000000000000000000",
    "gitTreeState": "clean",
    "buildDate": "2026-01-01T00:00:00Z",
    "goVersion": "n/a (ratefit sandbox, Python)",
    "compiler": "python",
    "platform": "linux/amd64",
}


def _groups(types: list[ResourceType]) -> dict[str, list[str]]:
    groups: dict[str, list[str]] = {}
    for rt in types:
        versions = groups.setdefault(rt.group, [])
        if rt.version not in versions:
            versions.append(rt.version)
    order = {g: i for i, g in enumerate(GROUP_ORDER)}
    return dict(sorted(groups.items(), key=lambda kv: (order.get(kv[0], len(order)), kv[0])))


def api_versions(server_address: str) -> dict[str, Any]:
    return {"kind": "APIVersions", "versions": ["v1"],
            "serverAddressByClientCIDRs": [{"clientCIDR": "0.0.0.0/0",
                                            "serverAddress": server_address}]}


def _group_doc(name: str, versions: list[str]) -> dict[str, Any]:
    vs = [{"groupVersion": f"{name}/{v}", "version": v} for v in versions]
    return {"name": name, "versions": vs, "preferredVersion": vs[0]}


def api_group_list(types: list[ResourceType]) -> dict[str, Any]:
    return {"kind": "APIGroupList", "apiVersion": "v1",
            "groups": [_group_doc(g, vs) for g, vs in _groups(types).items() if g]}


def api_group(types: list[ResourceType], group: str) -> dict[str, Any] | None:
    vs = _groups(types).get(group)
    if not vs or not group:
        return None
    return {"kind": "APIGroup", "apiVersion": "v1", **_group_doc(group, vs)}


def resource_list(types: list[ResourceType], group: str, version: str) -> dict[str, Any] | None:
    mine = [rt for rt in types if rt.group == group and rt.version == version]
    if not mine:
        return None
    resources: list[dict[str, Any]] = []
    for rt in sorted(mine, key=lambda r: r.plural):
        resources += rt.discovery()
    return {"kind": "APIResourceList", "apiVersion": "v1",
            "groupVersion": f"{group}/{version}" if group else version,
            "resources": resources}


def _gv_path(group: str, version: str) -> str:
    return f"api/{version}" if not group else f"apis/{group}/{version}"


def openapi_v3_doc(types: list[ResourceType], group: str, version: str) -> dict[str, Any] | None:
    mine = [rt for rt in types if rt.group == group and rt.version == version]
    if not mine:
        return None
    params = [{"name": n, "in": "query", "schema": {"type": "string", "uniqueItems": True}}
              for n in ("dryRun", "fieldManager", "fieldValidation", "force")]
    paths: dict[str, Any] = {}
    for rt in mine:
        base = "/" + _gv_path(group, version)
        if rt.namespaced:
            base += "/namespaces/{namespace}"
        gvk = [{"group": group, "version": version, "kind": rt.kind}]
        op = {"operationId": f"patch{rt.kind}", "x-kubernetes-action": "patch",
              "x-kubernetes-group-version-kind": gvk[0], "parameters": params,
              "responses": {"200": {"description": "OK"}}}
        paths[f"{base}/{rt.plural}/{{name}}"] = {"patch": op}
        paths[f"{base}/{rt.plural}"] = {
            "post": {"operationId": f"create{rt.kind}", "x-kubernetes-action": "post",
                     "x-kubernetes-group-version-kind": gvk[0], "parameters": params,
                     "responses": {"201": {"description": "Created"}}}}
    return {"openapi": "3.0.0",
            "info": {"title": "ratefit sandbox (minimal, no schemas)", "version": "v1.33.0"},
            "paths": paths, "components": {"schemas": {}}}


def openapi_v3_index(types: list[ResourceType]) -> dict[str, Any]:
    paths = {}
    for group, versions in _groups(types).items():
        for v in versions:
            doc = openapi_v3_doc(types, group, v)
            digest = hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:16]
            paths[_gv_path(group, v)] = {
                "serverRelativeURL": f"/openapi/v3/{_gv_path(group, v)}?hash={digest}"}
    return {"paths": paths}
