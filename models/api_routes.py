"""The sizing API's routes: models, demand (single and batch), reload, probes, metrics.

Handlers are ``async`` and never block the event loop, except ``/v1/reload``, which
reads the store in a worker thread. Each handler reads the current snapshot once
(``state.snapshot``) and answers from that object only, so a reload cannot change
the answer half-way. The token check is a dependency on the ``protected`` router;
``/healthz`` is the only route outside it.

Hot paths return ``FastJSON`` (orjson) responses built from plain dicts; the
``response_model`` of each route documents the shape in OpenAPI.
"""

from __future__ import annotations

import hmac
from typing import Annotated, Any

import numpy as np
import pydantic_core
from fastapi import APIRouter, Depends, HTTPException, Path, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, JSONResponse, Response
from pydantic import TypeAdapter, ValidationError

from ratefit.models.api_metrics import CONTENT_TYPE_LATEST, ApiMetrics
from ratefit.models.api_schemas import (
    BYTES_PER_ITEM,
    MAX_CORES,
    MAX_RATE,
    NAME_LABEL_PATTERN,
    NAME_SUBDOMAIN_PATTERN,
    ApiSettings,
    DemandBatchOut,
    DemandItemIn,
    DemandOut,
    ErrorOut,
    HealthOut,
    ModelDetail,
    ModelList,
    ReadyOut,
    ReloadOut,
    batch_model,
)
from ratefit.models.api_state import ApiState, ReloadReport, ServedModel, ServingSnapshot
from ratefit.models.curve import to_millicores
from ratefit.models.errors import InputError
from ratefit.models.keys import is_key

try:  # orjson is a dependency; the fallback keeps the app importable without it
    import orjson

    def _dumps(content: Any) -> bytes:
        return orjson.dumps(content)

except ImportError:  # pragma: no cover
    import json

    def _dumps(content: Any) -> bytes:
        return json.dumps(content, separators=(",", ":"), allow_nan=False).encode()


__all__ = ["FastJSON", "build_routers", "build_docs_router", "error_body", "describe_errors", "validation_response", "demand_answer", "DEMAND_ROUTE"]


class FastJSON(JSONResponse):
    """JSON response serialised with orjson (fast; refuses NaN by construction)."""

    def render(self, content: Any) -> bytes:
        return _dumps(content)


# -- dependencies --------------------------------------------------------------------------
async def get_state(request: Request) -> ApiState:
    return request.app.state.api_state  # type: ignore[no-any-return]


async def get_metrics(request: Request) -> ApiMetrics:
    return request.app.state.metrics  # type: ignore[no-any-return]


async def require_token(request: Request) -> None:
    """``Authorization: Bearer <token>`` when the app has a token (constant-time compare)."""
    expected: bytes | None = request.app.state.token_bytes
    if expected is None:
        return
    header = request.headers.get("authorization", "")
    scheme, _, value = header.partition(" ")
    # Starlette decodes header bytes as latin-1: encoding back gives the bytes sent; the
    # surrounding OWS (spaces, tabs) is not part of the value (RFC 9110 §5.6.3)
    given = value.strip(" \t").encode("latin-1")
    if scheme.lower() != "bearer" or not hmac.compare_digest(given, expected):
        raise HTTPException(
            status_code=401,
            detail="missing or wrong bearer token: send 'Authorization: Bearer <token>' with the token "
            "from the server's --token-file",
            headers={"WWW-Authenticate": 'Bearer realm="ratefit"'},
        )


def _snapshot(state: ApiState) -> ServingSnapshot:
    snap = state.snapshot
    if snap is None:
        raise HTTPException(
            status_code=503, detail="the model store is not loaded yet (or could not be read): see /readyz and the log"
        )
    return snap


# -- errors --------------------------------------------------------------------------------
_KEY_HELP = (
    "must be 'namespace/workload/container' in Kubernetes name syntax: lower-case letters, digits "
    "and '-', each part starting and ending with a letter or digit (the workload may also hold '.')"
)
_NAME_HELP = "must be a Kubernetes name: lower-case letters, digits and '-', starting and ending with a letter or digit"


