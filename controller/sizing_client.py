"""Client of the sizing API (``ratefit serve``) for the controller: one batched call per
reconcile pass.

``SizingClient(base_url, *, token=None, timeout=5.0, retries=2, client=None)``:

- ``demand_batch([(key, rate), …])`` → ``[DemandAnswer | DemandError, …]`` in the same
  order; an unknown key is a ``DemandError`` for that item only. Batches larger than
  the server's cap are split (``max_batch``) and the answers joined in order.
- ``demand(key, rate)`` → ``DemandAnswer`` (``UnknownModel`` for an unknown key).
- ``models()`` → ``[ModelInfo, …]``; ``health()`` → ``ApiHealth`` (readiness);
  ``reload()`` → the server's reload report (a dict).

Failures are translated once, here: connection errors, timeouts, 5xx and unreadable
answers are retried ``retries`` times with exponential backoff and jitter (every call
is a lookup, safe to repeat), then raise ``SizingApiUnavailable`` (temporary); a 4xx
raises ``SizingApiRejected`` at once with the server's message. The token is sent as
``Authorization: Bearer …`` and never appears in an error or a repr.
"""

from __future__ import annotations

import json
import math
import random
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import httpx

from ratefit.controller.errors import SizingApiError, SizingApiRejected, SizingApiUnavailable
from ratefit.models.errors import InputError, UnknownModel

__all__ = [
    "SizingClient",
    "DemandAnswer",
    "DemandError",
    "ModelInfo",
    "ApiHealth",
    "SizingApiError",
    "SizingApiUnavailable",
    "SizingApiRejected",
]

#: the server's default cap on items per batch (models.api_schemas.DEFAULT_MAX_BATCH)
DEFAULT_MAX_BATCH = 50_000


@dataclass(frozen=True)
class DemandAnswer:
    """What ``key`` needs at ``rate``: millicores, rounded up; ``upper_m`` is the upper band."""

    key: str
    rate: float
    cpu_m: int
    upper_m: int
    extrapolated: bool
    version: str


@dataclass(frozen=True)
class DemandError:
    """No answer for this item (the key has no model); the message says what to do."""

    key: str
    error: str
    rate: float | None = None


@dataclass(frozen=True)
class ModelInfo:
    key: str
    chosen: str
    rate_range: tuple[float, float]
    coverage: float
    version: str
    trained_at: str


@dataclass(frozen=True)
class ApiHealth:
    ready: bool
    models: int
    version: str | None
    refused: int


