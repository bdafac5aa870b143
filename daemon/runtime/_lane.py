"""One estimate step per event-loop turn, so outputs keep moving while many stations compute.

Receivers align their epochs to the GPS second, so every station's bytes arrive together and every
estimate task becomes ready in the same loop iteration. asyncio runs all ready callbacks before it
polls sockets again, so without a lane the 20 steps run back to back and the MQTT publisher, its
socket writes and the broker's PUBACKs wait for the whole burst: the first station's summary is
acknowledged only after the last station's estimation. With the lane, a step takes its turn and
hands the lane on in the *next* loop iteration (``call_soon``, or the waiter's ``set_result``,
which schedules it so), so each iteration runs one step and then polls I/O: publishing proceeds
between steps.

Two classes of step: *urgent* ones (bytes in → snapshot → publish: what a user waits for) and
*background* ones (work the published figures do not depend on, such as a station's periodic
receiver-bias fit, see ``StationPipeline.settle``). A background step gets the lane only when no
urgent step waits, so a burst of twenty stations publishes twenty summaries before any of them
refits. Within each class waiters are served first come, first served; a single station never
waits. A station runs its own steps in order (its next urgent step waits for its own background
step), so background work is delayed, never skipped or reordered.
"""

from __future__ import annotations

import asyncio
from collections import deque

__all__ = ["StepLane"]


class StepLane:
    """``await lane.turn()`` before a step, ``lane.done()`` after it (always, e.g. ``finally``);
    ``await lane.turn(background=True)`` for a step that may wait for every urgent one."""

    __slots__ = ("_background", "_busy", "_urgent")

    def __init__(self) -> None:
        self._busy = False
        self._urgent: deque[asyncio.Future[None]] = deque()
        self._background: deque[asyncio.Future[None]] = deque()

    @property
    def waiting(self) -> int:
        """Steps waiting for their turn (both classes)."""
        return sum(not f.done() for f in self._urgent) + sum(not f.done() for f in self._background)

    async def turn(self, *, background: bool = False) -> None:
        """Return when it is this step's turn (at once when the lane is free)."""
        if not self._busy:  # a free lane has no live waiter (each is handed it on release)
            self._busy = True
            return
        fut: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        (self._background if background else self._urgent).append(fut)
        try:
            await fut
        except asyncio.CancelledError:
            if fut.done() and not fut.cancelled():  # handed the lane, then cancelled: pass it on
                self.done()
            raise

    def done(self) -> None:
        """The step ended: the lane goes to the next waiter in the next loop iteration."""
        urgent = self._urgent
        while urgent:
            fut = urgent.popleft()
            if not fut.done():  # skip waiters cancelled meanwhile
                # Handed now, it resumes in the next iteration all the same (``set_result``
                # schedules its task with ``call_soon``), after that iteration's poll of I/O; the
                # first live urgent waiter is whom ``_hand_on`` would pick then too (later ones
                # queue behind it; one cancelled meanwhile passes the lane on in ``turn``). Saves
                # a callback and a whole loop iteration per step of a burst.
                fut.set_result(None)  # the lane stays busy: it is theirs now
                return
        # No urgent step waits: one may still come before the next iteration (an ingest task
        # woken in this one) and would go before any background waiter, so decide then.
        asyncio.get_running_loop().call_soon(self._hand_on)

    def _hand_on(self) -> None:
        for waiters in (self._urgent, self._background):
            while waiters:
                fut = waiters.popleft()
                if not fut.done():  # skip waiters cancelled meanwhile
                    fut.set_result(None)  # the lane stays busy: it is theirs now
                    return
        self._busy = False
