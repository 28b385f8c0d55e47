"""The sizing API (FastAPI): public surface.

    from ratefit.models.api import ApiSettings, create_app
    app = create_app(ApiSettings(store="store/", token=None))

``ratefit serve`` runs this app under uvicorn. The pieces: ``api_schemas`` (settings,
request and response models), ``api_state`` (the immutable snapshot of the store and
its atomic reload), ``api_metrics`` (per-app Prometheus registry, access log,
Server-Timing), ``api_routes`` (the handlers), ``api_app`` (assembly), ``api_logging``
(JSON-lines logs for the server process).
"""

from __future__ import annotations

from ratefit.models.api_app import create_app
from ratefit.models.api_schemas import DEFAULT_MAX_BATCH, MAX_RATE, ApiSettings
from ratefit.models.api_state import ApiState, ReloadReport, ServingSnapshot, build_snapshot

__all__ = [
    "create_app",
    "ApiSettings",
    "ApiState",
    "ServingSnapshot",
    "ReloadReport",
    "build_snapshot",
    "DEFAULT_MAX_BATCH",
    "MAX_RATE",
]
