"""A fast path for the hottest route, ``GET /v1/models/{ns}/{wl}/{ct}/demand?rate=R``.

FastAPI's request handling (routing through nested routers, solving the token
dependency, validating three path parameters and a query parameter) costs a few
times the lookup itself: measured in-process, about 130 µs against 40 µs for
``/healthz`` (``tests/bench/bench_api.py``). This ASGI middleware sits just inside the
telemetry middleware and answers the *plain success case* itself:

- ``GET``, path ``/v1/models/<ns>/<wl>/<ct>/demand`` whose key is loaded (a loaded key
  passed the Kubernetes name checks when its artifact was read; the length limits of
  the path parameters are checked again here);
- an answer within the physical bound (``models.sanity.MAX_CORES``);
- query string exactly ``rate=<decimal number>`` (digits, '.', and an exponent
  ``e``/``e-``; no sign, no '+' — a space in a query string —, no NaN/inf spelling, no
  percent-encoding), finite and at most ``MAX_RATE``;
- no token configured, or ``Authorization: Bearer <token>`` exactly (constant-time).

Anything else — a wrong or oddly spelled token, an unknown key, a bad rate, extra
query parameters, no store loaded — falls through unchanged to the FastAPI route,
which gives the documented answer or the documented 4xx. The answer itself is built
by the same function as the FastAPI route's (``api_routes.demand_answer``), so both
paths agree byte for byte; the route suite checks that.
"""

from __future__ import annotations

import hmac
import math
import re
from types import SimpleNamespace
from typing import Any

from ratefit.models.api_metrics import ApiMetrics
from ratefit.models.api_routes import DEMAND_ROUTE, OutOfRange, _dumps, demand_answer
from ratefit.models.api_schemas import MAX_RATE
from ratefit.models.api_state import ApiState

__all__ = ["DemandFastPath"]

_PREFIX = "/v1/models/"
_SUFFIX = "/demand"
_RATE_QUERY = re.compile(rb"rate=((?:\d+(?:\.\d*)?|\.\d+)(?:[eE]-?\d+)?)")
_HEADERS = [(b"content-type", b"application/json")]


class DemandFastPath:
    def __init__(self, app: Any, *, state: ApiState, metrics: ApiMetrics, token: bytes | None) -> None:
        self.app = app
        self.state = state
        self.metrics = metrics
        self.expected = b"Bearer " + token if token is not None else None
        # what the telemetry middleware reads for the route label
        self.route = SimpleNamespace(path=DEMAND_ROUTE)

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] == "http" and scope["method"] == "GET":
            body = self._answer(scope)
            if body is not None:
                scope["route"] = self.route
                await send(
                    {
                        "type": "http.response.start",
                        "status": 200,
                        "headers": [*_HEADERS, (b"content-length", b"%d" % len(body))],
                    }
                )
                await send({"type": "http.response.body", "body": body})
                return
        await self.app(scope, receive, send)

    def _answer(self, scope: dict[str, Any]) -> bytes | None:
        path: str = scope["path"]
        if not (path.startswith(_PREFIX) and path.endswith(_SUFFIX)):
            return None
        match = _RATE_QUERY.fullmatch(scope.get("query_string", b""))
        if match is None:
            return None
        if self.expected is not None:
            given = None
            for name, value in scope["headers"]:
                if name == b"authorization":
                    given = value
                    break
            if given is None or not hmac.compare_digest(given, self.expected):
                return None
        snap = self.state.snapshot
        if snap is None:
            return None
        key = path[len(_PREFIX) : -len(_SUFFIX)]
        served = snap.models.get(key)
        if served is None:
            return None
        ns, wl, ct = key.split("/")
        if len(ns) > 63 or len(wl) > 253 or len(ct) > 63:
            return None
        rate = float(match.group(1))
        if not (math.isfinite(rate) and rate <= MAX_RATE):
            return None
        try:
            return _dumps(demand_answer(served, rate, self.metrics))
        except OutOfRange:  # the FastAPI route gives the documented 422
            return None
