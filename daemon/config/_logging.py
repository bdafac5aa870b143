"""The ``[logging]`` section."""

from __future__ import annotations

from typing import Literal

from ._base import Section

__all__ = ["LoggingSettings"]


class LoggingSettings(Section):
    level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "INFO"
    format: Literal["text", "json"] = "text"
