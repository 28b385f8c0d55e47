"""Assembly of the sizing API: ``create_app(settings)`` wires state, metrics, routers,
error handlers and the lifespan. No route logic lives here (see ``models.api_routes``).

- The store is loaded in the lifespan (in a worker thread), never at import; until it
  is, ``/readyz`` answers 503 and the model routes 503.
- Every error answer has the shape ``{"error": "...", "errors": [{field, message, type}]}``;
  validation errors are 422 and name the field (``items.3.rate``, ``rate (query)``,
  ``namespace (path)``). The offending input is never echoed back, so NaN or a huge
  value can never make the error handler itself fail with a 500.
- ``/openapi.json``, ``/docs`` and ``/redoc`` sit behind the token like the API.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.utils import get_openapi
from prometheus_client import CollectorRegistry
from starlette.exceptions import HTTPException as StarletteHTTPException

from ratefit.models.api_fastpath import DemandFastPath
from ratefit.models.api_metrics import ApiMetrics, TelemetryMiddleware
from ratefit.models.api_routes import (
    FastJSON,
    validation_response,
    build_docs_router,
    build_routers,
    describe_errors,
    error_body,
)
from ratefit.models.api_schemas import ApiSettings, DemandBatchIn
from ratefit.models.api_state import ApiState

__all__ = ["create_app"]

log = logging.getLogger("ratefit.api")

DESCRIPTION = """\
Serves learned demand curves (request rate per pod → CPU millicores) from a ratefit
model store. Answers are rounded up to whole millicores; `demand_bound_m` is the upper
bound of the demand (demand + a split-conformal quantile at the model's coverage);
`extrapolated` says the rate lies outside the trained range. With a token, send `Authorization: Bearer <token>`.
"""


def create_app(
    settings: ApiSettings,
    *,
    state: ApiState | None = None,
    registry: CollectorRegistry | None = None,
    fast_path: bool = True,
) -> FastAPI:
    """A new sizing API app. ``state`` may be passed in (tests; an already loaded
    store); otherwise one is made for ``settings.store`` and loaded at startup.
    ``fast_path=False`` leaves every request to FastAPI (see ``models.api_fastpath``)."""
    api_state = state if state is not None else ApiState(settings.store)
    metrics = ApiMetrics(api_state, registry=registry)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if api_state.snapshot is None:
            report = await run_in_threadpool(api_state.reload)
            metrics.reloads.labels(report.result).inc()
            if not report.ok:
                log.error("serving without models until a reload succeeds: %s", report.error)
            # this coroutine stays suspended at the yield for the app's whole life: holding
            # the report would keep the first snapshot alive after every later reload
            del report
        ticker = (
            asyncio.create_task(_reload_every(settings.reload_interval, api_state, metrics))
            if settings.reload_interval
            else None
        )
        try:
            yield
        finally:
            if ticker is not None:
                ticker.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await ticker

    app = FastAPI(
        title="ratefit sizing API",
        version=_version(),
        description=DESCRIPTION,
        lifespan=lifespan,
        openapi_url=None,
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.api_state = api_state
    app.state.metrics = metrics
    app.state.token_bytes = settings.token.get_secret_value().encode() if settings.token is not None else None

    open_router, protected = build_routers(settings)
    app.include_router(open_router)
    app.include_router(protected)
    app.include_router(build_docs_router())

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> FastJSON:
        errors = [dict(e) for e in exc.errors()]
        return validation_response(describe_errors(errors))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> FastJSON:
        detail = exc.detail if isinstance(exc.detail, str) else str(exc.detail)
        if exc.status_code == 404 and detail == "Not Found":
            detail = "no such route: see /docs for the routes"  # the path is not echoed
        return FastJSON(error_body(detail), status_code=exc.status_code, headers=getattr(exc, "headers", None))

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = get_openapi(title=app.title, version=app.version, description=app.description, routes=app.routes)
            body = DemandBatchIn.model_json_schema(ref_template="#/components/schemas/{model}")
            nested = body.pop("$defs", {})
            schemas = schema.setdefault("components", {}).setdefault("schemas", {})
            schemas.update(nested)
            schemas["DemandBatchIn"] = body
            app.openapi_schema = schema
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    if fast_path:
        app.add_middleware(DemandFastPath, state=api_state, metrics=metrics, token=app.state.token_bytes)
    # added last, so outermost: it times and counts the fast path's answers too
    app.add_middleware(TelemetryMiddleware, metrics=metrics, access_logger=settings.access_logger)
    return app


async def _reload_every(seconds: float, state: ApiState, metrics: ApiMetrics) -> None:
    """``--reload-interval``: reload in a worker thread, forever; never dies of an error."""
    while True:
        await asyncio.sleep(seconds)
        try:
            report = await run_in_threadpool(state.reload)
        except Exception:  # noqa: BLE001 - keep the ticker alive; the error is logged
            log.exception("periodic store reload failed")
            metrics.reloads.labels("failed").inc()
            continue
        metrics.reloads.labels(report.result).inc()
        del report


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("ratefit")
    except PackageNotFoundError:  # pragma: no cover
        return "0+unknown"
