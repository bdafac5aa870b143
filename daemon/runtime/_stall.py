"""Stall detection for one source, pure: the caller passes the monotonic time in (STYLE rule 22).

Three kinds, each with its own threshold: no byte at all (link silently dead, receiver hung), bytes
but no valid frame (wrong baud rate, garbage), frames but no observation epoch (MSM output switched
off, only NMEA arriving). ``deadline()`` tells the read loop how long it may wait.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

__all__ = ["StallDetector", "StallKind", "StallLimits"]


class StallKind(enum.Enum):
    NO_DATA = "no-data"
    NO_FRAME = "no-frame"
    NO_EPOCH = "no-epoch"


@dataclass(frozen=True, slots=True, kw_only=True)
class StallLimits:
    no_data_s: float = 10.0
    no_frame_s: float = 30.0
    no_epoch_s: float = 60.0


class StallDetector:
    """Tracks when data, a frame and an epoch last arrived since the connection opened."""

    def __init__(self, limits: StallLimits, now: float):
        self.limits = limits
        self.reset(now)

    def reset(self, now: float) -> None:
        """A new connection: every timer starts again from ``now``."""
        self.last_data = self.last_frame = self.last_epoch = now

    def saw_data(self, now: float) -> None:
        self.last_data = now

    def saw_frame(self, now: float) -> None:
        self.last_frame = now

    def saw_epoch(self, now: float) -> None:
        self.last_epoch = now

    def deadline(self) -> float:
        """The earliest monotonic time at which a stall would be declared."""
        lim = self.limits
        return min(
            self.last_data + lim.no_data_s,
            self.last_frame + lim.no_frame_s,
            self.last_epoch + lim.no_epoch_s,
        )

    def check(self, now: float) -> StallKind | None:
        """The stall in force at ``now``, most basic first (no data explains no frame)."""
        lim = self.limits
        if now - self.last_data >= lim.no_data_s:
            return StallKind.NO_DATA
        if now - self.last_frame >= lim.no_frame_s:
            return StallKind.NO_FRAME
        if now - self.last_epoch >= lim.no_epoch_s:
            return StallKind.NO_EPOCH
        return None
