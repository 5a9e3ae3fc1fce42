"""Logs as one JSON object per line, with the request id of the request being served.

The same ``dictConfig`` is applied by every ``mixscore`` command and handed to the HTTP
server (uvicorn), so its worker processes and its own messages write the same lines.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import logging
import logging.config
import os
import time
from contextvars import ContextVar
from typing import Any

import msgspec

#: The id of the request this task serves ("" outside requests); set by the middleware.
REQUEST_ID: ContextVar[str] = ContextVar("request_id", default="")
#: Attributes every LogRecord has; anything else came in ``extra=`` and is written too,
#: but for uvicorn's copy of its message with terminal colour codes.
_STANDARD = frozenset(logging.LogRecord("", 0, "", 0, "", None, None).__dict__) | {
    "message", "color_message"}
_encode = msgspec.json.Encoder().encode


@functools.lru_cache(maxsize=4)
def _utc_second(second: int) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(second))


def _utc(created: float) -> str:
    """ISO 8601 in UTC with milliseconds; strftime runs once a second, not once a line."""
    second = int(created)
    return f"{_utc_second(second)}.{int((created - second) * 1000):03d}Z"


class JsonFormatter(logging.Formatter):
    """``{"time", "level", "logger", "message", "request_id"?, ...extra, "error"?}``."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "time": _utc(record.created),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = REQUEST_ID.get()
        if request_id:
            line["request_id"] = request_id
        for name, value in record.__dict__.items():
            if name not in _STANDARD:
                line[name] = value
        if record.exc_info:
            line["error"] = self.formatException(record.exc_info)
        return _encode(line).decode()


def dict_config(level: str) -> dict[str, Any]:
    """Our loggers and the HTTP server's, all through one JSON handler on standard error."""
    def through_json() -> dict[str, Any]:  # one dict each: dictConfig may edit them
        return {"handlers": ["json"], "level": level.upper(), "propagate": False}

    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"json": {"()": f"{__name__}.JsonFormatter"}},
        "handlers": {"json": {"class": "logging.StreamHandler", "formatter": "json",
                              "stream": "ext://sys.stderr"}},
        "loggers": {name: through_json() for name in ("mixscore", "uvicorn", "uvicorn.error")},
        "root": {"handlers": ["json"], "level": "WARNING"},
    }


def configure(level: str) -> dict[str, Any]:
    """Apply the JSON configuration at ``level``; returns it for the server's workers."""
    config = dict_config(level)
    logging.config.dictConfig(config)
    return config


class AccessLog:
    """One line per request, as ``JsonFormatter`` writes it, in batches, to standard error
    or to the file ``open`` names (MIXSCORE_ACCESS_LOG).

    A LogRecord costs 15 us, as much as scoring a point, and a write per request cut
    /healthz throughput by a third (measured under granian, our first server). Lines
    wait at most ``FLUSH_S`` (``flush_every``) or until ``BATCH_LINES`` are buffered.
    Written when the ``mixscore.access`` logger is enabled for INFO (MIXSCORE_LOG_LEVEL).
    """

    FLUSH_S = 0.25
    BATCH_LINES = 256
    logger = logging.getLogger("mixscore.access")

    def __init__(self) -> None:
        self._lines: list[bytes] = []
        self._descriptor = 2

    def open(self, destination: str) -> None:
        """Write to ``destination``: "-" for standard error, else a file appended to (each
        batch is one write, so several processes may share the file)."""
        self.flush()
        if self._descriptor != 2:
            os.close(self._descriptor)
        self._descriptor = 2 if destination == "-" else os.open(
            destination, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    def enabled(self) -> bool:
        return self.logger.isEnabledFor(logging.INFO)

    def write(self, request_id: str, route: str, method: str, status: int,
              duration_s: float) -> None:
        self._lines.append(_encode({
            "time": _utc(time.time()), "level": "INFO", "logger": self.logger.name,
            "message": "request", "request_id": request_id, "route": route, "method": method,
            "status": status, "duration_ms": round(duration_s * 1e3, 3)}))
        if len(self._lines) >= self.BATCH_LINES:
            self.flush()

    def flush(self) -> None:
        if self._lines:
            lines, self._lines = self._lines, []
            lines.append(b"")
            os.write(self._descriptor, b"\n".join(lines))

    async def flush_every(self, stop: asyncio.Event) -> None:
        """Flush every FLUSH_S until ``stop`` is set, then once more."""
        while not stop.is_set():
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(stop.wait(), self.FLUSH_S)
            self.flush()


ACCESS_LOG = AccessLog()
