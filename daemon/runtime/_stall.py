"""Stall detection for one source, pure: the caller passes the monotonic time in (STYLE rule 22).

Three kinds, each with its own threshold: no byte at all (link silently dead, receiver hung), bytes
but no valid frame (wrong baud rate, garbage), frames but no observation epoch (MSM output switched
off, only NMEA arriving). ``deadline()`` tells the read loop how long it may wait.

:class:`StallTimer` (the one part that is not pure) interrupts a task's pending read once the
detector's verdict is a stall.
"""

from __future__ import annotations

import asyncio
import enum
from dataclasses import dataclass

__all__ = ["StallDetector", "StallKind", "StallLimits", "StallTimer"]

_INF = float("inf")


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


class StallTimer:
    """The stall limit of the reads of one connection: one timer per connection instead of an
    ``asyncio.timeout_at`` around every read (a context, a timer armed and cancelled, a task
    lookup: ~23k instructions a read, on every station's path to its urgent step).

    Use: ``arm(detector.deadline())`` before each read, ``reading = False`` after it, and when the
    read raised while :attr:`fired` is set, :meth:`took` says whether that was the stall limit
    (then "no data, check the limits") or an outside cancellation (re-raise); :meth:`close` at
    the end of the connection.

    The detector's deadline only moves later (``saw_*`` and ``reset`` take the current monotonic
    time), so a timer armed at an earlier deadline fires early, never late: then, if no stall is
    in force (:meth:`StallDetector.check`, the verdict the read loop gives too), it is armed
    again at the current deadline. While a read waits and a stall is in force, it cancels the
    task as ``asyncio.timeout_at`` did, and :meth:`took` tells that cancellation from an outside
    one the same way. A timer that fires between reads (the task waits on its own full queue)
    does nothing: the next read arms it again."""

    __slots__ = ("_at", "_cancelling", "_det", "_handle", "_loop", "_task", "fired", "reading")

    def __init__(
        self, det: StallDetector, loop: asyncio.AbstractEventLoop, task: asyncio.Task[object]
    ):
        self._det, self._loop, self._task = det, loop, task
        self._handle: asyncio.Handle | None = None
        self._at = _INF
        self._cancelling = 0
        self.reading = False
        self.fired = False

    def arm(self, deadline: float) -> None:
        """A read starts with the stall deadline ``deadline``."""
        if self._handle is None or deadline < self._at:  # (the latter: not with today's detector)
            self.close()
            self._schedule(deadline)
        self._cancelling = self._task.cancelling()
        self.reading = True

    def _schedule(self, when: float) -> None:
        loop = self._loop
        self._at = when
        # (as asyncio.Timeout.reschedule: a deadline already passed fires in the next iteration)
        if when <= loop.time():
            self._handle = loop.call_soon(self._on_timer)
        else:
            self._handle = loop.call_at(when, self._on_timer)

    def _on_timer(self) -> None:
        self._handle = None
        if not self.reading:
            return
        det = self._det
        if det.check(self._loop.time()) is None:
            self._schedule(det.deadline())
            return
        self.fired = True
        self._task.cancel()

    def took(self, exc: BaseException | None) -> bool:
        """After a read the timer cancelled (as ``asyncio.Timeout.__aexit__``): withdraw that
        cancellation; True when ``exc`` is it and no outside cancellation came too."""
        self.fired = False
        return self._task.uncancel() <= self._cancelling and isinstance(exc, asyncio.CancelledError)

    def close(self) -> None:
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
