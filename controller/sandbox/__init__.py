"""A local stand-in for a Kubernetes API server, for tests and demos.

It speaks the REST subset ratefit uses — discovery, namespaces, pods (+ `resize`),
events, Deployments/StatefulSets (with a minimal built-in rollout), HPAs, Leases,
CRDs and their custom objects (schema enforced, `status` subresource), watch,
resourceVersion conflicts, `dryRun=All`, the three patch types, request ≤ limit
validation, fault injection — over plain HTTP on 127.0.0.1, and writes a kubeconfig
that the official `kubernetes` client and `kubectl` accept. It is NOT a cluster: no
scheduler, no kubelet (pods are Running at once), no RBAC (SelfSubjectAccessReview
answers allowed unless a test sets a deny rule), no admission webhooks.

Modules: `server` (HTTP, SandboxServer), `api` (REST semantics), `store` (objects,
revisions, history), `resources` (served types), `discovery` (discovery + OpenAPI),
`patches`, `schema` (CRD schemas), `validation`, `quantities`, `selectors`,
`workloads` (rollout, pod status), `tables` (kubectl printing), `faults`, `manifests`,
`access` (request attributes, access reviews, deny rules), `protobuf` (the one protobuf
body read), `kubeconfig` (writing it without clobbering a user's file).
"""

from __future__ import annotations

__all__ = ["SandboxServer"]


def __getattr__(name: str):  # lazy: keep `import ratefit.controller.sandbox` cheap
    if name == "SandboxServer":
        from ratefit.controller.sandbox.server import SandboxServer

        return SandboxServer
    raise AttributeError(name)
