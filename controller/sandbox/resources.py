"""The resource types the sandbox serves: built-ins and the ones CRDs add.

A `ResourceType` carries what discovery advertises (group, version, plural, kind,
namespaced, verbs, short names, subresources) and what the API logic needs (whether
writes to the main resource ignore `status`, the schema of a custom resource).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

ALL_VERBS = ("create", "delete", "deletecollection", "get", "list", "patch", "update", "watch")


@dataclass(frozen=True)
class ResourceType:
    group: str
    version: str
    plural: str
    kind: str
    namespaced: bool = True
    singular: str = ""
    short_names: tuple[str, ...] = ()
    subresources: tuple[str, ...] = ()
    categories: tuple[str, ...] = ()
    verbs: tuple[str, ...] = ALL_VERBS
    #: a custom resource (strategic merge refused, schema enforced)
    custom: bool = False
    #: openAPIV3Schema of a custom resource version
    schema: dict[str, Any] | None = field(default=None, compare=False, hash=False)
    #: a CRD version's additionalPrinterColumns (kubectl get)
    printer_columns: tuple[dict[str, Any], ...] = field(default=(), compare=False, hash=False)
    #: store objects under another group's key (events.k8s.io/v1 shares core/v1 Events)
    storage_group: str | None = None

    @property
    def group_version(self) -> str:
        return f"{self.group}/{self.version}" if self.group else self.version

    @property
    def key(self) -> tuple[str, str]:
        """Storage key: versions of one group share their objects."""
        return (self.group if self.storage_group is None else self.storage_group, self.plural)

    @property
    def has_status(self) -> bool:
        return "status" in self.subresources

    def discovery(self) -> list[dict[str, Any]]:
        main: dict[str, Any] = {
            "name": self.plural,
            "singularName": self.singular or self.kind.lower(),
            "namespaced": self.namespaced,
            "kind": self.kind,
            "verbs": list(self.verbs),
        }
        if self.short_names:
            main["shortNames"] = list(self.short_names)
        if self.categories:
            main["categories"] = list(self.categories)
        out = [main]
        for sub in self.subresources:
            kind = "Scale" if sub == "scale" else self.kind
            verbs = ["get", "patch", "update"]
            out.append({"name": f"{self.plural}/{sub}", "singularName": "",
                        "namespaced": self.namespaced, "kind": kind, "verbs": verbs,
                        **({"group": "autoscaling", "version": "v1"} if sub == "scale" else {})})
        return out


def _r(group: str, version: str, plural: str, kind: str, **kw: Any) -> ResourceType:
    return ResourceType(group=group, version=version, plural=plural, kind=kind, **kw)


BUILTINS: tuple[ResourceType, ...] = (
    _r("", "v1", "namespaces", "Namespace", namespaced=False, short_names=("ns",),
       subresources=("status",), verbs=("create", "delete", "get", "list", "patch", "update",
                                         "watch")),
    _r("", "v1", "nodes", "Node", namespaced=False, short_names=("no",),
       subresources=("status",)),
    _r("", "v1", "pods", "Pod", short_names=("po",), subresources=("status", "resize"),
       categories=("all",)),
    _r("", "v1", "events", "Event", short_names=("ev",)),
    _r("apps", "v1", "deployments", "Deployment", short_names=("deploy",),
       subresources=("status", "scale"), categories=("all",)),
    _r("apps", "v1", "statefulsets", "StatefulSet", short_names=("sts",),
       subresources=("status", "scale"), categories=("all",)),
    _r("apps", "v1", "replicasets", "ReplicaSet", short_names=("rs",),
       subresources=("status",), categories=("all",)),
    _r("autoscaling", "v2", "horizontalpodautoscalers", "HorizontalPodAutoscaler",
       short_names=("hpa",), subresources=("status",), categories=("all",)),
    _r("events.k8s.io", "v1", "events", "Event", short_names=("ev",), storage_group=""),
    _r("coordination.k8s.io", "v1", "leases", "Lease"),
    # answered by access.py (allow-all, deny rules as a fault mode); nothing is stored
    _r("authorization.k8s.io", "v1", "selfsubjectaccessreviews", "SelfSubjectAccessReview",
       namespaced=False, verbs=("create",)),
    _r("apiextensions.k8s.io", "v1", "customresourcedefinitions", "CustomResourceDefinition",
       namespaced=False, short_names=("crd", "crds"), subresources=("status",)),
    # stored and served, not acted upon (so that whole manifest sets load)
    _r("", "v1", "configmaps", "ConfigMap", short_names=("cm",)),
    _r("", "v1", "secrets", "Secret"),
    _r("", "v1", "services", "Service", short_names=("svc",), subresources=("status",),
       categories=("all",)),
    _r("", "v1", "serviceaccounts", "ServiceAccount", short_names=("sa",)),
    _r("", "v1", "persistentvolumeclaims", "PersistentVolumeClaim", short_names=("pvc",),
       subresources=("status",)),
    _r("batch", "v1", "jobs", "Job", subresources=("status",), categories=("all",)),
    _r("batch", "v1", "cronjobs", "CronJob", short_names=("cj",), subresources=("status",), categories=("all",)),
    _r("policy", "v1", "poddisruptionbudgets", "PodDisruptionBudget", short_names=("pdb",),
       subresources=("status",)),
    _r("rbac.authorization.k8s.io", "v1", "roles", "Role"),
    _r("rbac.authorization.k8s.io", "v1", "rolebindings", "RoleBinding"),
    _r("rbac.authorization.k8s.io", "v1", "clusterroles", "ClusterRole", namespaced=False),
    _r("rbac.authorization.k8s.io", "v1", "clusterrolebindings", "ClusterRoleBinding",
       namespaced=False),
)

#: preferred versions of the built-in groups
GROUP_ORDER = ("", "apps", "autoscaling", "batch", "policy", "rbac.authorization.k8s.io",
               "events.k8s.io", "coordination.k8s.io", "apiextensions.k8s.io",
               "authorization.k8s.io")


def from_crd(crd: dict[str, Any]) -> list[ResourceType]:
    """The served versions of a CustomResourceDefinition as resource types."""
    spec = crd.get("spec") or {}
    names = spec.get("names") or {}
    out = []
    for ver in spec.get("versions") or []:
        if not ver.get("served", True):
            continue
        subs = []
        if "status" in (ver.get("subresources") or {}):
            subs.append("status")
        out.append(ResourceType(
            group=spec["group"], version=ver["name"], plural=names["plural"],
            kind=names["kind"], namespaced=spec.get("scope", "Namespaced") == "Namespaced",
            singular=names.get("singular", names["kind"].lower()),
            short_names=tuple(names.get("shortNames") or ()),
            categories=tuple(names.get("categories") or ()),
            subresources=tuple(subs), custom=True,
            schema=(ver.get("schema") or {}).get("openAPIV3Schema"),
            printer_columns=tuple(ver.get("additionalPrinterColumns") or ())))
    return out
