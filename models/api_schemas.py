"""The sizing API's boundary types: settings, request bodies and response bodies.

Every request and response of the sizing API is described here as a pydantic model
(with examples, so the OpenAPI page at ``/docs`` is usable as documentation). Request
models are strict: a rate must be a JSON number (not a string, not a boolean), finite,
``>= 0`` and at most ``MAX_RATE``; a key must be ``namespace/workload/container`` in
Kubernetes name syntax (``models.keys.KEY_PATTERN``); unknown fields are refused, so a
typo (``"rates"``) is a 422 naming the field instead of a silent default.

The batch items are ``TypedDict``s rather than models: validating 10,000 of them from
raw JSON bytes in pydantic-core costs a few milliseconds, while building 10,000 model
objects would cost several times that. Responses on the hot paths are built as plain
dicts and serialised with orjson; the models below still document them in OpenAPI
(``response_model``) and the tests check real answers against them.

The demo keys in the examples (``shop/checkout/app``) are invented for this project.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, SecretStr, create_model, with_config
from typing_extensions import TypedDict

from ratefit.models.keys import KEY_PATTERN, LABEL_PATTERN, MAX_KEY_LENGTH, SUBDOMAIN_PATTERN
from ratefit.models.sanity import MAX_CORES, MAX_RATE

__all__ = [
    "ApiSettings",
    "DEFAULT_MAX_BATCH",
    "MAX_RATE",
    "MAX_CORES",
    "ITEM_ERROR_REASONS",
    "NAME_LABEL_PATTERN",
    "NAME_SUBDOMAIN_PATTERN",
    "DemandItemIn",
    "DemandBatchIn",
    "batch_model",
    "DemandOut",
    "DemandItemOut",
    "DemandBatchOut",
    "ModelSummary",
    "ModelDetail",
    "ModelList",
    "RefusedFile",
    "ReloadOut",
    "HealthOut",
    "ReadyOut",
    "ErrorOut",
    "FieldError",
]

#: default cap on the number of items in one ``POST /v1/demand``
DEFAULT_MAX_BATCH = 50_000
#: JSON bytes allowed per batch item when bounding the request body (a maximal key is
#: 381 characters; common practice, no source)
BYTES_PER_ITEM = 512

#: RFC 1123 DNS label (namespace, container), Kubernetes docs "Object Names and IDs"
NAME_LABEL_PATTERN = LABEL_PATTERN
#: RFC 1123 DNS subdomain (workload name), same source
NAME_SUBDOMAIN_PATTERN = SUBDOMAIN_PATTERN

EXAMPLE_KEY = "shop/checkout/app"
# The pattern has no look-ahead (pydantic's regex engine has none): the 253-character
# cap of the workload is checked by ``models.keys.parse_key`` after it.
KeyStr = Annotated[
    str, Field(pattern=KEY_PATTERN, min_length=5, max_length=MAX_KEY_LENGTH, examples=[EXAMPLE_KEY])
]
Rate = Annotated[
    float,
    Field(
        ge=0,
        le=MAX_RATE,
        allow_inf_nan=False,
        strict=True,
        description="request rate per pod, req/s (a finite JSON number >= 0)",
        examples=[120.0],
    ),
]

#: why one batch item was answered with an error instead of a demand
ITEM_ERROR_REASONS = ("unknown_model", "invalid_model", "invalid_rate", "invalid_item", "out_of_range")


class ApiSettings(BaseModel):
    """How one sizing API app is configured (``create_app(settings)``).

    ``token``: when set, every route but ``/healthz`` needs ``Authorization: Bearer
    <token>``. It is a ``SecretStr`` so that a repr or a log of the settings never
    shows it."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    store: Path
    token: SecretStr | None = None
    max_batch: Annotated[int, Field(ge=1, le=10_000_000)] = DEFAULT_MAX_BATCH
    #: name of the logger the access log goes to (one JSON object per line)
    access_logger: str = "ratefit.api.access"
    #: re-read the store every so many seconds (None: only on ``POST /v1/reload``); a
    #: reload only re-verifies files that changed, so a short interval is cheap
    reload_interval: Annotated[float, Field(gt=0)] | None = None


# -- requests ---------------------------------------------------------------------------
@with_config(ConfigDict(extra="forbid", strict=True))
class DemandItemIn(TypedDict):
    """One lookup in a batch."""

    model: KeyStr
    rate: Rate


class DemandBatchIn(BaseModel):
    """``POST /v1/demand``: lookups answered in request order."""

    model_config = ConfigDict(
        extra="forbid",
        strict=True,
        json_schema_extra={
            "examples": [{"items": [{"model": EXAMPLE_KEY, "rate": 120.0}, {"model": "shop/cart/app", "rate": 35.5}]}]
        },
    )

    items: Annotated[list[DemandItemIn], Field(max_length=DEFAULT_MAX_BATCH)]


