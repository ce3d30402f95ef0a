"""Structured logs: one JSON object per line, with the id of the request being served.

Only a fixed set of fields is written: the time, level, logger, message, the request id and
the fields the access log sets (:data:`ACCESS_FIELDS`). Anything else a caller attaches to a
record (``extra=...``) is dropped, so a request body, a case's attributes, a bearer token or
a secret setting cannot reach the log through a stray ``extra``. Messages are written as
given: the service never puts attribute values, tokens or secrets in a message.
"""

from __future__ import annotations

import json
import logging
import logging.config
from contextvars import ContextVar
from datetime import UTC, datetime
from typing import Any

request_id_var: ContextVar[str | None] = ContextVar("evenhand_request_id", default=None)
"""The id of the request the current task serves (set by the middleware)."""

ACCESS_FIELDS = ("method", "route", "status", "duration_ms")
"""The fields of an access-log record, besides the request id."""


class JsonFormatter(logging.Formatter):
    """Formats a record as one line of JSON (allow-listed fields only)."""

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None) or request_id_var.get()
        if request_id is not None:
            entry["request_id"] = request_id
        for name in ACCESS_FIELDS:
            value = getattr(record, name, None)
            if value is not None:
                entry[name] = value
        if record.exc_info:
            # The exception's type and the stack, never its arguments' values beyond str(exc).
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False, separators=(",", ":"))


def log_config(
    level: str = "INFO", json_format: bool = True, uvicorn_access: bool = False
) -> dict[str, Any]:
    """A :func:`logging.config.dictConfig` for the server (uvicorn's ``log_config``): every
    logger, uvicorn's included, writes through one handler on stderr."""
    formatter: dict[str, Any] = (
        {"()": f"{__name__}.JsonFormatter"}
        if json_format
        else {"format": "%(asctime)s %(levelname)s [%(name)s] %(message)s"}
    )
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"main": formatter},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "formatter": "main",
                "stream": "ext://sys.stderr",
            }
        },
        "root": {"handlers": ["stderr"], "level": level},
        "loggers": {
            # uvicorn's own handlers are replaced by the root's; its access log (raw paths
            # with query strings) stays off unless asked for: evenhand.access writes route
            # templates instead.
            "uvicorn": {"handlers": [], "propagate": True, "level": level},
            "uvicorn.error": {"handlers": [], "propagate": True, "level": level},
            "uvicorn.access": {
                "handlers": [],
                "propagate": uvicorn_access,
                "level": level if uvicorn_access else "WARNING",
            },
            # SQLAlchemy would log statements with their parameters (attribute values).
            "sqlalchemy": {"level": "WARNING"},
        },
    }
