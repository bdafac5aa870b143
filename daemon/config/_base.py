"""Common base for config sections: frozen, unknown keys rejected (STYLE rule 24)."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict

__all__ = ["Section"]


class Section(BaseModel):
    """A config section: immutable, and a misspelt key is an error rather than silently ignored."""

    model_config = ConfigDict(frozen=True, extra="forbid")
