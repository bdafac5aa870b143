"""The project's exception hierarchy (STYLE rule 9).

One root, :class:`DaemonError`, with a branch per layer. It lives in ``parsers`` because that is the
lowest layer; ``ionwarden.daemon.errors`` re-exports it. Third-party exceptions are translated where
they enter (``raise OurError(...) from exc``).
"""

from __future__ import annotations

__all__ = ["ConfigError", "DaemonError", "OutputError", "ParseError", "TransportError"]


class DaemonError(Exception):
    """Root of every error ionwarden raises on purpose."""


class ParseError(DaemonError):
    """Bytes that cannot be decoded.

    ``message_id`` is the RTCM message number, the NMEA sentence id or the RINEX record kind, and
    ``offset`` is the byte offset in the stream (or the line number for RINEX) where it was found.
    """

    def __init__(
        self, reason: str, *, message_id: str | int | None = None, offset: int | None = None
    ):
        self.reason = reason
        self.message_id = message_id
        self.offset = offset
        where = []
        if message_id is not None:
            where.append(f"message {message_id}")
        if offset is not None:
            where.append(f"offset {offset}")
        super().__init__(f"{reason} ({', '.join(where)})" if where else reason)


class TransportError(DaemonError):
    """A source could not connect, read, or timed out."""


class ConfigError(DaemonError):
    """A configuration value is invalid. ``key`` is the dotted key path, e.g. ``stations[1].source``."""

    def __init__(self, key: str, reason: str):
        self.key = key
        self.reason = reason
        super().__init__(f"{key}: {reason}" if key else reason)


class OutputError(DaemonError):
    """An output (MQTT, exporter, file) failed."""
