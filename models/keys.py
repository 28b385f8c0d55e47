"""Model keys: ``namespace/workload/container`` in Kubernetes name syntax.

A key names one container of one workload. The parts follow the Kubernetes
object-name rules (Kubernetes docs, "Object Names and IDs"): the namespace and the
container name are RFC 1123 DNS labels (at most 63 characters of lower-case
alphanumerics and '-', starting and ending with an alphanumeric); the workload name
is an RFC 1123 DNS subdomain (at most 253 characters, '.' allowed between labels).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from ratefit.models.errors import InputError

_LABEL = r"[a-z0-9]([-a-z0-9]*[a-z0-9])?"
LABEL_RE = re.compile(rf"^{_LABEL}$")
SUBDOMAIN_RE = re.compile(rf"^{_LABEL}(\.{_LABEL})*$")
#: a key as one regular expression (used by the API's pydantic models)
KEY_PATTERN = rf"^{_LABEL}/{_LABEL}(\.{_LABEL})*/{_LABEL}$"


@dataclass(frozen=True, order=True)
class ModelKey:
    namespace: str
    workload: str
    container: str

    def __str__(self) -> str:
        return f"{self.namespace}/{self.workload}/{self.container}"


def parse_key(text: str, *, field: str = "key") -> ModelKey:
    """Parse ``namespace/workload/container``; raise InputError naming the bad part."""
    if not isinstance(text, str):
        raise InputError(f"{field}: expected 'namespace/workload/container', got {text!r}")
    parts = text.split("/")
    if len(parts) != 3:
        raise InputError(
            f"{field}: {text!r} is not 'namespace/workload/container' "
            f"(3 parts separated by '/', got {len(parts)})"
        )
    ns, wl, ct = parts
    _check(ns, LABEL_RE, 63, f"{field} namespace", text)
    _check(wl, SUBDOMAIN_RE, 253, f"{field} workload", text)
    _check(ct, LABEL_RE, 63, f"{field} container", text)
    return ModelKey(ns, wl, ct)


def _check(part: str, pattern: re.Pattern[str], max_len: int, what: str, whole: str) -> None:
    if not part or len(part) > max_len or not pattern.match(part):
        raise InputError(
            f"{what} {part!r} in {whole!r} is not a valid Kubernetes name: use at most "
            f"{max_len} lower-case letters, digits and '-', starting and ending with a letter or digit"
        )
