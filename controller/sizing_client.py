"""Client of the sizing API (``ratefit serve``) for the controller: one batched call per
reconcile pass.

``SizingClient(base_url, *, token=None, timeout=5.0, retries=2, client=None)``:

- ``demand_batch([(model, rate), …])`` → ``[DemandAnswer | DemandError, …]`` in the same
  order. Every item is answered on its own: an item the server could not answer (no
  model for the key, a key outside the Kubernetes name grammar, a rate that is not a
  finite number >= 0, a demand beyond the physical bound) is a ``DemandError`` for that
  item only, with the server's ``reason`` — the caller holds that one container and
  sizes the rest. A rate that cannot be sent (NaN, infinite, negative) becomes a
  ``DemandError`` locally without a request. Batches larger than the server's cap are
  split (``max_batch``) and the answers joined in order.
- ``demand(model, rate)`` → ``DemandAnswer`` (``UnknownModel`` for an unknown key,
  ``InputError`` for another item error).
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
    "ITEM_ERROR_REASONS",
    "ModelInfo",
    "ApiHealth",
    "SizingApiError",
    "SizingApiUnavailable",
    "SizingApiRejected",
]

#: the server's default cap on items per batch (models.api_schemas.DEFAULT_MAX_BATCH)
DEFAULT_MAX_BATCH = 50_000

#: the ``reason`` of a ``DemandError`` (the server's, models.api_schemas.ITEM_ERROR_REASONS):
#: unknown_model — no model is loaded for the key (train it);
#: invalid_model — the key is not namespace/workload/container in Kubernetes name syntax;
#: invalid_rate — the rate is not a finite number >= 0 (at most 1e9 req/s);
#: invalid_item — the item is not {model, rate};
#: out_of_range — the demand at that rate is beyond the physical bound (1,024 cores)
ITEM_ERROR_REASONS = ("unknown_model", "invalid_model", "invalid_rate", "invalid_item", "out_of_range")


@dataclass(frozen=True)
class DemandAnswer:
    """What ``model`` needs at ``rate``: millicores, rounded up; ``demand_bound_m`` is
    the upper bound of the demand (demand + conformal band)."""

    model: str
    rate: float
    demand_m: int
    demand_bound_m: int
    extrapolated: bool
    version: str


@dataclass(frozen=True)
class DemandError:
    """No answer for this item alone; ``reason`` is one of ``ITEM_ERROR_REASONS`` and
    ``error`` says what to do. ``model`` is the key as the caller asked it."""

    model: str
    error: str
    reason: str = "unknown_model"
    rate: float | None = None

    @property
    def key(self) -> str:  # deprecated alias (see DemandAnswer)
        return self.model


@dataclass(frozen=True)
class ModelInfo:
    model: str
    chosen: str
    rate_range: tuple[float, float]
    coverage: float
    version: str
    trained_at: str


@dataclass(frozen=True)
class ApiHealth:
    ready: bool
    model_count: int
    store_version: str | None
    refused_count: int


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
        """One answer per ``(model, rate)``, in order (split into requests of ``max_batch``).
        A per-item problem is a ``DemandError`` in its place, never an exception."""
        out: list[DemandAnswer | DemandError | None] = [None] * len(items)
        send: list[int] = []
        body_items: list[dict[str, Any]] = []
        for i, (model, rate) in enumerate(items):
            try:
                r = float(rate)
            except (TypeError, ValueError):
                r = math.nan
            if not math.isfinite(r) or r < 0:
                out[i] = DemandError(
                    model=str(model),
                    error=f"items[{i}]: the rate is not a finite number >= 0 req/s; nothing was asked",
                    reason="invalid_rate",
                )
                continue
            send.append(i)
            body_items.append({"model": model, "rate": r})
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
                for j, (asked, a) in enumerate(zip(chunk, answers)):
                    out[send[start + j]] = _answer(asked, a)
            except (KeyError, TypeError, ValueError) as exc:
                raise SizingApiError(
                    f"{self.base_url}/v1/demand answered an item without {exc}: is this a ratefit sizing API "
                    "of this version (fields demand_m, demand_bound_m)?",
                    url=self.base_url,
                ) from exc
        return out  # type: ignore[return-value]

    def demand(self, model: str, rate: float) -> DemandAnswer:
        """One lookup; ``UnknownModel`` when the key has no model, ``InputError`` for
        another problem of the item (bad key or rate, beyond the bound)."""
        answer = self.demand_batch([(model, rate)])[0]
        if isinstance(answer, DemandError):
            if answer.reason == "unknown_model":
                raise UnknownModel(model)
            raise InputError(answer.error)
        return answer

    def models(self) -> list[ModelInfo]:
        body = self._call("GET", "/v1/models")
        return [
            ModelInfo(
                model=m["model"],
                chosen=m["chosen"],
                rate_range=(float(m["rate_range"][0]), float(m["rate_range"][1])),
                coverage=float(m["coverage"]),
                version=m["version"],
                trained_at=m["trained_at"],
            )
            for m in body["models"]
        ]

    def model_detail(self, model: str) -> dict[str, Any]:
        """``GET /v1/models/{key}``: one model's detail (trained ``rate_range``, ``capacity``
        …) as the JSON object the API answers. UnknownModel for a key it does not serve."""
        from ratefit.models.keys import parse_key

        key = parse_key(model)  # InputError for a malformed key: never a path of our making
        try:
            body = self._call("GET", f"/v1/models/{key}")
        except SizingApiRejected as exc:
            if exc.status == 404:
                raise UnknownModel(str(key)) from None
            raise
        if not isinstance(body, dict):
            raise SizingApiRejected(f"{self.base_url}/v1/models/{key} answered a non-object", status=200,
                                    url=f"{self.base_url}/v1/models/{key}")
        return body

    def health(self) -> ApiHealth:
        """Readiness (``/readyz``); a not-ready server is an answer, not an error."""
        body = self._call("GET", "/readyz", ok_statuses=(200, 503))
        return ApiHealth(
            ready=bool(body["ready"]),
            model_count=int(body["model_count"]),
            store_version=body["store_version"],
            refused_count=int(body["refused_count"]),
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


def _answer(asked: dict[str, Any], a: dict[str, Any]) -> DemandAnswer | DemandError:
    """One item of the answer; the model is the one asked (the server may leave an
    invalid one out rather than echo it)."""
    model = str(asked["model"])
    if a.get("error") is not None:
        return DemandError(
            model=model, error=str(a["error"]), reason=str(a.get("reason") or "unknown_model"), rate=a.get("rate")
        )
    return DemandAnswer(
        model=str(a["model"]),
        rate=float(a["rate"]),
        demand_m=int(a["demand_m"]),
        demand_bound_m=int(a["demand_bound_m"]),
        extrapolated=bool(a["extrapolated"]),
        version=str(a["version"]),
    )
