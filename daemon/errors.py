"""The project's exception hierarchy, re-exported for the runtime (STYLE rule 9)."""

from ionwarden.parsers._errors import (
    ConfigError,
    DaemonError,
    OutputError,
    ParseError,
    TransportError,
)

__all__ = ["ConfigError", "DaemonError", "OutputError", "ParseError", "TransportError"]