def describe_errors(errors: list[dict[str, Any]], *, prefix: str | None = None) -> list[dict[str, str]]:
    """pydantic/FastAPI errors → ``[{field, message, type}]`` with friendly messages.
    The offending input is never echoed (it may be huge or not JSON-encodable)."""
    out = []
    for err in errors:
        loc = [_loc_part(p) for p in err.get("loc", ())]
        where = ""
        if loc and loc[0] in ("query", "path", "header", "body"):
            where = loc.pop(0)
        elif prefix:
            where = prefix
        name = ".".join(loc) or "body"
        field = f"{name} ({where})" if where in ("query", "path", "header") else name
        kind = str(err.get("type", "value_error"))
        message = str(err.get("msg", "invalid value"))
        if kind == "string_pattern_mismatch":
            message = _KEY_HELP if loc and loc[-1] == "model" else _NAME_HELP
        elif kind == "missing":
            message = "is required"
        elif kind == "extra_forbidden":
            message = "is not a known field (check the spelling)"
        out.append({"field": field, "message": message, "type": kind})
    return out


def _loc_part(part: object) -> str:
    """A location part as shown in ``field``: a field name the client sent is cut to 64
    printable characters (a hostile name is never echoed in full)."""
    text = str(part)
    if len(text) > 64 or not text.isprintable():
        text = "".join(c if c.isprintable() else "?" for c in text[:64]) + ("…" if len(text) > 64 else "")
    return text


#: the message of every "no model" answer: it never repeats the key (the client has it)
NO_MODEL = "no model is loaded for this key: train it (ratefit train) and reload the API (POST /v1/reload)"
#: the message of a demand beyond the physical bound
OUT_OF_RANGE = (
    f"the curve, extrapolated to this rate, needs more than {MAX_CORES:g} cores: the rate lies far "
    "beyond the trained range; retrain with data that covers it"
)


class OutOfRange(InputError):
    """The demand at the asked rate exceeds ``MAX_CORES`` (an extrapolation gone far)."""


def error_body(message: str, errors: list[dict[str, str]] | None = None, **extra: Any) -> dict[str, Any]:
    return {"error": message, "errors": errors or [], **extra}


def validation_response(errors: list[dict[str, str]]) -> FastJSON:
    head = "; ".join(f"{e['field']}: {e['message']}" for e in errors[:5])
    more = f" (and {len(errors) - 5} more)" if len(errors) > 5 else ""
    return FastJSON(error_body(head + more, errors), status_code=422)


# -- helpers -------------------------------------------------------------------------------
def demand_answer(served: ServedModel, rate: float, metrics: ApiMetrics) -> dict[str, Any]:
    """The answer of ``GET …/demand`` (shared with ``api_fastpath``); counts the lookup.
    Raises OutOfRange when the demand bound exceeds ``MAX_CORES``."""
    demand, bound, extrapolated = served.curve.lookup_one(rate)
    if not bound <= MAX_CORES:
        raise OutOfRange(OUT_OF_RANGE)
    metrics.lookups.inc()
    if extrapolated:
        metrics.extrapolated.inc()
    return {
        "model": served.key,
        "rate": rate,
        "demand_m": to_millicores(demand),
        "demand_bound_m": to_millicores(bound),
        "extrapolated": extrapolated,
        "version": served.version,
    }


def _refused_list(refused: Any) -> list[dict[str, Any]]:
    return [{"file": r.file, "error": r.error, "reason": r.reason, "kept_previous": r.kept_previous} for r in refused]


def reload_body(report: ReloadReport) -> dict[str, Any]:
    snap = report.snapshot
    return {
        "ok": report.ok,
        "store_version": snap.version if snap is not None else None,
        "previous_store_version": report.previous_version,
        "model_count": len(snap) if snap is not None else 0,
        "added": report.added,
        "removed": report.removed,
        "changed": report.changed,
        "unchanged": report.unchanged,
        "refused": _refused_list(report.refused),
        "seconds": round(report.seconds, 6),
        "error": report.error,
    }