def batch_model(max_items: int) -> type[BaseModel]:
    """``DemandBatchIn`` with the app's own cap on the number of items."""
    if max_items == DEFAULT_MAX_BATCH:
        return DemandBatchIn
    return create_model(
        "DemandBatchIn",
        __config__=ConfigDict(extra="forbid", strict=True),
        items=(Annotated[list[DemandItemIn], Field(max_length=max_items)], ...),
    )


# -- responses --------------------------------------------------------------------------
class DemandOut(BaseModel):
    """What a container needs at one rate (millicores, rounded up)."""

    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "model": EXAMPLE_KEY,
                    "rate": 120.0,
                    "demand_m": 412,
                    "demand_bound_m": 468,
                    "extrapolated": False,
                    "version": "3f9a0c41d2be",
                }
            ]
        }
    )

    model: str = Field(description="the model key, namespace/workload/container")
    rate: float = Field(description="the rate asked about, req/s per pod")
    demand_m: int = Field(description="expected CPU demand at that rate, millicores (rounded up)")
    demand_bound_m: int = Field(
        description="upper bound of the demand at that rate (demand + conformal band), millicores"
    )
    extrapolated: bool = Field(description="the rate lies outside the trained range")
    version: str = Field(description="content version of the model (artifact) that answered")


class DemandItemOut(BaseModel):
    """One answer of a batch: the fields of ``DemandOut``, or ``error`` (with ``reason``
    and ``field``) for that item alone. ``model`` and ``rate`` repeat the request's
    values only when they are valid (an invalid value is never echoed: null)."""

    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "model": "shop/gone/app",
                    "rate": 3.0,
                    "error": "no model is loaded for this key: train it (ratefit train) and reload the API",
                    "reason": "unknown_model",
                    "field": "items.1.model",
                },
            ]
        }
    )

    model: str | None
    rate: float | None
    demand_m: int | None = None
    demand_bound_m: int | None = None
    extrapolated: bool | None = None
    version: str | None = None
    error: str | None = Field(None, description="set (and the demand fields absent) when this item has no answer")
    reason: str | None = Field(None, description="why: " + ", ".join(ITEM_ERROR_REASONS))
    field: str | None = Field(None, description="the request field at fault, e.g. items.3.rate")


class DemandBatchOut(BaseModel):
    items: list[DemandItemOut] = Field(description="one answer per request item, in request order")


class ModelSummary(BaseModel):
    model: str = Field(description="the model key, namespace/workload/container", examples=[EXAMPLE_KEY])
    chosen: str = Field(description="the estimator the cross-validation chose", examples=["isotonic"])
    rate_range: tuple[float, float] = Field(description="trained rate range, req/s per pod")
    coverage: float = Field(description="coverage of the upper band on unseen data", examples=[0.95])
    version: str = Field(description="content version of this model", examples=["3f9a0c41d2be"])
    trained_at: str


class ModelDetail(ModelSummary):
    samples: int
    samples_total: int
    dropped: dict[str, int]
    folds: int
    seed: int
    tuned: bool
    window: dict[str, Any]
    cv: list[dict[str, Any]] = Field(description="the cross-validation table: one row per candidate")
    band_m: int = Field(description="width of the upper band, millicores")
    content_hash: str
    capacity: float | None = Field(
        None, description="per-pod capacity, req/s (the profiled knee); null when not measured"
    )


class RefusedFile(BaseModel):
    file: str = Field(description="path inside the store", examples=["shop/checkout/app.json"])
    error: str
    reason: str = Field(
        description="not_regular_file, too_large, unreadable, corrupt, absurd_values or wrong_place",
        examples=["corrupt"],
    )
    kept_previous: bool = Field(
        False, description="the last good version of this key (from before the reload) is still served"
    )


class ModelList(BaseModel):
    store_version: str | None = Field(
        description="version of the loaded store (changes when any model changes)"
    )
    loaded_at: float | None = Field(description="when the store was loaded, Unix seconds")
    model_count: int = Field(description="number of models served")
    models: list[ModelSummary]
    refused: list[RefusedFile]


class ReloadOut(BaseModel):
    ok: bool = Field(description="false when the store could not be read at all (the old set keeps serving)")
    store_version: str | None
    previous_store_version: str | None
    model_count: int
    added: int
    removed: int
    changed: int
    unchanged: int
    refused: list[RefusedFile]
    seconds: float
    error: str | None = None


class HealthOut(BaseModel):
    status: str = Field(examples=["ok"])


class ReadyOut(BaseModel):
    ready: bool
    model_count: int
    store_version: str | None
    refused_count: int


class FieldError(BaseModel):
    field: str = Field(description="where: items.3.rate, rate (query), namespace (path), body")
    message: str
    type: str


class ErrorOut(BaseModel):
    error: str = Field(description="what is wrong and, where it helps, what to do")
    errors: list[FieldError] = Field(default_factory=list)
