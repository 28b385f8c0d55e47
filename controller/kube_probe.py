"""Read-only probes of the API server for ``ratefit check`` (``controller/check``): the
server's version, API discovery of a group version, a namespace, and a
SelfSubjectAccessReview — each answered as (HTTP status, JSON body or error text), never
raised, so every outcome becomes a checklist line. Lives beside the adapter: only
``controller/kube*`` modules use the kubernetes client.
"""

from __future__ import annotations

import json
from typing import Any

__all__ = ["probe"]


def probe(api: Any, what: str) -> tuple[int, Any]:
    """One read-only (or review) call on the API server through the typed client, raw JSON
    back → (HTTP status, JSON body or error text). ``what``: version | group:<g>/<v> |
    namespace:<name> | ssar:<json body>."""
    from kubernetes import client as k8s
    from kubernetes.client.exceptions import ApiException

    kw: dict[str, Any] = {"_preload_content": False, "_request_timeout": 15}
    kind, _, arg = what.partition(":")
    try:
        if kind == "version":
            resp = k8s.VersionApi(api).get_code(**kw)
        elif kind == "group":
            group, version = arg.split("/")
            resp = k8s.CustomObjectsApi(api).get_api_resources(group, version, **kw)
        elif kind == "namespace":
            resp = k8s.CoreV1Api(api).read_namespace(arg, **kw)
        elif kind == "ssar":
            resp = k8s.AuthorizationV1Api(api).create_self_subject_access_review(json.loads(arg), **kw)
        else:  # pragma: no cover - programming error
            raise ValueError(what)
        try:
            data = resp.data
            return int(getattr(resp, "status", 200) or 200), json.loads(data) if data else {}
        finally:
            resp.release_conn()
    except ApiException as exc:
        return int(exc.status or 0), exc.body
    except Exception as exc:  # connection refused, TLS, DNS: the line says it
        return 0, f"{type(exc).__name__}: {exc}"
