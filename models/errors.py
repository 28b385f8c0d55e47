"""The exception tree of ratefit, shared by models and controller.

    RatefitError
    ├── InputError            bad user input (CSV, flags, keys); says file/line/field
    │   └── SampleFileError   a samples file that cannot be read
    ├── NotEnoughData         too few clean samples to learn from
    ├── ArtifactError         a model artifact is corrupt, truncated or edited
    ├── UnknownModel          no artifact for a key
    ├── PrometheusError       the Prometheus HTTP API failed
    │   ├── PrometheusUnavailable   connection refused / timeout / 5xx (temporary)
    │   └── PromQLError             400/422: the query is wrong (permanent)
    └── (controller adds its own below RatefitError)

Every message says what happened and what to do about it. Library errors are
translated once, at the adapter boundary, and chained with ``from``.
"""

from __future__ import annotations


class RatefitError(Exception):
    """Base of every error ratefit raises on purpose."""


class InputError(RatefitError, ValueError):
    """Bad input from the user: the message names the file, line or field."""


class SampleFileError(InputError):
    """A samples file that cannot be used; carries the path and line number."""

    def __init__(self, path: str, line: int | None, problem: str) -> None:
        self.path = path
        self.line = line
        self.problem = problem
        where = f"{path}:{line}" if line is not None else path
        super().__init__(f"{where}: {problem}")


class NotEnoughData(RatefitError):
    """Too few clean samples to fit and cross-validate a model."""


class ArtifactError(RatefitError):
    """A model artifact that must not be served (corrupt, truncated, hand-edited,
    unknown schema). Retrain the key or restore the file from a backup."""


class UnknownModel(RatefitError, KeyError):
    """No model is stored for the key."""

    def __init__(self, key: str) -> None:
        self.key = key
        super().__init__(key)

    def __str__(self) -> str:
        return f"no model for {self.key!r}: train it with 'ratefit train {self.key} …' (or 'ratefit train --from-policies')"


class PrometheusError(RatefitError):
    """The Prometheus HTTP API did not give a usable answer."""


class PrometheusUnavailable(PrometheusError):
    """Prometheus could not be reached, timed out or answered 5xx (retry later)."""


class PromQLError(PrometheusError):
    """Prometheus refused the query (400/422): fix the PromQL expression."""
