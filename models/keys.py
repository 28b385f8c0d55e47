"""Model keys: ``namespace/workload/container`` in Kubernetes name syntax — the one grammar.

A key names one container of one workload. This module is the only place the key
grammar is written down; the CRD's ``model`` pattern (``manifests/crd/sizingpolicy.yaml``),
the policy parser (``controller/policy.py``) and the sizing API all take it from here,
and ``tests/test_keys_grammar.py`` proves that the three accept exactly the same keys.

The parts follow the Kubernetes object-name rules (Kubernetes docs, "Object Names and
IDs", kubernetes.io/docs/concepts/overview/working-with-objects/names/):

- namespace: an RFC 1123 label — at most 63 characters, lower-case alphanumerics and
  '-', starting and ending with an alphanumeric (namespaces are label names);
- workload (Deployment or StatefulSet name): an RFC 1123 DNS subdomain — at most 253
  characters, one or more labels joined by '.'; like Kubernetes' own check
  (apimachinery ``IsDNS1123Subdomain``), the labels inside a subdomain are not capped
  at 63 characters, only the whole name at 253;
- container: an RFC 1123 label (the Pod API documents a container name as a DNS_LABEL).

Forms of the same grammar, for the places that need each:

- ``KEY_PATTERN``: the structure with the 63-character caps of namespace and container,
  without look-around, so that it is valid in every regex dialect we hand it to: the
  CRD's ``pattern`` (Go RE2 in the API server), pydantic's ``pattern`` (Rust ``regex``)
  and Python ``re``. It cannot cap the workload at 253 characters (a total length
  over a repeated group is not expressible without look-ahead), so:
- ``WORKLOAD_TOO_LONG``: matches a key whose workload part is longer than 253; the CRD
  refuses it with the CEL rule ``CRD_WORKLOAD_RULE`` (``!self.matches(...)``; CEL's
  ``matches`` is RE2, see Kubernetes docs "Common Expression Language in Kubernetes"),
  and ``MAX_KEY_LENGTH`` is the CRD's ``maxLength``;
- ``KEY_RE``: the whole grammar as one Python regex (``KEY_PATTERN`` plus a look-ahead
  for the 253 cap); ``is_key``/``parse_key`` use it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from ratefit.models.errors import InputError

__all__ = [
    "MAX_LABEL_LENGTH",
    "MAX_SUBDOMAIN_LENGTH",
    "MAX_KEY_LENGTH",
    "LABEL_PATTERN",
    "SUBDOMAIN_PATTERN",
    "KEY_PATTERN",
    "KEY_RE",
    "WORKLOAD_TOO_LONG",
    "CRD_WORKLOAD_RULE",
    "ModelKey",
    "is_key",
    "parse_key",
]

#: RFC 1123 label (namespace, container): Kubernetes docs, "Object Names and IDs"
MAX_LABEL_LENGTH = 63
#: RFC 1123 DNS subdomain (workload name): same source
MAX_SUBDOMAIN_LENGTH = 253
#: namespace / workload / container with their separators: 63 + 1 + 253 + 1 + 63
MAX_KEY_LENGTH = MAX_LABEL_LENGTH + 1 + MAX_SUBDOMAIN_LENGTH + 1 + MAX_LABEL_LENGTH

# a label of 1..63 characters: the length cap is in the quantifier
_LABEL = r"[a-z0-9](?:[-a-z0-9]{0,61}[a-z0-9])?"
# one label of a subdomain (uncapped: only the whole subdomain is capped)
_SUB_LABEL = r"[a-z0-9](?:[-a-z0-9]*[a-z0-9])?"
_SUBDOMAIN = rf"{_SUB_LABEL}(?:\.{_SUB_LABEL})*"

LABEL_PATTERN = rf"^{_LABEL}$"
SUBDOMAIN_PATTERN = rf"^{_SUBDOMAIN}$"
#: the key's structure, in the dialect common to RE2, Rust regex and Python re
KEY_PATTERN = rf"^{_LABEL}/{_SUBDOMAIN}/{_LABEL}$"
#: a key whose workload part is longer than 253 characters (RE2-compatible)
WORKLOAD_TOO_LONG = rf"^[^/]*/[^/]{{{MAX_SUBDOMAIN_LENGTH + 1},}}/"
#: the CEL rule the CRD adds to ``pattern`` and ``maxLength``
CRD_WORKLOAD_RULE = f"!self.matches('{WORKLOAD_TOO_LONG}')"
#: the whole grammar in one Python regex
#: (``\\Z``, not ``$``: Python's ``$`` also matches before a final newline, RE2's does not)
KEY_RE = re.compile(rf"^(?=[^/]*/[^/]{{1,{MAX_SUBDOMAIN_LENGTH}}}/){KEY_PATTERN[1:-1]}\Z")

LABEL_RE = re.compile(rf"{LABEL_PATTERN[:-1]}\Z")
SUBDOMAIN_RE = re.compile(rf"{SUBDOMAIN_PATTERN[:-1]}\Z")


@dataclass(frozen=True, order=True)
class ModelKey:
    namespace: str
    workload: str
    container: str

    def __str__(self) -> str:
        return f"{self.namespace}/{self.workload}/{self.container}"


def is_key(text: object) -> bool:
    """True when ``text`` is a model key (the same answer as the CRD and the API)."""
    return isinstance(text, str) and len(text) <= MAX_KEY_LENGTH and KEY_RE.match(text) is not None


def parse_key(text: str, *, field: str = "key") -> ModelKey:
    """Parse ``namespace/workload/container``; InputError naming the bad part.

    The message never repeats the offending text (it may be huge or hostile): it names
    the part and the rule."""
    if not isinstance(text, str):
        raise InputError(f"{field}: expected a string 'namespace/workload/container'")
    parts = text.split("/")
    if len(parts) != 3:
        raise InputError(
            f"{field}: is not 'namespace/workload/container' (3 parts separated by '/', got {len(parts)})"
        )
    ns, wl, ct = parts
    _check(ns, LABEL_RE, MAX_LABEL_LENGTH, f"{field}: the namespace")
    _check(wl, SUBDOMAIN_RE, MAX_SUBDOMAIN_LENGTH, f"{field}: the workload", dots=True)
    _check(ct, LABEL_RE, MAX_LABEL_LENGTH, f"{field}: the container")
    return ModelKey(ns, wl, ct)


def _check(part: str, pattern: re.Pattern[str], max_len: int, what: str, *, dots: bool = False) -> None:
    if not part or len(part) > max_len or not pattern.match(part):
        extra = " ('.' allowed between labels)" if dots else ""
        raise InputError(
            f"{what} is not a valid Kubernetes name: use 1 to {max_len} lower-case letters, digits "
            f"and '-'{extra}, starting and ending with a letter or digit"
        )
