"""Log lines: a level and a format (text for a terminal, JSON lines for a log collector),
for the command line and for uvicorn's server and workers alike.

Nothing here decides what is logged: callers log ids, codes and exception types, never a
payload (DEVELOPERS.md, "Rules that are easy to break").
"""

from __future__ import annotations

import logging
from datetime import UTC, datetime
from typing import Any, Literal

import orjson

LogLevel = Literal["debug", "info", "warning", "error"]
LogFormat = Literal["text", "json"]
# The loggers capnote's processes write to: its own and uvicorn's.
_LOGGERS = ("capnote", "uvicorn", "uvicorn.error")


class JsonLines(logging.Formatter):
    """One JSON object per line: time (UTC, ISO 8601), level, logger, message, and the
    exception's traceback when the record carries one."""

    def format(self, record: logging.LogRecord) -> str:
        """The record as one line of JSON."""
        line: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            line["exception"] = self.formatException(record.exc_info)
        return orjson.dumps(line).decode()


def logging_config(level: LogLevel, fmt: LogFormat) -> dict[str, Any]:
    """A logging.config.dictConfig for these settings (uvicorn applies it in each worker)."""
    formatter: dict[str, Any] = (
        {"()": "capnote.logs.JsonLines"}
        if fmt == "json"
        else {"()": "uvicorn.logging.DefaultFormatter", "fmt": "%(levelprefix)s %(message)s"}
    )
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"capnote": formatter},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "formatter": "capnote",
                "stream": "ext://sys.stderr",
            }
        },
        "loggers": {
            name: {"handlers": ["stderr"], "level": level.upper(), "propagate": False}
            for name in _LOGGERS
        },
    }


def configure(level: LogLevel, fmt: LogFormat) -> None:
    """Set up this process's logging."""
    import logging.config

    logging.config.dictConfig(logging_config(level, fmt))
