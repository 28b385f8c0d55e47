"""Every permission the controller needs: ONE list, read by ``ratefit check`` (one
SelfSubjectAccessReview each) and by the RBAC test (the ClusterRole/Role must grant exactly
these, and a full test run's API requests must need no other).

Derived from the calls the Kubernetes adapter (``controller/kube.py``) and the Lease lock
(``controller/kube_lease.py``) make — verb names as the API server authorizes them
(Kubernetes docs, "Authorization: determine the request verb": GET on one object ``get``, on
a collection ``list``, with ``?watch`` ``watch``; PATCH ``patch``; PUT ``update``; POST
``create``):

==========================  =======================================  ===========================
resource (group)            verbs                                    call
==========================  =======================================  ===========================
sizingpolicies (ratefit.dev)  list, watch                            list and watch policies (the cache)
sizingpolicies/status       patch                                    write a policy's status
deployments, statefulsets   get, list, watch, patch                  the cache; get: re-read after a 409; patch
pods                        list, watch                              pods of in-place workloads (the cache)
pods/resize                 patch                                    in-place resize
horizontalpodautoscalers    list, watch                              autoscaler conflicts (the cache)
events (events.k8s.io)      create                                   an Event per change/proposal
leases (coordination.k8s.io)  get, create, update                    the leader Lease (its namespace only)
==========================  =======================================  ===========================
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Permission", "CONTROLLER_PERMISSIONS", "LEASE_PERMISSIONS", "all_permissions"]


@dataclass(frozen=True, slots=True)
class Permission:
    """One (group, resource[/subresource], verb); ``lease`` True: only in the Lease namespace."""

    group: str
    resource: str
    verb: str
    lease: bool = False

    @property
    def text(self) -> str:
        g = self.group or "core"
        return f"{self.verb} {self.resource} ({g})"

    @property
    def split(self) -> tuple[str, str]:
        """(resource, subresource) as a SelfSubjectAccessReview's resourceAttributes want them."""
        res, _, sub = self.resource.partition("/")
        return res, sub


def _p(group: str, resource: str, *verbs: str, lease: bool = False) -> list[Permission]:
    return [Permission(group, resource, v, lease) for v in verbs]


#: cluster-wide (or per watched namespace) permissions of the controller
CONTROLLER_PERMISSIONS: tuple[Permission, ...] = tuple(
    _p("ratefit.dev", "sizingpolicies", "list", "watch")
    + _p("ratefit.dev", "sizingpolicies/status", "patch")
    + _p("apps", "deployments", "get", "list", "watch", "patch")
    + _p("apps", "statefulsets", "get", "list", "watch", "patch")
    + _p("", "pods", "list", "watch")
    + _p("", "pods/resize", "patch")
    + _p("autoscaling", "horizontalpodautoscalers", "list", "watch")
    + _p("events.k8s.io", "events", "create")
)

#: the leader Lease, in the Lease namespace only
LEASE_PERMISSIONS: tuple[Permission, ...] = tuple(_p("coordination.k8s.io", "leases", "get", "create", "update", lease=True))


def all_permissions() -> tuple[Permission, ...]:
    return CONTROLLER_PERMISSIONS + LEASE_PERMISSIONS
