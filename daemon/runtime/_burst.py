"""The daemon's burst tick: each station's epoch of a burst estimated together, once every urgent
step waiting has decoded its bytes (DEVELOPERS.md, "What would reach the line").

Receivers align their epochs to the GPS second, so every station's bytes arrive together and the
``StepLane`` runs one urgent step per station. With a burst tick, a station's step frames and
decodes its chunk and its pipeline holds the chunk's last epoch (``StationPipeline.hold``); the
step after which no urgent step waits estimates every held epoch as one ``TickBatch`` tick and
emits each station's snapshot through its own runner (count, latency, publish), in the order the
stations stepped, the publisher corked meanwhile so that those summaries leave the socket
together (one wake-up of the broker instead of one each). The snapshots are those of estimating each station alone, bit for bit
(tests/test_estimator_tick.py, tests/test_runtime_burst.py); what changes is when each comes
out: the first stations of a burst wait for the others' decoding, the last ones come sooner, as
the tick costs less than the stations' estimates one by one.

A held epoch is never lost: each later entry of its pipeline (its next chunk, its settle, a
checkpoint) estimates it alone first, and the background steps that run them come only once no
urgent step waits, after the tick. A station stopped meanwhile is left out. A station whose
estimate fails in the tick counts and logs a failed step, as in its own step; the others keep
their snapshots (``TickBatch.run``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ionwarden.daemon.estimator._tick import TickBatch

if TYPE_CHECKING:
    from collections.abc import Callable

    from ._station import StationRunner

__all__ = ["BurstTick"]


class BurstTick:
    """The held epochs of the steps since the last tick, and the ``TickBatch`` that runs it."""

    __slots__ = ("_cork", "_pending", "batch", "most")

    def __init__(self, most: int, cork: Callable[[bool], None] | None = None) -> None:
        """``most``: stations per tick at most (the tick runs as soon as that many hold one);
        ``cork``: holds the publisher's writes (True) and releases them (False:
        ``MqttPublisher.cork``), around the emission of a tick's snapshots: they leave the
        socket together."""
        self.most = most
        self._cork = cork
        self.batch = TickBatch()
        #: (runner, when its epoch's bytes arrived) of the stations holding an epoch.
        self._pending: list[tuple[StationRunner, float | None]] = []

    def stepped(self, runner: StationRunner, arrived: float | None, urgent_waiting: bool) -> None:
        """After ``runner``'s urgent step: note its held epoch, and run the tick when no other
        urgent step waits (``urgent_waiting``: ``StepLane.urgent_waiting``)."""
        if runner.core_holding():
            self._pending.append((runner, arrived))
        if self._pending and (not urgent_waiting or len(self._pending) >= self.most):
            self.run()

    def run(self) -> None:
        """Estimate every held epoch as one tick and emit each station's snapshot."""
        pending, self._pending = self._pending, []
        items = []
        owners = []
        for runner, arrived in pending:
            held = runner.take_held()
            if held is not None:
                items.append(held)
                owners.append((runner, arrived))
        if not items:
            return
        results = self.batch.run(items)  # (a station's failure in its place)
        cork = self._cork if len(items) > 1 else None
        if cork is not None:
            cork(True)
        try:
            for (runner, arrived), (_, epoch), res in zip(owners, items, results, strict=True):
                if isinstance(res, Exception):
                    runner.tick_failed(res)
                else:
                    runner.tick_done(epoch, res, arrived)
        finally:
            if cork is not None:
                cork(False)
