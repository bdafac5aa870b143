"""One estimate step per event-loop turn, so outputs keep moving while many stations compute.

Receivers align their epochs to the GPS second, so every station's bytes arrive together and every
estimate task becomes ready in the same loop iteration. asyncio runs all ready callbacks before it
polls sockets again, so without a lane the 20 steps run back to back and the MQTT publisher, its
socket writes and the broker's PUBACKs wait for the whole burst: the first station's summary is
acknowledged only after the last station's estimation. With the lane, a step takes its turn and
hands the lane on in the *next* loop iteration (``call_soon``), so each iteration runs one step
and then polls I/O: publishing proceeds between steps. Waiters are served first come, first
served; a single station never waits.
"""

from __future__ import annotations

import asyncio
from collections import deque

__all__ = ["StepLane"]


class StepLane:
    """``await lane.turn()`` before a step, ``lane.done()`` after it (always, e.g. ``finally``)."""

    __slots__ = ("_busy", "_waiters")

    def __init__(self) -> None:
        self._busy = False
        self._waiters: deque[asyncio.Future[None]] = deque()

    @property
    def waiting(self) -> int:
        """Steps waiting for their turn."""
        return sum(not f.done() for f in self._waiters)

    async def turn(self) -> None:
        """Return when it is this step's turn (at once when the lane is free)."""
        if not self._busy and not self._waiters:
            self._busy = True
            return
        fut: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        self._waiters.append(fut)
        try:
            await fut
        except asyncio.CancelledError:
            if fut.done() and not fut.cancelled():  # handed the lane, then cancelled: pass it on
                self.done()
            raise

    def done(self) -> None:
        """The step ended: the lane goes to the next waiter in the next loop iteration."""
        asyncio.get_running_loop().call_soon(self._hand_on)

    def _hand_on(self) -> None:
        while self._waiters:
            fut = self._waiters.popleft()
            if not fut.done():  # skip waiters cancelled meanwhile
                fut.set_result(None)  # the lane stays busy: it is theirs now
                return
        self._busy = False
