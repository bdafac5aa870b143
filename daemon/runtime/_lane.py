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

The *gate* (``[runtime] ack_priority_ms``): while the MQTT publisher awaits the acknowledgements
of what it sent (``MqttPublisher.awaiting_acks``), background steps wait too, each for
``hold_s`` at most (and after a hold ran out, none until the publisher has caught up), and
``open()`` (the publisher's ``on_acked``) lets them go. On a machine whose
cores the broker shares, a burst's deferred work would otherwise keep the CPU while the broker
waits for one, and the PUBACKs of the summaries just sent would be read only after it (a trace
of a worker's bursts, 2026-12-04: ~1.1 ms of settles before the last PUBACK at the median; none
with the gate). Urgent steps never wait for it.
"""

from __future__ import annotations

import asyncio
from collections import deque
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["StepLane"]


def _first_live(waiters: deque[asyncio.Future[bool]]) -> asyncio.Future[bool] | None:
    """Take the first waiter not cancelled meanwhile off ``waiters`` (None: there is none)."""
    while waiters:
        fut = waiters.popleft()
        if not fut.done():
            return fut
    return None


class StepLane:
    """``await lane.turn()`` before a step, ``lane.done()`` after it (always, e.g. ``finally``);
    ``await lane.turn(background=True)`` for a step that may wait for every urgent one, and
    ``await lane.done_then_turn(background=True)`` for one that follows the step just done.

    How the lane is handed on: the decision "who is next" belongs to the next loop iteration (a
    step may still come to wait in this one, and an urgent one would go first). ``done()`` takes
    it at once only where the next iteration cannot decide otherwise, and hands the lane straight
    to the waiter (``set_result``: its task resumes in the next iteration, after that iteration's
    poll of I/O, at the place in it where the decision would have been taken): to the first
    urgent waiter (later ones queue behind it), else to the first background waiter, which on
    resuming looks again for an urgent waiter come meanwhile and, finding one, hands the lane on
    to it and waits again at the head of its class. Only with nobody waiting is the decision
    left to a callback in the next iteration (:meth:`_hand_on`), which frees the lane when still
    nobody waits. Each direct hand-over saves that callback and a whole loop iteration."""

    __slots__ = ("_background", "_busy", "_deciding", "_gate_timer", "_held_since", "_loop",
                 "_spent", "_urgent", "gate", "hold_s")  # fmt: skip

    def __init__(self, gate: Callable[[], bool] | None = None, hold_s: float = 0.0) -> None:
        """``gate``: while it returns True (the publisher awaits acknowledgements), background
        steps wait, each for ``hold_s`` at most (``open()`` when it turns False)."""
        self.gate = gate
        self.hold_s = hold_s
        #: When the gate first held back the background step to come (None: it did not).
        self._held_since: float | None = None
        self._gate_timer: asyncio.TimerHandle | None = None
        #: A hold ran out since the gate last opened by itself (it holds nothing until then).
        self._spent = False
        self._busy = False
        #: done() left the choice of the next step to a _hand_on callback still to come.
        self._deciding = False
        #: The event loop, taken at first use (asyncio.get_running_loop() checks the process id
        #: with a getpid() system call each time): a lane serves one loop, as asyncio's own
        #: primitives do.
        self._loop: asyncio.AbstractEventLoop | None = None
        # A waiter's result: True when done() handed it the lane (a background waiter then looks
        # for an urgent one come meanwhile), False when _hand_on did (decided in its iteration).
        self._urgent: deque[asyncio.Future[bool]] = deque()
        self._background: deque[asyncio.Future[bool]] = deque()

    @property
    def waiting(self) -> int:
        """Steps waiting for their turn (both classes)."""
        return sum(not f.done() for f in self._urgent) + sum(not f.done() for f in self._background)

    @property
    def urgent_waiting(self) -> bool:
        """An urgent step waits for its turn (the burst tick runs after the last one)."""
        return any(not f.done() for f in self._urgent)

    async def turn(self, *, background: bool = False) -> None:
        """Return when it is this step's turn (at once when the lane is free)."""
        if not self._busy and not (background and self._gated()):
            # (a free lane has no live waiter but background ones the gate holds)
            self._busy = True
            if background:
                self._end_hold()
            return
        fut: asyncio.Future[bool] = (self._loop or self._bind()).create_future()
        (self._background if background else self._urgent).append(fut)
        await self._wait(fut, background)

    def _bind(self) -> asyncio.AbstractEventLoop:
        self._loop = loop = asyncio.get_running_loop()
        return loop

    def claim(self, fut: asyncio.Future[bool]) -> None:
        """An urgent turn asked for from a callback on behalf of a task sleeping on ``fut`` (a
        station whose bytes the I/O callback just queued): ``fut`` completes when the turn is the
        task's, so the task wakes up once, holding the lane, instead of once for its bytes and
        again for its turn. It is then the task's to ``done()``; a task cancelled after ``fut``
        completed passes the lane on with ``done()``.

        Served as a ``turn()`` from the task would be, urgent waiters first come first served,
        only asked for one loop iteration sooner: the lane is taken at once when free, and also
        when ``done()`` left the choice to the next iteration and no urgent step waits (that
        choice would have been this step: the task resumes in the next iteration either way,
        after that iteration's poll of I/O, never in the iteration of the step before)."""
        if not self._busy:
            self._busy = True
            fut.set_result(True)
            return
        urgent = self._urgent
        if self._deciding:
            while urgent and urgent[0].done():
                urgent.popleft()
            if not urgent:
                self._deciding = False  # (the pending _hand_on stands down)
                fut.set_result(True)
                return
        urgent.append(fut)

    async def done_then_turn(self, *, background: bool = False) -> None:
        """``done()``, then ``await turn(background=...)``, in the same order of turns; but when
        no other step waits, the lane comes back one loop iteration sooner (handed straight to
        this waiter by ``done()``)."""
        fut: asyncio.Future[bool] = (self._loop or self._bind()).create_future()
        (self._background if background else self._urgent).append(fut)
        self.done()
        await self._wait(fut, background)

    async def _wait(self, fut: asyncio.Future[bool], background: bool) -> None:
        while True:
            try:
                if fut.done():  # handed by this step's own done(): its turn is in the next
                    await asyncio.sleep(0)  # iteration all the same (at that same place in it)
                    direct = fut.result()
                else:
                    direct = await fut
            except asyncio.CancelledError:
                # handed the lane, then cancelled: pass it on
                if fut.done() and not fut.cancelled():
                    self.done()
                raise
            if not (direct and background):
                return
            urgent = _first_live(self._urgent)
            if urgent is None:
                return
            # An urgent step came to wait between done() and now, where _hand_on would have
            # chosen it: it goes first, and this step waits again at the head of its class.
            urgent.set_result(False)
            fut = (self._loop or self._bind()).create_future()
            self._background.appendleft(fut)

    def _gated(self) -> bool:
        """The gate holds background steps back now: for ``hold_s`` at most from the first time
        it held this one (a timer then opens the lane), and not again once a hold ran out until
        the gate has opened by itself (the publisher awaits nothing): with a distant broker, or
        at high rates, acknowledgements are always awaited, and background work then never
        waits for them more than once."""
        gate = self.gate
        if gate is None:
            return False
        if not gate():
            self._spent = False
            self._end_hold()  # (a hold whose waiters left meanwhile)
            return False
        if self._spent:
            return False
        loop = self._loop or self._bind()
        now = loop.time()
        if self._held_since is None:
            self._held_since = now
            self._gate_timer = loop.call_at(now + self.hold_s, self.open)
            return True
        if now - self._held_since < self.hold_s:
            return True
        self._spent = True
        self._end_hold()
        return False

    def _end_hold(self) -> None:
        if self._held_since is not None:
            self._held_since = None
            if self._gate_timer is not None:
                self._gate_timer.cancel()
                self._gate_timer = None

    def _next_background(self) -> asyncio.Future[bool] | None:
        if not self._background or self._gated():
            return None
        fut = _first_live(self._background)
        if fut is not None:
            self._end_hold()
        return fut

    def open(self) -> None:
        """The gate may have opened (an acknowledgement came, or its time ran out): a free
        lane goes to the first background waiter."""
        if self._spent and self.gate is not None and not self.gate():
            self._spent = False  # (opened by itself: it may hold the next one)
        if self._busy or self._deciding:
            return  # (whoever holds it hands it on)
        fut = self._next_background()
        if fut is not None:
            self._busy = True
            fut.set_result(True)

    def done(self) -> None:
        """The step ended: the lane goes to the next waiter in the next loop iteration."""
        fut = _first_live(self._urgent) or self._next_background()
        if fut is not None:
            fut.set_result(True)  # the lane stays busy: it is theirs now
        else:  # nobody waits yet: decide in the next iteration
            self._deciding = True
            (self._loop or self._bind()).call_soon(self._hand_on)

    def _hand_on(self) -> None:
        if not self._deciding:  # claim() gave the lane to an urgent step meanwhile
            return
        self._deciding = False
        fut = _first_live(self._urgent) or self._next_background()
        if fut is not None:
            fut.set_result(False)  # the lane stays busy: it is theirs now
        else:
            self._busy = False
