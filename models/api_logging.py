"""JSON-lines logging for the sizing API process (``ratefit serve``).

One JSON object per line on stderr: ``time`` (RFC 3339, UTC), ``level``, ``logger``,
``message`` and any structured fields the record carries (``event``, ``file``,
``kept_previous`` …). Access records (see ``models.api_metrics``) carry their fields
under ``access`` and are flattened to the top level. Only the server process sets this
up (``configure_json_logging``); the app itself only emits records.
"""

from __future__ import annotations

import json
import logging
import sys
from datetime import datetime, timezone
from typing import IO, Any

__all__ = ["JsonLineFormatter", "configure_json_logging"]

_STANDARD = set(vars(logging.makeLogRecord({}))) | {"message", "asctime", "taskName", "color_message"}


class JsonLineFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
        }
        access = getattr(record, "access", None)
        if isinstance(access, dict):
            out.update(access)
        else:
            out["message"] = record.getMessage()
        for k, v in vars(record).items():
            if k not in _STANDARD and k != "access" and k not in out:
                out[k] = v
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str, allow_nan=False)


def configure_json_logging(level: str = "info", *, stream: IO[str] | None = None) -> None:
    """Send ratefit's and uvicorn's logs to ``stream`` (stderr) as JSON lines."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonLineFormatter())
    root = logging.getLogger()
    for h in list(root.handlers):
        root.removeHandler(h)
    root.addHandler(handler)
    root.setLevel(level.upper())
    for name in ("uvicorn", "uvicorn.error", "uvicorn.access"):
        lg = logging.getLogger(name)
        lg.handlers.clear()
        lg.propagate = True
