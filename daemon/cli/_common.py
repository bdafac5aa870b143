"""Pieces every subcommand shares: the safety line, logging set-up, config loading."""

from __future__ import annotations

import json
import logging
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ionwarden.daemon.config import load_settings
from ionwarden.daemon.errors import ConfigError

if TYPE_CHECKING:
    import argparse

    from ionwarden.daemon.config import Settings

__all__ = [
    "SAFETY_LINE",
    "apply_logging_settings",
    "configure_logging",
    "die",
    "load_or_die",
    "tag_worker_logs",
]

SAFETY_LINE = (
    "Safety: ionwarden is a monitoring aid, not a certified integrity monitor; follow local survey "
    "codes and licensed practice, and keep your receiver's own integrity checks on machine control."
)


_TEXT_FORMAT = "%(asctime)s %(levelname)-7s {tag}%(name)s: %(message)s"


class _JsonFormatter(logging.Formatter):
    """One JSON object per line for log shippers: time (UTC ISO 8601), level, logger, message
    (and ``worker``, the index of a worker process of ``[runtime] workers`` > 1)."""

    worker: int | None = None

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        if self.worker is not None:
            out["worker"] = self.worker
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, ensure_ascii=False)


def configure_logging(level: str, fmt: str) -> None:
    """The only place logging is configured (STYLE rule 11)."""
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter(_TEXT_FORMAT.format(tag="")))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())


def tag_worker_logs(index: int) -> None:
    """Mark this process's log lines as worker ``index``'s (``[runtime] workers`` > 1): text
    lines get ``[worker N]`` before the logger name, JSON objects a ``worker`` field."""
    for handler in logging.getLogger().handlers:
        if isinstance(handler.formatter, _JsonFormatter):
            handler.formatter.worker = index
        else:
            handler.setFormatter(logging.Formatter(_TEXT_FORMAT.format(tag=f"[worker {index}] ")))


def die(message: str, code: int = 2) -> int:
    """Print one line on stderr and return the exit code."""
    print(f"ionwarden: {message}", file=sys.stderr)
    return code


def load_or_die(path: Path | None) -> Settings | None:
    """Load the settings, or print the one-line error and return None."""
    try:
        return load_settings(path)
    except ConfigError as exc:
        die(f"config: {exc}")
        return None


def config_path(args: argparse.Namespace) -> Path | None:
    value = getattr(args, "config", None)
    return Path(value) if value else None


def apply_logging_settings(args: argparse.Namespace, settings: Settings) -> None:
    """Re-configure logging from ``[logging]`` where the command line did not say otherwise."""
    configure_logging(
        getattr(args, "log_level", None) or settings.logging.level,
        getattr(args, "log_format", None) or settings.logging.format,
    )
