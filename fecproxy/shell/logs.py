"""One log line per event, as key=value pairs (default) or JSON objects (``log.format: json``).

Callers log an event name and fields: ``log_event(log, logging.INFO, "started", role="sender")``.
Nothing is logged per packet at the default level; per-packet detail is DEBUG only.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from collections.abc import Callable, Mapping
from contextvars import ContextVar

LEVELS = {"debug": logging.DEBUG, "info": logging.INFO, "warning": logging.WARNING, "error": logging.ERROR}


#: Where a daemon keeps its recent events (shell.history.History.record), or None.  A context
#: variable: the daemon sets it before it starts its tasks, which inherit it, so two daemons in
#: one process (the demo) each keep their own events and a library user's logging keeps none.
EventSink = Callable[[int, str, Mapping[str, object]], None]
event_sink: ContextVar[EventSink | None] = ContextVar("fecproxy_event_sink", default=None)


def log_event(logger: logging.Logger, level: int, event: str, **fields: object) -> None:
    """Log one event; at INFO and above it is also kept in the current daemon's history,
    whatever the log level (the one function through which every event is recorded)."""
    if level >= logging.INFO:
        sink = event_sink.get()
        if sink is not None:
            sink(level, event, fields)
    if logger.isEnabledFor(level):
        logger.log(level, event, extra={"fields": fields})


def log_exception(logger: logging.Logger, event: str, **fields: object) -> None:
    """Like :func:`log_event` at ERROR, with the traceback of the exception being handled."""
    sink = event_sink.get()
    if sink is not None:
        sink(logging.ERROR, event, fields)
    logger.error(event, exc_info=True, extra={"fields": fields})


def _timestamp(record: logging.LogRecord) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z"


def _quote(value: object) -> str:
    text = str(value)
    if not text or any(c in text for c in ' "=\n'):
        return json.dumps(text, ensure_ascii=False)
    return text


class KeyValueFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        parts = [
            f"ts={_timestamp(record)}",
            f"level={record.levelname.lower()}",
            f"event={_quote(record.getMessage())}",
        ]
        for key, value in getattr(record, "fields", {}).items():
            parts.append(f"{key}={_quote(value)}")
        if record.exc_info:
            parts.append(f"error={_quote(self.formatException(record.exc_info))}")
        return " ".join(parts)


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, object] = {
            "ts": _timestamp(record),
            "level": record.levelname.lower(),
            "event": record.getMessage(),
        }
        for key, value in getattr(record, "fields", {}).items():
            entry[key] = value if isinstance(value, (int, float, bool, type(None))) else str(value)
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False)


def setup_logging(level: str = "info", fmt: str = "text", stream=None) -> None:
    """Route the ``fecproxy`` loggers to stderr in the chosen format (idempotent)."""
    root = logging.getLogger("fecproxy")
    for handler in list(root.handlers):
        root.removeHandler(handler)
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter() if fmt == "json" else KeyValueFormatter())
    root.addHandler(handler)
    root.setLevel(LEVELS.get(level, logging.INFO))
    root.propagate = False
