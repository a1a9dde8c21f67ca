"""Structured logs: one JSON object per line, one line per event.

Events are logged through :func:`event` with a stable ``event`` name and fields (UIDs, AE
titles, addresses, outcomes).  Patient names and IDs are never put in events unless the
configuration asks for them (``logging.include_patient_identifiers``).
"""

from __future__ import annotations

import json
import logging
import sys
from datetime import UTC, datetime
from typing import Any

EVENTS = logging.getLogger("diastolic_sr.events")

#: the node's process that writes the lines (``serve``'s role processes set it: "receiver",
#: "grader-1", "sender", ...); "" in a single-process run
PROCESS: list[str] = [""]


def set_process(name: str) -> None:
    """Name this process in every JSON line it logs (field ``process``)."""
    PROCESS[0] = name


#: library loggers kept at WARNING (their INFO lines are per-PDU chatter)
NOISY_LOGGERS = ("pynetdicom", "highdicom", "matplotlib", "fontTools", "PIL")
#: library loggers kept at ERROR: psycopg's pool warns at every reconnection attempt while a
#: journal database is away, which the node says once (``journal_unavailable``)
QUIET_LOGGERS = ("psycopg.pool",)


def event(name: str, message: str, *, level: int = logging.INFO, **fields: Any) -> None:
    """Log one event: ``name`` (e.g. ``object_received``), a readable message, and fields."""
    EVENTS.log(level, message, extra={"event": name, "fields": fields})


class JsonLineFormatter(logging.Formatter):
    """``{"time", "level", "logger", "event", "message", ...fields}`` on one line."""

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname,
            "logger": record.name,
            "event": getattr(record, "event", None) or "log",
            "message": record.getMessage(),
        }
        if PROCESS[0]:
            out["process"] = PROCESS[0]
        for key, value in (getattr(record, "fields", None) or {}).items():
            if key not in out:
                out[key] = value
        if record.exc_info:
            out["error"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str, ensure_ascii=False)


class TextFormatter(logging.Formatter):
    def __init__(self) -> None:
        super().__init__("%(asctime)s %(levelname)s %(name)s: %(message)s")


def configure_logging(fmt: str = "json", level: str = "INFO") -> None:
    """Send every log record to stderr in ``fmt`` ("json" or "text") at ``level``."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonLineFormatter() if fmt == "json" else TextFormatter())
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(getattr(logging, level))
    for name in NOISY_LOGGERS:
        logging.getLogger(name).setLevel(logging.WARNING)
    for name in QUIET_LOGGERS:
        logging.getLogger(name).setLevel(logging.ERROR)
    quiet_pynetdicom()


def quiet_pynetdicom() -> None:
    """Do not bind pynetdicom's standard per-message log handlers to new associations
    (``_config.LOG_HANDLER_LEVEL = "none"``, pynetdicom's documented switch): they format
    every PDU and DIMSE message for INFO and DEBUG lines, which the WARNING level above drops,
    at a cost of about half a millisecond of CPU per C-STORE.  Warnings and errors are still
    logged."""
    from pynetdicom import _config

    _config.LOG_HANDLER_LEVEL = "none"


def set_level(level: str) -> None:
    logging.getLogger().setLevel(getattr(logging, level))
