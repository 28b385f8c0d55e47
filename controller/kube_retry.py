"""Retries and error translation for every Kubernetes API call the adapter makes.

* ``translate(exc, what=…)`` turns the client's ``ApiException`` (and urllib3's
  connection errors) into the ``KubeError`` tree of ``controller/errors.py``, once,
  chaining the original.
* ``RetryPolicy`` + ``call_with_retry`` retry *temporary* failures — 429, 5xx except
  501, connection refused/reset, timeouts — with capped exponential backoff and full
  jitter (delay = U(0, min(cap, base·2^n)); "Exponential Backoff And Jitter", AWS
  Architecture Blog, 2015), and honour ``Retry-After`` (RFC 9110 §10.2.3: seconds; the
  API server sends it with 429 and some 5xx) up to a cap.
* 409 Conflict is NOT retried here: a conflict means our read is stale, and only the
  caller can re-read and recompute. Use ``retry_on_conflict(fn)`` with an ``fn`` that
  re-reads, or handle ``KubeConflict`` in the reconcile loop (the next pass re-reads).

Retrying writes is safe because every write we make is either idempotent (absolute
values, merge patches) or carries a ``metadata.resourceVersion`` precondition: if the
first attempt landed but its answer was lost, the retry gets 409, never a double change.
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

from kubernetes.client.exceptions import ApiException
from urllib3.exceptions import HTTPError as Urllib3Error

from ratefit.controller.errors import (
    KubeConflict,
    KubeError,
    KubeForbidden,
    KubeGone,
    KubeInvalid,
    KubeNotFound,
    KubeUnavailable,
)

__all__ = ["RetryPolicy", "translate", "call_with_retry", "retry_on_conflict"]

T = TypeVar("T")

#: 5xx codes that say "try again" — 501 Not Implemented never gets better.
_TEMPORARY = {429, 500, 502, 503, 504}


@dataclass(frozen=True, slots=True)
class RetryPolicy:
    """How hard to try. Defaults: 5 attempts, 0.2 s base, 10 s cap (common practice,
    no source); Retry-After honoured up to 30 s; 3 attempts for conflict re-reads."""

    max_attempts: int = 5
    base_delay: float = 0.2
    max_delay: float = 10.0
    max_retry_after: float = 30.0
    conflict_attempts: int = 3

    def delay(self, attempt: int, *, retry_after: float | None, rng: Callable[[], float]) -> float:
        """Seconds to wait before attempt ``attempt + 1`` (``attempt`` counts from 0)."""
        if retry_after is not None:
            return max(0.0, min(retry_after, self.max_retry_after))
        return rng() * min(self.max_delay, self.base_delay * (2**attempt))


def _retry_after(headers: object) -> float | None:
    if not headers:
        return None
    try:
        raw = headers.get("Retry-After")  # type: ignore[attr-defined]
    except AttributeError:
        return None
    if raw is None:
        return None
    try:
        return float(raw)
    except (TypeError, ValueError):
        return None  # an HTTP-date: rare from the API server; fall back to backoff


def translate(exc: BaseException, *, what: str) -> KubeError:
    """The KubeError for a client exception (call as ``raise translate(e, what=…) from e``)."""
    if isinstance(exc, KubeError):
        return exc
    if isinstance(exc, ApiException):
        status = exc.status
        message, reason = str(exc.reason or "").strip(), None
        body = exc.body
        if isinstance(body, bytes):
            body = body.decode("utf-8", "replace")
        if body:
            try:
                doc = json.loads(body)
            except (TypeError, ValueError):
                doc = None
            if isinstance(doc, dict):
                message = str(doc.get("message") or message)
                reason = doc.get("reason") or None
                if status in (None, 0) and isinstance(doc.get("code"), int):
                    status = doc["code"]
            elif isinstance(body, str):
                message = body.strip()[:500] or message
        kw = dict(status=status, reason=reason, what=what, retry_after=_retry_after(exc.headers))
        if status == 409:
            return KubeConflict(message or "conflict", **kw)
        if status == 404:
            return KubeNotFound(message or "not found", **kw)
        if status in (401, 403):
            return KubeForbidden(message or "forbidden", **kw)
        if status == 410:
            return KubeGone(message or "resource version too old", **kw)
        if status in (400, 422):
            return KubeInvalid(message or "invalid", **kw)
        if status in _TEMPORARY or status is None or status == 0:
            return KubeUnavailable(message or "API server unavailable", **kw)
        return KubeError(message or "request failed", **kw)
    if isinstance(exc, (Urllib3Error, ConnectionError, TimeoutError)):
        return KubeUnavailable(f"no answer from the API server ({type(exc).__name__}: {exc})", what=what)
    return KubeError(f"{type(exc).__name__}: {exc}", what=what)


def call_with_retry(
    fn: Callable[[], T],
    *,
    what: str,
    policy: RetryPolicy,
    sleep: Callable[[float], None] = time.sleep,
    rng: Callable[[], float] = random.random,
    on_retry: Callable[[KubeError, float], None] | None = None,
) -> T:
    """Call ``fn``; on a temporary failure wait and try again, up to ``policy.max_attempts``.
    Every failure leaves as a KubeError (the last one, when attempts run out)."""
    attempt = 0
    while True:
        try:
            return fn()
        except (ApiException, Urllib3Error, ConnectionError, TimeoutError) as exc:
            err = translate(exc, what=what)
            if not err.temporary or attempt + 1 >= policy.max_attempts:
                raise err from exc
            wait = policy.delay(attempt, retry_after=err.retry_after, rng=rng)
            if on_retry is not None:
                on_retry(err, wait)
            sleep(wait)
            attempt += 1


def retry_on_conflict(fn: Callable[[], T], *, attempts: int = 3) -> T:
    """Run ``fn`` again when it raises KubeConflict, at most ``attempts`` times in all.
    ``fn`` must re-read the object and recompute its change each time."""
    for i in range(attempts):
        try:
            return fn()
        except KubeConflict:
            if i + 1 >= attempts:
                raise
    raise AssertionError("unreachable")  # pragma: no cover
