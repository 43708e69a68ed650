"""Logging without patient data: an exception is logged by its type and where it was raised, never
by its text.

Exception text is where patient data slips into logs: a database error carries the statement's
parameters (patient aliases, so MRNs) unless the engine hides them, and the database's own detail
("Key (alias)=(…) already exists", "Failing row contains (…)"); a validation error quotes its
input. So a logged traceback keeps the frames (code, not data), each exception's type and, for a
database error, its SQLSTATE and constraint name, and drops every message.

``WithholdExceptionText`` does this to every record a handler emits, whoever logged it (uvicorn's
"Exception in ASGI application", APScheduler's failed jobs, ours); ``log_config`` is the logging
set-up `lytestream serve` hands to uvicorn (JSON lines), with that filter on every handler.
"""

from __future__ import annotations

import logging
import traceback
from typing import Any

from sqlalchemy.exc import DBAPIError

__all__ = ["DropColour", "WithholdExceptionText", "describe", "log_config", "safe_traceback"]


def describe(exc: BaseException) -> str:
    """The exception's type; for a database error also the driver's error type, SQLSTATE and constraint."""
    text = type(exc).__name__
    if isinstance(exc, DBAPIError) and exc.orig is not None:
        orig = exc.orig
        parts = [type(orig).__name__]
        if (code := getattr(orig, "sqlstate", None)) is not None:
            parts.append(f"SQLSTATE {code}")
        diag = getattr(orig, "diag", None)
        if (constraint := getattr(diag, "constraint_name", None)) is not None:
            parts.append(f"constraint {constraint}")  # a schema name, not data
        text += f" ({', '.join(parts)})"
    return text


_CAUSE = "\n\nThe above exception was the direct cause of the following exception:\n\n"
_CONTEXT = "\n\nDuring handling of the above exception, another exception occurred:\n\n"


def safe_traceback(exc: BaseException) -> str:
    """A traceback of ``exc`` and the exceptions it was raised from, with every message withheld."""
    parts: list[str] = []
    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:  # newest first, as the chain runs
        seen.add(id(current))
        frames = "".join(traceback.format_list(traceback.extract_tb(current.__traceback__)))
        parts.append(f"Traceback (most recent call last; messages withheld):\n{frames}{describe(current)}")
        if current.__cause__ is not None:
            current, link = current.__cause__, _CAUSE
        elif current.__context__ is not None and not current.__suppress_context__:
            current, link = current.__context__, _CONTEXT
        else:
            break
        parts.append(link)
    return "".join(reversed(parts))


class WithholdExceptionText(logging.Filter):
    """Replaces a record's exception by ``safe_traceback`` of it (formatters print ``exc_text``)."""

    def filter(self, record: logging.LogRecord) -> bool:
        if record.exc_info and record.exc_info[1] is not None:
            record.exc_text = safe_traceback(record.exc_info[1])
            record.exc_info = None
        return True


class DropColour(logging.Filter):
    """uvicorn adds a ``color_message`` with terminal escapes to some records: noise in a JSON line."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.__dict__.pop("color_message", None)
        return True


def log_config(level: str = "info") -> dict[str, Any]:
    """The logging set-up of `lytestream serve`: JSON lines on stderr for every logger (ours, uvicorn's,
    APScheduler's) at ``level``, with exception text withheld on every handler. uvicorn's access log is
    not configured: ``service.api.request_log`` writes one line per request instead, without the raw
    path or query (a query can carry an identifier)."""
    withhold = {"()": f"{__name__}.WithholdExceptionText"}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "filters": {"withhold": withhold, "plain": {"()": f"{__name__}.DropColour"}},
        "formatters": {
            "json": {"()": "pythonjsonlogger.json.JsonFormatter",
                     "fmt": "%(asctime)s %(levelname)s %(name)s %(message)s",
                     "rename_fields": {"asctime": "time", "levelname": "level", "name": "logger"},
                     "datefmt": "%Y-%m-%dT%H:%M:%S%z"},
        },
        "handlers": {
            "default": {"formatter": "json", "class": "logging.StreamHandler", "stream": "ext://sys.stderr",
                        "filters": ["withhold", "plain"]},
        },
        "loggers": {
            # Their INFO is a line per job run and per readiness probe: noise below debug.
            "apscheduler": {"level": "DEBUG" if level == "debug" else "WARNING"},
            "alembic": {"level": "DEBUG" if level == "debug" else "WARNING"},
            "uvicorn": {"handlers": ["default"], "level": level.upper(), "propagate": False},
            "uvicorn.access": {"handlers": [], "level": "CRITICAL", "propagate": False},
        },
        "root": {"handlers": ["default"], "level": level.upper()},
    }
