"""Replay pacing against the data's own time tags, pure (times passed in).

A replay at ``speed`` × real time maps data time ``t`` to the monotonic instant
``start_mono + (t − start_data) / speed``. A jump backwards (a looped file) or forwards by more than
``max_gap_s`` (a gap in the capture) re-anchors instead of sleeping for hours.
"""

from __future__ import annotations

__all__ = ["ReplayPacer"]


class ReplayPacer:
    def __init__(self, speed: float, *, max_gap_s: float = 300.0):
        if speed < 0:
            raise ValueError(f"speed must be >= 0, got {speed}")
        self.speed = speed
        self.max_gap_s = max_gap_s
        self._anchor: tuple[float, float] | None = None  # (data time s, monotonic s)
        self._last_data = 0.0

    def delay(self, data_time_s: float, now: float) -> float:
        """Seconds to wait before handing on the epoch tagged ``data_time_s`` (0 = go now)."""
        if self.speed == 0:
            return 0.0
        jumped = self._anchor is not None and not (
            0.0 <= data_time_s - self._last_data <= self.max_gap_s
        )
        self._last_data = data_time_s
        if self._anchor is None or jumped:
            self._anchor = (data_time_s, now)
            return 0.0
        t0, m0 = self._anchor
        return max(0.0, m0 + (data_time_s - t0) / self.speed - now)