class SizingClient:
    """A synchronous client of the sizing API; pass ``client=`` to reuse an httpx.Client
    (its base URL and headers are then yours to set, the token is still added)."""

    def __init__(
        self,
        base_url: str,
        *,
        token: str | None = None,
        timeout: float = 5.0,
        retries: int = 2,
        backoff: float = 0.2,
        max_batch: int = DEFAULT_MAX_BATCH,
        client: httpx.Client | None = None,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if retries < 0:
            raise InputError(f"retries: {retries} must be >= 0")
        if max_batch < 1:
            raise InputError(f"max_batch: {max_batch} must be >= 1")
        self.base_url = base_url.rstrip("/")
        self.retries = retries
        self.backoff = backoff
        self.max_batch = max_batch
        self._sleep = sleep
        self._headers = {"Authorization": f"Bearer {token}"} if token else {}
        self._own = client is None
        self._http = client if client is not None else httpx.Client(timeout=timeout)
        self._timeout = timeout

    def __repr__(self) -> str:
        return f"SizingClient({self.base_url!r}, token={'set' if self._headers else 'none'}, retries={self.retries})"

    # -- lifecycle ------------------------------------------------------------------------
    def close(self) -> None:
        if self._own:
            self._http.close()

    def __enter__(self) -> SizingClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- calls ------------------------------------------------------------------------------
    def demand_batch(self, items: Sequence[tuple[str, float]]) -> list[DemandAnswer | DemandError]:
        """One answer per ``(key, rate)``, in order (split into requests of ``max_batch``)."""
        body_items = []
        for i, (key, rate) in enumerate(items):
            r = float(rate)
            if not math.isfinite(r) or r < 0:
                raise InputError(f"items[{i}] ({key!r}): rate {rate!r} must be a finite number >= 0 req/s")
            body_items.append({"model": key, "rate": r})
        out: list[DemandAnswer | DemandError] = []
        for start in range(0, len(body_items), self.max_batch):
            chunk = body_items[start : start + self.max_batch]
            body = self._call("POST", "/v1/demand", content=json.dumps({"items": chunk}).encode())
            answers = body.get("items") if isinstance(body, dict) else None
            if not isinstance(answers, list) or len(answers) != len(chunk):
                raise SizingApiError(
                    f"{self.base_url}/v1/demand answered {len(answers) if isinstance(answers, list) else 'no'} "
                    f"items for {len(chunk)} asked: is this a ratefit sizing API?",
                    url=self.base_url,
                )
            try:
                out.extend(_answer(a) for a in answers)
            except (KeyError, TypeError, ValueError) as exc:
                raise SizingApiError(
                    f"{self.base_url}/v1/demand answered an item without {exc}: is this a ratefit sizing API?",
                    url=self.base_url,
                ) from exc
        return out

    def demand(self, key: str, rate: float) -> DemandAnswer:
        """One lookup; ``UnknownModel`` when the key has no model."""
        answer = self.demand_batch([(key, rate)])[0]
        if isinstance(answer, DemandError):
            raise UnknownModel(key)
        return answer

    def models(self) -> list[ModelInfo]:
        body = self._call("GET", "/v1/models")
        return [
            ModelInfo(
                key=m["key"],
                chosen=m["chosen"],
                rate_range=(float(m["rate_range"][0]), float(m["rate_range"][1])),
                coverage=float(m["coverage"]),
                version=m["version"],
                trained_at=m["trained_at"],
            )
            for m in body["models"]
        ]

    def health(self) -> ApiHealth:
        """Readiness (``/readyz``); a not-ready server is an answer, not an error."""
        body = self._call("GET", "/readyz", ok_statuses=(200, 503))
        return ApiHealth(
            ready=bool(body["ready"]), models=int(body["models"]), version=body["version"], refused=int(body["refused"])
        )

    def reload(self) -> dict[str, Any]:
        """Ask the server to re-read its store; returns its report (``ok``, ``refused`` …)."""
        return self._call("POST", "/v1/reload")  # type: ignore[no-any-return]

    # -- transport -------------------------------------------------------------------------
    def _call(self, method: str, path: str, *, content: bytes | None = None, ok_statuses: tuple[int, ...] = (200,)) -> Any:
        url = self.base_url + path
        headers = dict(self._headers)
        if content is not None:
            headers["Content-Type"] = "application/json"
        last = ""
        for attempt in range(self.retries + 1):
            if attempt:
                # exponential backoff with full jitter (common practice, no source)
                self._sleep(self.backoff * (2 ** (attempt - 1)) * (0.5 + random.random()))
            try:
                r = self._http.request(method, url, content=content, headers=headers, timeout=self._timeout)
            except httpx.TransportError as exc:
                last = f"{type(exc).__name__}: {exc}"
                continue
            if r.status_code in ok_statuses:
                try:
                    return r.json()
                except (json.JSONDecodeError, UnicodeDecodeError):
                    last = f"HTTP {r.status_code} with a body that is not JSON"
                    continue
            if r.status_code >= 500:
                last = f"HTTP {r.status_code}: {_server_message(r)}"
                continue
            raise SizingApiRejected(
                f"{method} {url} was refused with HTTP {r.status_code}: {_server_message(r)}",
                status=r.status_code,
                url=url,
            )
        raise SizingApiUnavailable(
            f"{method} {url} failed {self.retries + 1} times (last: {last}): is `ratefit serve` running and "
            "reachable? the controller holds its decisions until it answers",
            url=url,
        )


def _server_message(r: httpx.Response) -> str:
    try:
        body = r.json()
    except (json.JSONDecodeError, UnicodeDecodeError):
        return r.text[:200]
    if isinstance(body, dict) and isinstance(body.get("error"), str):
        return body["error"]
    return r.text[:200]


def _answer(a: dict[str, Any]) -> DemandAnswer | DemandError:
    if a.get("error") is not None:
        return DemandError(key=a["model"], error=str(a["error"]), rate=a.get("rate"))
    return DemandAnswer(
        key=a["model"],
        rate=float(a["rate"]),
        cpu_m=int(a["cpu_m"]),
        upper_m=int(a["upper_m"]),
        extrapolated=bool(a["extrapolated"]),
        version=str(a["version"]),
    )
