"""A small client for the Prometheus HTTP query API (``/api/v1/query``, ``/api/v1/query_range``).

It lives in ``models`` so training (``ratefit train --prometheus``) and the controller's
rate source share one adapter. Facts it relies on (Prometheus HTTP API docs, "Expression
queries" and "Format overview"):

* Every answer is a JSON envelope ``{"status": "success"|"error", "data": …,
  "errorType": …, "error": …}``; sample values are strings, including ``"NaN"``,
  ``"+Inf"`` and ``"-Inf"``; timestamps are float seconds.
* 400 Bad Request when parameters are missing or wrong, 422 Unprocessable Entity when an
  expression cannot be executed, 503 when queries time out or abort.
* ``query_range`` refuses more than 11,000 points per series ("exceeded maximum
  resolution of 11,000 points per timeseries"; from memory, checked against the real
  2.42 server in tests/test_prometheus_client.py). :meth:`PrometheusClient.query_range`
  therefore splits long ranges into chunks and stitches the series back together.

Queries are sent as POST form bodies (the API accepts both GET and POST
``application/x-www-form-urlencoded``): a grouped query over thousands of workloads
can outgrow a URL.

Error translation, done here once:
connection refused / timeout / 5xx → :class:`PrometheusUnavailable` (temporary);
400/422 with ``errorType``/``error`` → :class:`PromQLError` naming the query;
anything else unusable (not JSON, wrong shape, ``status`` not ``success``) →
:class:`PrometheusError` saying what was received.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import httpx
import numpy as np

from ratefit.models.errors import PrometheusError, PrometheusUnavailable, PromQLError

__all__ = [
    "InstantSample",
    "RangeSeries",
    "PrometheusClient",
    "MAX_POINTS_PER_SERIES",
    "parse_sample_value",
]

#: Prometheus refuses a range query with more points than this per series
#: (web/api/v1 "exceeded maximum resolution of 11,000 points per timeseries").
MAX_POINTS_PER_SERIES = 11_000


@dataclass(frozen=True, slots=True)
class InstantSample:
    """One element of an instant-query answer: labels and a float value at ``timestamp``.

    A scalar answer gives one sample with empty ``labels``.
    """

    labels: Mapping[str, str]
    value: float
    timestamp: float


@dataclass(frozen=True, slots=True)
class RangeSeries:
    """One series of a range (or matrix) answer: labels and aligned numpy arrays."""

    labels: Mapping[str, str]
    timestamps: np.ndarray = field(repr=False)
    values: np.ndarray = field(repr=False)

    def __len__(self) -> int:
        return int(self.timestamps.shape[0])


def parse_sample_value(text: Any) -> float:
    """A Prometheus sample value (a JSON string: ``"1.5"``, ``"NaN"``, ``"+Inf"``) as float."""
    if not isinstance(text, str):
        raise ValueError(f"sample value must be a string, got {type(text).__name__} {text!r}")
    return float(text)  # float() accepts "NaN", "+Inf", "-Inf", "1e-3"


def _short(obj: Any, limit: int = 200) -> str:
    s = obj if isinstance(obj, str) else repr(obj)
    return s if len(s) <= limit else s[:limit] + f"… ({len(s)} chars)"


class PrometheusClient:
    """Talks to one Prometheus server over HTTP.

    ``client`` may be passed in (its lifetime stays the caller's); otherwise the
    instance owns an :class:`httpx.Client` and closes it in :meth:`close` /
    ``with``. ``timeout`` (seconds) bounds the HTTP call and is also sent as the
    query's ``timeout`` parameter so the server gives up at the same time.
    """

    def __init__(
        self,
        base_url: str,
        *,
        timeout: float = 10.0,
        client: httpx.Client | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> None:
        if not base_url or not base_url.startswith(("http://", "https://")):
            raise PrometheusError(
                f"Prometheus URL {base_url!r} must start with http:// or https://, "
                "e.g. http://127.0.0.1:9090"
            )
        if timeout <= 0:
            raise PrometheusError(f"timeout must be positive, got {timeout!r}")
        self.base_url = base_url.rstrip("/")
        self.timeout = float(timeout)
        self._headers = dict(headers or {})
        self._owned = client is None
        self._http = client if client is not None else httpx.Client(timeout=self.timeout)

    # -- lifetime ---------------------------------------------------------------
    def close(self) -> None:
        """Close the HTTP client if this instance created it."""
        if self._owned:
            self._http.close()

    def __enter__(self) -> PrometheusClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- queries ----------------------------------------------------------------
    def query(self, promql: str, *, at: float | None = None) -> list[InstantSample]:
        """Evaluate ``promql`` at time ``at`` (unix seconds; default: the server's now).

        Vector and scalar answers become :class:`InstantSample` lists. A matrix answer
        (a range-vector or subquery expression) is refused here: use :meth:`query_matrix`.
        """
        data = self._call("/api/v1/query", promql, self._instant_params(promql, at))
        rtype, result = data["resultType"], data["result"]
        try:
            if rtype == "vector":
                return [
                    InstantSample(
                        labels=dict(item["metric"]),
                        value=parse_sample_value(item["value"][1]),
                        timestamp=float(item["value"][0]),
                    )
                    for item in result
                ]
            if rtype == "scalar":
                return [InstantSample(labels={}, value=parse_sample_value(result[1]), timestamp=float(result[0]))]
        except (KeyError, IndexError, TypeError, ValueError) as e:
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered a malformed {rtype} for {promql!r}: "
                f"{_short(result)} ({e})"
            ) from e
        if rtype == "matrix":
            raise PromQLError(
                f"query {promql!r} returns a range vector (matrix); use query_matrix() or "
                "wrap it in a function such as rate() or quantile_over_time()"
            )
        raise PrometheusError(
            f"Prometheus at {self.base_url} answered resultType {rtype!r} for {promql!r}; "
            "expected a vector or a scalar"
        )

    def query_matrix(self, promql: str, *, at: float | None = None) -> list[RangeSeries]:
        """Evaluate a range-vector expression (e.g. a subquery ``expr[1h:30s]``) at ``at``."""
        data = self._call("/api/v1/query", promql, self._instant_params(promql, at))
        if data["resultType"] != "matrix":
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered resultType {data['resultType']!r} for "
                f"{promql!r}; expected a matrix (write a range selector or subquery)"
            )
        return self._parse_matrix(promql, data["result"])

    def query_range(
        self, promql: str, *, start: float, end: float, step: float
    ) -> list[RangeSeries]:
        """Evaluate ``promql`` at ``start, start+step, … ≤ end`` (unix seconds).

        Ranges with more than :data:`MAX_POINTS_PER_SERIES` points are split into
        chunks (each within the limit) and the series are stitched by label set,
        sorted by time, so callers never see the server's limit.
        """
        step = float(step)
        start, end = float(start), float(end)
        if not (math.isfinite(start) and math.isfinite(end) and math.isfinite(step)):
            raise PrometheusError(f"query_range needs finite start/end/step, got {start}, {end}, {step}")
        if step <= 0:
            raise PrometheusError(f"query_range step must be positive, got {step}")
        if end < start:
            raise PrometheusError(f"query_range end {end} is before start {start}")
        merged: dict[tuple[tuple[str, str], ...], tuple[dict[str, str], list[np.ndarray], list[np.ndarray]]] = {}
        span = (MAX_POINTS_PER_SERIES - 1) * step
        chunk_start = start
        while chunk_start <= end:
            chunk_end = min(end, chunk_start + span)
            params = {
                "query": promql,
                "start": _fmt_time(chunk_start),
                "end": _fmt_time(chunk_end),
                "step": _fmt_time(step),
                "timeout": f"{self.timeout:g}s",
            }
            data = self._call("/api/v1/query_range", promql, params)
            if data["resultType"] != "matrix":
                raise PrometheusError(
                    f"Prometheus at {self.base_url} answered resultType {data['resultType']!r} "
                    f"to a range query for {promql!r}; expected a matrix"
                )
            for s in self._parse_matrix(promql, data["result"]):
                k = tuple(sorted(s.labels.items()))
                slot = merged.setdefault(k, (dict(s.labels), [], []))
                slot[1].append(s.timestamps)
                slot[2].append(s.values)
            chunk_start = chunk_end + step
        out = []
        for labels, ts_parts, val_parts in merged.values():
            ts = np.concatenate(ts_parts)
            vals = np.concatenate(val_parts)
            order = np.argsort(ts, kind="stable")
            out.append(RangeSeries(labels=labels, timestamps=ts[order], values=vals[order]))
        return out

    # -- plumbing ---------------------------------------------------------------
    def _instant_params(self, promql: str, at: float | None) -> dict[str, str]:
        params = {"query": promql, "timeout": f"{self.timeout:g}s"}
        if at is not None:
            params["time"] = _fmt_time(float(at))
        return params

    def _parse_matrix(self, promql: str, result: Any) -> list[RangeSeries]:
        try:
            out = []
            for item in result:
                pairs = item["values"]
                ts = np.fromiter((float(p[0]) for p in pairs), dtype=float, count=len(pairs))
                vals = np.fromiter((parse_sample_value(p[1]) for p in pairs), dtype=float, count=len(pairs))
                out.append(RangeSeries(labels=dict(item["metric"]), timestamps=ts, values=vals))
            return out
        except (KeyError, IndexError, TypeError, ValueError) as e:
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered a malformed matrix for {promql!r}: "
                f"{_short(result)} ({e})"
            ) from e

    def _call(self, path: str, promql: str, params: dict[str, str]) -> dict[str, Any]:
        url = self.base_url + path
        try:
            resp = self._http.post(url, data=params, headers=self._headers, timeout=self.timeout)
        except httpx.TimeoutException as e:
            raise PrometheusUnavailable(
                f"Prometheus at {self.base_url} did not answer {promql!r} within {self.timeout:g}s "
                f"({type(e).__name__}); check the server's load or raise the timeout"
            ) from e
        except httpx.TransportError as e:
            raise PrometheusUnavailable(
                f"cannot reach Prometheus at {self.base_url} ({type(e).__name__}: {e}); "
                "check the URL and that the server is up"
            ) from e
        body: Any
        try:
            body = resp.json()
        except ValueError:
            body = None
        status = resp.status_code
        if status >= 500:
            detail = body.get("error") if isinstance(body, dict) else _short(resp.text)
            raise PrometheusUnavailable(
                f"Prometheus at {self.base_url} answered HTTP {status} to {promql!r}: {detail}; "
                "retry later"
            )
        if status in (400, 422) and isinstance(body, dict) and "error" in body:
            raise PromQLError(
                f"Prometheus refused query {promql!r} (HTTP {status}, "
                f"{body.get('errorType', 'error')}): {body['error']}"
            )
        if status in (401, 403):
            raise PrometheusError(
                f"Prometheus at {self.base_url} refused access (HTTP {status}) to {promql!r}: "
                f"{_short(body if body is not None else resp.text)}; pass the credentials it needs (headers, e.g. a bearer token)"
            )
        if status == 404:
            raise PrometheusError(
                f"Prometheus at {self.base_url} has no {path} (HTTP 404); give the server's root URL "
                "(e.g. http://127.0.0.1:9090, without /api/v1)"
            )
        if not isinstance(body, dict):
            ctype = resp.headers.get("content-type", "?")
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered HTTP {status} with a body that is not a "
                f"JSON object ({ctype}) to {promql!r}: {_short(resp.text)!r}; is the URL a Prometheus server?"
            )
        if status != 200 or body.get("status") != "success":
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered HTTP {status} with status "
                f"{body.get('status')!r} to {promql!r}: {_short(body)}"
            )
        data = body.get("data")
        if not isinstance(data, dict) or "resultType" not in data or "result" not in data:
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered without data.resultType/data.result "
                f"to {promql!r}: {_short(body)}"
            )
        if data["resultType"] in ("vector", "matrix") and not isinstance(data["result"], list):
            raise PrometheusError(
                f"Prometheus at {self.base_url} answered a {data['resultType']} whose result is "
                f"not a list for {promql!r}: {_short(data['result'])}"
            )
        return data


def _fmt_time(t: float) -> str:
    """Unix seconds as the API's float form (``repr`` keeps full precision)."""
    return repr(float(t))
