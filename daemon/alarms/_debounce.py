"""A level alarm with hysteresis and hold times: a pure state machine, time passed in.

Raised when the value stays ≥ ``raise_at`` for ``raise_after_s``; cleared when it stays
< ``clear_at`` for ``clear_after_s`` (``clear_at ≤ raise_at``, so values in between change nothing).
An unknown value (NaN) restarts any hold in progress and keeps the state: missing data is reported
by the stream-stall alarm, not by guessing.
"""

from __future__ import annotations

import math

__all__ = ["Debouncer"]


class Debouncer:
    """Hysteresis + minimum durations over a scalar series; ``step`` returns True on a change."""

    __slots__ = ("active", "clear_after_s", "clear_at", "held_since", "raise_after_s", "raise_at")

    def __init__(
        self, *, raise_at: float, clear_at: float, raise_after_s: float, clear_after_s: float
    ) -> None:
        if clear_at > raise_at:
            raise ValueError(f"clear_at {clear_at} is above raise_at {raise_at}")
        self.raise_at = raise_at
        self.clear_at = clear_at
        self.raise_after_s = raise_after_s
        self.clear_after_s = clear_after_s
        self.active = False
        #: When the change being held began (``t_s``), None when none is (read-only for callers:
        #: the alarm engine reads it to skip a step that would change nothing).
        self.held_since: float | None = None

    @property
    def pending(self) -> bool:
        """A change is being held (it happens if the condition lasts its hold time)."""
        return self.held_since is not None

    def step(self, value: float, t_s: float) -> bool:
        """Feed one value observed at ``t_s`` (seconds, any monotonic base); True if state flipped."""
        if math.isnan(value):
            self.held_since = None
            return False
        crossing = value < self.clear_at if self.active else value >= self.raise_at
        if not crossing:
            self.held_since = None
            return False
        if self.held_since is None or t_s < self.held_since:
            self.held_since = t_s
        hold = self.clear_after_s if self.active else self.raise_after_s
        if t_s - self.held_since >= hold:
            self.active = not self.active
            self.held_since = None
            return True
        return False