_ITEM = TypeAdapter(DemandItemIn)


def _item_error(i: int, raw: object, field: str, reason: str, message: str) -> dict[str, Any]:
    """A batch answer entry for an item that gets no demand. The request's model and rate
    are repeated only when valid, so that a hostile value is never echoed."""
    model = raw.get("model") if isinstance(raw, dict) else None
    rate = raw.get("rate") if isinstance(raw, dict) else None
    ok_rate = (
        isinstance(rate, (int, float)) and not isinstance(rate, bool) and 0 <= rate <= MAX_RATE
    )
    return {
        "model": model if is_key(model) else None,
        "rate": float(rate) if ok_rate else None,  # type: ignore[arg-type]
        "error": message,
        "reason": reason,
        "field": field,
    }


def _lenient_items(raw: bytes, max_items: int) -> tuple[list[Any], dict[int, dict[str, Any]]] | FastJSON:
    """The slow path of ``POST /v1/demand``, taken only when the strict parse failed: the
    body as a whole must be ``{"items": [...]}`` with at most ``max_items`` items (else
    422), then each item is checked on its own. Returns the items (None where invalid)
    and the error entries by index."""
    try:
        doc = pydantic_core.from_json(raw)
    except ValueError:
        return validation_response([{"field": "body", "message": "is not valid JSON", "type": "json_invalid"}])
    if not isinstance(doc, dict):
        return validation_response(
            [{"field": "body", "message": 'must be a JSON object {"items": [...]}', "type": "model_type"}]
        )
    errors = [
        {"field": _loc_part(k), "message": "is not a known field (check the spelling)", "type": "extra_forbidden"}
        for k in doc
        if k != "items"
    ]
    items = doc.get("items")
    if "items" not in doc:
        errors.append({"field": "items", "message": "is required", "type": "missing"})
    elif not isinstance(items, list):
        errors.append({"field": "items", "message": "must be a list of {model, rate}", "type": "list_type"})
    elif len(items) > max_items:
        errors.append(
            {"field": "items", "message": f"at most {max_items} items per request: split the batch", "type": "too_long"}
        )
    if errors:
        return validation_response(errors[:20])  # a body of a million unknown fields: 20 are enough
    assert isinstance(items, list)
    good: list[Any] = []
    bad: dict[int, dict[str, Any]] = {}
    for i, item in enumerate(items):
        try:
            good.append(_ITEM.validate_python(item, strict=True))
        except ValidationError as exc:
            first = describe_errors(
                exc.errors(include_url=False, include_input=False, include_context=False), prefix=None
            )[0]
            loc = first["field"]
            if not isinstance(item, dict):
                reason, where = "invalid_item", f"items.{i}"
            elif loc == "rate":
                reason, where = "invalid_rate", f"items.{i}.rate"
            elif loc == "model":
                reason, where = "invalid_model", f"items.{i}.model"
            else:
                reason, where = "invalid_item", f"items.{i}.{loc}" if loc != "body" else f"items.{i}"
            bad[i] = _item_error(i, item, where, reason, f"{where}: {first['message']}")
            good.append(None)
    return good, bad


async def _read_body(request: Request, limit: int) -> bytes:
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise HTTPException(status_code=413, detail=f"items: request body over {limit} bytes; split the batch")
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise HTTPException(status_code=413, detail=f"items: request body over {limit} bytes; split the batch")
        chunks.append(chunk)
    return b"".join(chunks)


def _require_json(request: Request) -> None:
    """415 unless the body is declared JSON (``application/json`` or ``application/*+json``,
    parameters such as charset allowed): a text/plain or undeclared body is never parsed."""
    declared = request.headers.get("content-type")
    media = (declared or "").split(";", 1)[0].strip().lower()
    if media == "application/json" or (media.startswith("application/") and media.endswith("+json")):
        return
    raise HTTPException(
        status_code=415,
        detail="body: send it as JSON with 'Content-Type: application/json'",
    )


