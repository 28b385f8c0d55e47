"""The SizingPolicy CRD's coordinates — its one home.

Group, version, kind and plural of ``manifests/crd/sizingpolicy.yaml``; every module
that names the resource (the policy parser, the Kubernetes adapter, the stages, the
object references of Events) imports them from here.
"""

from __future__ import annotations

__all__ = ["API_VERSION", "GROUP", "KIND", "PLURAL", "VERSION"]

GROUP = "ratefit.dev"
VERSION = "v1alpha1"
KIND = "SizingPolicy"
PLURAL = "sizingpolicies"
#: ``apiVersion`` of a SizingPolicy object
API_VERSION = f"{GROUP}/{VERSION}"