DEMAND_ROUTE = "/v1/models/{namespace}/{workload}/{container}/demand"

Namespace = Annotated[str, Path(pattern=NAME_LABEL_PATTERN, max_length=63, examples=["shop"])]
Workload = Annotated[str, Path(pattern=NAME_SUBDOMAIN_PATTERN, max_length=253, examples=["checkout"])]
Container = Annotated[str, Path(pattern=NAME_LABEL_PATTERN, max_length=63, examples=["app"])]
RateQuery = Annotated[
    float,
    Query(ge=0, le=MAX_RATE, allow_inf_nan=False, description="request rate per pod, req/s", examples=[120.0]),
]

_ERRORS: dict[int | str, dict[str, Any]] = {
    401: {"model": ErrorOut, "description": "missing or wrong bearer token"},
    422: {"model": ErrorOut, "description": "invalid input; `errors[].field` names the field"},
    503: {"model": ErrorOut, "description": "the store is not loaded yet"},
}


def build_routers(settings: ApiSettings) -> tuple[APIRouter, APIRouter]:
    """(open router with /healthz, protected router with everything else)."""
    open_router = APIRouter()
    protected = APIRouter(dependencies=[Depends(require_token)], responses=_ERRORS)
    batch_in = batch_model(settings.max_batch)
    body_limit = settings.max_batch * BYTES_PER_ITEM + 4096

    @open_router.get("/healthz", response_model=HealthOut, tags=["probes"], summary="Liveness: the process answers")
    async def healthz() -> Response:
        return FastJSON({"status": "ok"})

    @protected.get(
        "/readyz",
        response_model=ReadyOut,
        tags=["probes"],
        summary="Readiness: a model store is loaded",
        responses={503: {"model": ReadyOut, "description": "not loaded yet"}},
    )
    async def readyz(state: Annotated[ApiState, Depends(get_state)]) -> Response:
        snap = state.snapshot
        if snap is None:
            return FastJSON(
                {"ready": False, "model_count": 0, "store_version": None, "refused_count": 0}, status_code=503
            )
        return FastJSON(
            {"ready": True, "model_count": len(snap), "store_version": snap.version, "refused_count": len(snap.refused)}
        )

    @protected.get("/metrics", tags=["probes"], summary="Prometheus exposition", response_class=Response)
    async def metrics(m: Annotated[ApiMetrics, Depends(get_metrics)]) -> Response:
        return Response(m.exposition(), media_type=CONTENT_TYPE_LATEST)

    @protected.get("/v1/models", response_model=ModelList, tags=["models"], summary="Every loaded model")
    async def list_models(state: Annotated[ApiState, Depends(get_state)]) -> Response:
        snap = _snapshot(state)
        # the summaries are pre-rendered JSON (see api_state.ServedModel): join, don't re-encode
        head = _dumps({"store_version": snap.version, "loaded_at": snap.loaded_at, "model_count": len(snap)})[:-1]
        body = b"".join(
            (
                head,
                b',"models":[',
                b",".join(m.summary_json for m in snap.models.values()),
                b'],"refused":',
                _dumps(_refused_list(snap.refused)),
                b"}",
            )
        )
        return Response(body, media_type="application/json")

    @protected.get(
        "/v1/models/{namespace}/{workload}/{container}",
        response_model=ModelDetail,
        tags=["models"],
        summary="One model: metadata and the cross-validation table",
        responses={404: {"model": ErrorOut, "description": "no model for the key"}},
    )
    async def get_model(
        namespace: Namespace, workload: Workload, container: Container, state: Annotated[ApiState, Depends(get_state)]
    ) -> Response:
        snap = _snapshot(state)
        key = f"{namespace}/{workload}/{container}"
        served = snap.models.get(key)
        if served is None:
            return FastJSON(error_body(NO_MODEL, model=key), status_code=404)
        return Response(served.detail_json, media_type="application/json")

    @protected.get(
        DEMAND_ROUTE,
        response_model=DemandOut,
        tags=["demand"],
        summary="CPU demand of one container at one rate",
        responses={404: {"model": ErrorOut, "description": "no model for the key"}},
    )
    async def demand_one(
        namespace: Namespace,
        workload: Workload,
        container: Container,
        rate: RateQuery,
        request: Request,
    ) -> Response:
        # state and metrics straight from the app, not as dependencies: each dependency
        # FastAPI solves costs tens of microseconds on this, the hottest route
        snap = _snapshot(request.app.state.api_state)
        m: ApiMetrics = request.app.state.metrics
        key = f"{namespace}/{workload}/{container}"
        served = snap.models.get(key)
        if served is None:
            m.unknown.inc()
            return FastJSON(error_body(NO_MODEL, model=key), status_code=404)
        try:
            return FastJSON(demand_answer(served, rate, m))
        except OutOfRange as exc:
            return validation_response([{"field": "rate (query)", "message": str(exc), "type": "out_of_range"}])

    @protected.post(
        "/v1/demand",
        response_model=DemandBatchOut,
        tags=["demand"],
        summary="CPU demand for a batch of (model, rate), answered item by item in request order",
        description=(
            f"At most {settings.max_batch} items. One vectorised lookup answers the whole batch. "
            "Every item is answered on its own: an item with a problem of its own (no model for the "
            "key, a key that is not 'namespace/workload/container' in Kubernetes name syntax, a rate "
            "that is not a finite number >= 0, a demand beyond the physical bound) gets `error`, "
            "`reason` and `field` instead of the demand fields, and the other items are answered as "
            "usual. Only a body that is malformed as a whole (not JSON, not an object with an "
            "`items` list, too many items) is refused with 422; a body that is not JSON-typed "
            "(Content-Type other than application/json) with 415."
        ),
        openapi_extra={
            "requestBody": {
                "required": True,
                "content": {"application/json": {"schema": {"$ref": "#/components/schemas/DemandBatchIn"}}},
            }
        },
        responses={
            413: {"model": ErrorOut, "description": "the body is too large for the batch cap"},
            415: {"model": ErrorOut, "description": "the body is not declared as application/json"},
        },
    )
    async def demand_batch(request: Request) -> Response:
        snap = _snapshot(request.app.state.api_state)
        m: ApiMetrics = request.app.state.metrics
        _require_json(request)
        raw = await _read_body(request, body_limit)
        bad: dict[int, dict[str, Any]] = {}
        try:
            parsed = batch_in.model_validate_json(raw)
            items: list[Any] = parsed.items  # type: ignore[attr-defined]
        except ValidationError:
            lenient = _lenient_items(raw, settings.max_batch)
            if isinstance(lenient, Response):
                return lenient
            items, bad = lenient
        n = len(items)
        keys = [it["model"] if it is not None else "" for it in items]
        rates = [it["rate"] if it is not None else 0.0 for it in items]
        bank = snap.bank
        get_row = bank.index.get
        rows_list = [get_row(k, -1) for k in keys]
        rows = np.array(rows_list, dtype=np.int64)
        versions = snap.row_versions
        out: list[dict[str, Any] | None]
        if n and not bad and min(rows_list) >= 0:  # the usual case: every key known, no index juggling
            known = np.arange(n)
            look = bank.lookup(rows, np.array(rates, dtype=float))
            demand_m, bound_m = look.millicores()
            ext = look.extrapolated
            over = look.upper > MAX_CORES
            out = [
                {"model": k, "rate": r, "demand_m": c, "demand_bound_m": u, "extrapolated": e, "version": versions[row]}
                for k, r, row, c, u, e in zip(keys, rates, rows_list, demand_m.tolist(), bound_m.tolist(), ext.tolist())
            ]
        else:
            known = np.flatnonzero(rows >= 0)
            out = [None] * n
            ext = np.zeros(0, dtype=bool)
            over = np.zeros(0, dtype=bool)
            if known.size:
                look = bank.lookup(rows[known], np.asarray(rates, dtype=float)[known])
                demand_m, bound_m = look.millicores()
                ext = look.extrapolated
                over = look.upper > MAX_CORES
                for i, row, c, u, e in zip(
                    known.tolist(), rows[known].tolist(), demand_m.tolist(), bound_m.tolist(), ext.tolist()
                ):
                    out[i] = {
                        "model": keys[i],
                        "rate": rates[i],
                        "demand_m": c,
                        "demand_bound_m": u,
                        "extrapolated": e,
                        "version": versions[row],
                    }
        n_over = int(np.count_nonzero(over)) if known.size else 0
        if n_over:
            for j in np.flatnonzero(over).tolist():
                i = int(known[j])
                out[i] = {
                    "model": keys[i],
                    "rate": rates[i],
                    "error": OUT_OF_RANGE,
                    "reason": "out_of_range",
                    "field": f"items.{i}.rate",
                }
            m.invalid.labels("out_of_range").inc(n_over)
        if known.size:
            m.lookups.inc(int(known.size) - n_over)
            n_ext = int(np.count_nonzero(ext & ~over))
            if n_ext:
                m.extrapolated.inc(n_ext)
        if known.size != n:
            unknown = 0
            for i in np.flatnonzero(rows < 0).tolist():
                if i in bad:
                    out[i] = bad[i]
                    m.invalid.labels(bad[i]["reason"]).inc()
                    continue
                key = keys[i]
                if not is_key(key):  # the pattern lets an over-long workload part through
                    out[i] = _item_error(
                        i, items[i], f"items.{i}.model", "invalid_model",
                        f"items.{i}.model: the workload part is longer than 253 characters "
                        "(Kubernetes DNS subdomain)",
                    )
                    m.invalid.labels("invalid_model").inc()
                    continue
                out[i] = {
                    "model": key,
                    "rate": rates[i],
                    "error": NO_MODEL,
                    "reason": "unknown_model",
                    "field": f"items.{i}.model",
                }
                unknown += 1
            if unknown:
                m.unknown.inc(unknown)
        return FastJSON({"items": out})

    @protected.post(
        "/v1/reload",
        response_model=ReloadOut,
        tags=["models"],
        summary="Re-read the store and swap it in atomically",
        description=(
            "Requests in flight finish on the old set. A corrupt artifact is refused (listed in "
            "`refused`, logged); if its key was served before, the last good version keeps serving. "
            "If the store cannot be read at all, nothing changes and the answer is 503 with `ok: false`."
        ),
        responses={503: {"model": ReloadOut, "description": "the store could not be read; the old set keeps serving"}},
    )
    async def reload(
        state: Annotated[ApiState, Depends(get_state)], m: Annotated[ApiMetrics, Depends(get_metrics)]
    ) -> Response:
        report = await run_in_threadpool(state.reload)
        m.reloads.labels(report.result).inc()
        return FastJSON(reload_body(report), status_code=200 if report.ok else 503)

    return open_router, protected


def build_docs_router() -> APIRouter:
    """``/openapi.json``, ``/docs`` and ``/redoc`` behind the token like every other route."""
    from fastapi.openapi.docs import get_redoc_html, get_swagger_ui_html

    docs = APIRouter(dependencies=[Depends(require_token)], include_in_schema=False)

    @docs.get("/openapi.json")
    async def openapi(request: Request) -> Response:
        return FastJSON(request.app.openapi())

    @docs.get("/docs")
    async def swagger() -> HTMLResponse:
        return get_swagger_ui_html(openapi_url="/openapi.json", title="ratefit sizing API")

    @docs.get("/redoc")
    async def redoc() -> HTMLResponse:
        return get_redoc_html(openapi_url="/openapi.json", title="ratefit sizing API")

    return docs
