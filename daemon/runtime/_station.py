"""One station at run time: an ingest task (source → bounded byte queue) and an estimate task
(byte queue → framer/estimator → outputs), supervised with backoff and stall detection.

Failure policy (STYLE rule 10): :data:`RETRYABLE_ERRORS` — every ``TransportError`` (OS, serial and
protocol failures are translated into it where they enter) and our own stall verdict — leads to
"wait a backoff delay, reconnect". :data:`TOLERATED_DECODE_ERRORS` raised while decoding are counted
and the chunk is skipped.

Pipeline containment ("nothing a source does can crash the process"): one *step* of the estimate
task — feeding one chunk of the station's own bytes through its framer and estimator pipeline and
emitting what that produced (alarms, MQTT) — works on untrusted data, so any ``Exception`` it raises
(e.g. a ``FloatingPointError`` from hostile values; :data:`UNCONTAINED_ERRORS` excepted) is blamed
on that station's data for that step: the step's outputs are dropped, the error is counted
(``statistics().pipeline_errors_total``, exported as ``ionwarden_station_pipeline_errors_total``)
and logged with its traceback at most once per :data:`PIPELINE_LOG_INTERVAL_S` per exception type
(later ones are summarised with a count). After :data:`PIPELINE_RESET_AFTER` failing steps in a
row the station's core is reset (fresh framer and estimator state, counted in
``pipeline_resets_total``), so a poisoned state cannot fail forever. Other stations never notice.
Everything outside the step (queues, transports, the runtime's own bookkeeping) follows rule 10:
unexpected errors propagate, the root TaskGroup fails and systemd restarts the unit.

Queue policy: live sources use ``DROP_OLDEST`` (a slow estimator loses the oldest bytes, counted;
the framer resynchronises); file and stdin sources use ``WAIT`` (nothing lost, reading slows).
"""

# size: ~710 lines: one station's ingest and estimate tasks with their containment
# and retry policy (module docstring); the records are in _station_records.py.
from __future__ import annotations

import asyncio
import logging
from typing import TYPE_CHECKING

from ionwarden.daemon.errors import ParseError, TransportError
from ionwarden.daemon.estimator import FixStatus, StationSnapshot
from ionwarden.daemon.ingest import (
    FileSource,
    SourceRejectedError,
    TcpListenTransport,
    open_transport,
)

from ._backoff import backoff_delays
from ._core import FramingCore
from ._pacer import ReplayPacer
from ._queues import BoundedQueue, Overflow
from ._stall import StallDetector, StallKind, StallLimits, StallTimer
from ._station_records import (
    Settles,
    SourceEvent,
    StationConfig,
    StationState,
    StationStatistics,
    new_station_statistics,
)

if TYPE_CHECKING:
    import random
    from collections.abc import Awaitable, Callable, Iterator, Sequence

    from ionwarden.daemon.estimator import StationEstimator
    from ionwarden.daemon.ingest import SourceSpec, Transport
    from ionwarden.parsers import ObsEpoch

    from ._burst import BurstTick
    from ._core import StationCore
    from ._lane import StepLane

__all__ = [
    "PIPELINE_LOG_INTERVAL_S",
    "PIPELINE_RESET_AFTER",
    "RETRYABLE_ERRORS",
    "TOLERATED_DECODE_ERRORS",
    "UNCONTAINED_ERRORS",
    "StationRunner",
]

log = logging.getLogger("ionwarden.daemon.runtime.station")

#: Errors after which a source is reopened after a backoff delay (see the module docstring).
RETRYABLE_ERRORS: tuple[type[Exception], ...] = (TransportError,)
#: Errors a decoder may raise on hostile bytes: counted, the chunk skipped, the station goes on.
TOLERATED_DECODE_ERRORS: tuple[type[Exception], ...] = (ParseError,)
#: Errors that are never contained in a pipeline step: the process itself is in trouble.
UNCONTAINED_ERRORS: tuple[type[Exception], ...] = (MemoryError,)
#: Consecutive failing pipeline steps after which the station's core is reset.
PIPELINE_RESET_AFTER = 3
#: A given exception type is logged (with traceback) at most once per this many seconds per station.
PIPELINE_LOG_INTERVAL_S = 60.0


#: A paced replay reads this many bytes at a time (an MSM4 epoch of ~40 satellites is ~1.5 kB)...
PACED_READ_BYTES = 1024
#: ...and queues at most this many chunks ahead of the estimator.
PACED_QUEUE_CHUNKS = 4


class _StalledError(TransportError):
    def __init__(self, kind: StallKind, quiet_s: float):
        super().__init__(f"stalled: {kind.value} for {quiet_s:.0f} s")
        self.kind = kind


_INF = float("inf")


_BREAK = object()  # the connection ended: drop the partial frame, more may follow
_END = object()  # the source ended for good
_SLACK = object()  # (from _next_item) the core's slack work is due


class StationRunner:
    """Run with ``ingest_loop()`` and ``estimate_loop()`` as two tasks of the root TaskGroup.

    ``lane`` (shared by every station of a daemon) lets one estimate step run per loop iteration,
    so outputs are sent between the steps of stations whose epochs arrived together."""

    def __init__(
        self,
        config: StationConfig,
        core: StationCore,
        *,
        emit: Callable[[object], None],
        opener: Callable[[SourceSpec, str], Awaitable[Transport]] | None = None,
        rng: random.Random | None = None,
        produces_epochs: bool = True,
        on_finished: Callable[[], None] | None = None,
        on_latency: Callable[[str, float], None] | None = None,
        lane: StepLane | None = None,
        also_settle: Settles | None = None,
        burst: BurstTick | None = None,
    ):
        self._on_latency = on_latency
        self._lane = lane
        #: More deferred work of the station's outputs (its alarms' evaluation of the last
        #: snapshot and their baseline learning), settled in the same background step as the
        #: core's.
        self._also = also_settle
        self._on_finished = on_finished
        self.config = config
        self.core = core
        self._emit = emit
        self._opener = opener or (lambda spec, pw: open_transport(spec, password=pw))
        self._rng = rng
        policy = Overflow.WAIT if config.finite else Overflow.DROP_OLDEST
        qsize, self._read_size = config.queue_size, config.read_size
        if isinstance(config.source, FileSource) and config.source.speed > 0:
            # Paced replay: pacing happens per chunk, so chunks must hold about one epoch, and
            # reading ahead only costs memory.
            qsize, self._read_size = (
                min(qsize, PACED_QUEUE_CHUNKS),
                min(self._read_size, PACED_READ_BYTES),
            )
        # Items: (monotonic arrival time, bytes) or one of the _BREAK/_END markers.
        self.queue: BoundedQueue[tuple[float, bytes] | object] = BoundedQueue(
            qsize, policy, stage="estimator", station=config.name
        )
        limits = config.stall
        if not produces_epochs:
            limits = StallLimits(
                no_data_s=limits.no_data_s, no_frame_s=limits.no_frame_s, no_epoch_s=float("inf")
            )
        if isinstance(config.source, FileSource):  # replay pacing is ours: never a "stall"
            limits = StallLimits(
                no_data_s=float("inf"), no_frame_s=float("inf"), no_epoch_s=float("inf")
            )
        self._loop = asyncio.get_running_loop()
        now = self._loop.time()
        self.started_monotonic_s = now
        self._detector = StallDetector(limits, now)
        self._pacer = (
            ReplayPacer(config.source.speed) if isinstance(config.source, FileSource) else None
        )
        self.started = asyncio.Event()  # set after the first open attempt (success or not)
        self.finished = asyncio.Event()
        self._state = StationState.STARTING
        self._detail = ""
        self._connected = False
        self._bytes = self._connects = self._stalls = 0
        self._epochs = self._fixes = self._decode_errors = 0
        self._last_data: float | None = None
        self._last_epoch: float | None = None
        self._latest: StationSnapshot | None = None
        #: When the bytes that completed the snapshot being emitted arrived (monotonic; None when
        #: not from a read): the emit callback passes it on with the summary (frame → PUBACK).
        self.epoch_arrived_s: float | None = None
        self._latest_fix: FixStatus | None = None
        self._progress = now
        self._pipeline_errors = self._pipeline_resets = self._failing_steps = 0
        self._log_limit: dict[str, tuple[float, int]] = {}  # key -> (last logged, suppressed)
        #: The end of the connection whose chunks the transport pushes (None: it is read).
        self._ended: asyncio.Future[bool] | None = None
        #: What the estimate task sleeps on while its queue is empty (with a lane; else None),
        #: and the chunk taken for it with its claim of the lane (see _wake_idle).
        self._idle: asyncio.Future[bool] | None = None
        self._in_hand: tuple[float, bytes] | None = None
        #: The core's slack work (``StationCore.slack_after_s``) runs in a background turn of its
        #: own, midway to the next epoch, when the station has a lane and is not a paced replay
        #: (whose pacing sleeps in the estimate task); otherwise right after the deferred work.
        self._midway = lane is not None and self._pacer is None
        #: The daemon's burst tick (``_burst``): with a lane, for a live source whose core can
        #: hold its epochs (a paced replay's pacing needs each snapshot in its own step).
        self._burst = (
            burst
            if burst is not None
            and self._midway
            and isinstance(core, FramingCore)
            and core.hold_epochs()
            else None
        )
        #: When the pending slack work is due (loop time; None: none pending), and whether the
        #: timer found the estimate task asleep and woke it for it.
        self._slack_at: float | None = None
        self._slack_now = False

    # -- state ------------------------------------------------------------------------------------
    @property
    def name(self) -> str:
        return self.config.name

    @property
    def state(self) -> StationState:
        return self._state

    def _set_state(self, state: StationState, detail: str = "") -> None:
        if state is self._state and detail == self._detail:
            return
        self._state, self._detail = state, detail
        self._emit(
            SourceEvent(
                station=self.name, state=state, detail=detail, monotonic_s=self._loop.time()
            )
        )

    def statistics(self) -> StationStatistics:
        return new_station_statistics(
            station=self.name,
            state=self._state,
            detail=self._detail,
            connected=self._connected,
            bytes_total=self._bytes,
            connects_total=self._connects,
            reconnects_total=self._connects - 1 if self._connects else 0,
            stalls_total=self._stalls,
            epochs_total=self._epochs,
            fixes_total=self._fixes,
            decode_errors_total=self._decode_errors,
            decoder=self.core.counts(),
            queue=self.queue.statistics(),
            last_data_monotonic_s=self._last_data,
            last_epoch_monotonic_s=self._last_epoch,
            latest=self._latest,
            latest_fix=self._latest_fix,
            progress_monotonic_s=self._progress,
            pipeline_errors_total=self._pipeline_errors,
            pipeline_resets_total=self._pipeline_resets,
        )

    def is_stuck(self, now: float, limit_s: float) -> bool:
        """True when input waits but the estimate task completed nothing for ``limit_s``."""
        return not self.queue.empty() and now - self._progress > limit_s

    # -- ingest -----------------------------------------------------------------------------------
    async def ingest_loop(self) -> None:
        """Open, read, and on any retryable failure wait and reopen; return when a finite source ends."""
        cfg = self.config
        delays = backoff_delays(
            initial_s=cfg.backoff_initial_s, cap_s=cfg.backoff_cap_s, rng=self._rng
        )
        try:
            while True:
                self._set_state(StationState.CONNECTING)
                frames_before = self.core.frames_total()
                try:
                    transport = await self._opener(cfg.source, cfg.password)
                except RETRYABLE_ERRORS as exc:
                    self.started.set()
                    await self._retry(exc, delays)
                    continue
                self._connects += 1
                self.started.set()
                ended = False
                try:
                    ended = await self._pump(transport)
                except RETRYABLE_ERRORS as exc:
                    failure: Exception | None = exc
                else:
                    failure = None
                finally:
                    self._connected = False
                    await transport.aclose()
                if ended and cfg.finite:
                    await self.queue.put(_END)
                    self._wake_idle()
                    self._set_state(StationState.FINISHED, "end of stream")
                    log.info("%s: source ended", self.name)
                    return
                await self.queue.put(_BREAK)
                self._wake_idle()
                if self.core.frames_total() > frames_before:  # it worked for a while
                    delays = backoff_delays(
                        initial_s=cfg.backoff_initial_s, cap_s=cfg.backoff_cap_s, rng=self._rng
                    )
                await self._retry(failure or TransportError("source closed the stream"), delays)
        finally:
            self._connected = False
            self.started.set()

    async def _retry(self, exc: Exception, delays: Iterator[float]) -> None:
        delay = next(delays)
        if isinstance(exc, SourceRejectedError):
            self._set_state(StationState.REFUSED, exc.status)
            log.error("%s: %s; retrying in %.1f s", self.name, exc, delay)
        elif isinstance(exc, _StalledError):
            self._stalls += 1
            self._set_state(StationState.STALLED, exc.kind.value)
            log.warning("%s: %s; reconnecting in %.1f s", self.name, exc, delay)
        else:
            self._set_state(StationState.RETRY_WAIT, str(exc))
            log.warning("%s: %s; reconnecting in %.1f s", self.name, exc, delay)
        await asyncio.sleep(delay)

    async def _pump(self, transport: Transport) -> bool:
        """Read until EOF (return True) or a stall / transport error (raise)."""
        det = self._detector
        loop = self._loop
        if isinstance(transport, TcpListenTransport):  # stall timers start once a receiver is in
            self._set_state(StationState.CONNECTING, "listening")
            await transport.wait_peer()
        det.reset(loop.time())
        self._connected = True
        self._set_state(StationState.STREAMING)
        log.info("%s: source open", self.name)
        task = asyncio.current_task()
        assert task is not None
        watch = StallTimer(det, loop, task)
        read, size, queue = transport.read, self._read_size, self.queue
        waits = queue.policy is Overflow.WAIT  # else the put never waits: no coroutine for it
        # A transport that can push its chunks (TCP) does, once a read has emptied its buffer:
        # then no task wakes up per chunk (_pushed). Not with WAIT: a push cannot wait.
        push: Callable[[Callable[[bytes], None]], asyncio.Future[bool] | None] | None = (
            None if waits else getattr(transport, "start_push", None)
        )
        try:
            while True:
                deadline = det.deadline()
                try:
                    if deadline == _INF:
                        data = await read(size)
                    else:
                        watch.arm(deadline)
                        try:
                            data = await read(size)
                        except BaseException as exc:
                            watch.reading = False
                            if not (watch.fired and watch.took(exc)):
                                raise
                            data = None  # the stall limit interrupted the read: check it
                        else:
                            watch.reading = False
                            if watch.fired:
                                watch.took(None)
                except TimeoutError:
                    data = None
                now = loop.time()
                if data is None or data:
                    kind = det.check(now)
                    if kind is not None:
                        raise self._stalled(kind, now)
                if data is None:
                    continue
                if not data:
                    return True
                self._bytes += len(data)
                self._last_data = now
                det.saw_data(now)
                if waits:
                    await queue.put((now, data))
                    self._wake_idle()
                    det.saw_data(loop.time())  # time spent waiting on our queue is not the source's
                    continue
                queue.put_nowait((now, data))
                self._wake_idle()
                if push is not None and len(data) < size:  # nothing left buffered: switch
                    self._ended = push(self._received)
                    if self._ended is not None:
                        return await self._pushed(self._ended, watch)
        finally:
            self._ended = None
            watch.close()

    def _stalled(self, kind: StallKind, now: float) -> _StalledError:
        det = self._detector
        last = {
            StallKind.NO_DATA: det.last_data,
            StallKind.NO_FRAME: det.last_frame,
            StallKind.NO_EPOCH: det.last_epoch,
        }[kind]
        return _StalledError(kind, now - last)

    async def _pushed(self, ended: asyncio.Future[bool], watch: StallTimer) -> bool:
        """The rest of :meth:`_pump` once the transport pushes its chunks (``start_push``): they
        go to :meth:`_received` as they arrive, and this task only waits for the connection's
        end under the same stall limits (one wake-up per connection instead of one per chunk)."""
        if self._detector.deadline() == _INF:
            return await ended
        watch.arm(self._detector.deadline())  # (re-armed by the timer while no stall is in force)
        try:
            return await ended
        except BaseException as exc:
            watch.reading = False
            if not (watch.fired and watch.took(exc)):
                raise
        # The stall limit interrupted the wait (a verdict that stands: only _received moves the
        # detector, and it stops at the end, which the timer's cancellation is).
        now = self._loop.time()
        kind = self._detector.check(now)
        assert kind is not None
        raise self._stalled(kind, now)

    def _received(self, data: bytes) -> None:
        """A chunk pushed by the transport (in its I/O callback): what :meth:`_pump` does with a
        chunk it read, errors included, which end the connection as a read's would."""
        ended = self._ended
        if ended is None or ended.done():  # the end is decided: the rest goes with the connection
            return
        try:
            now = self._loop.time()
            det = self._detector
            kind = det.check(now)
            if kind is not None:
                ended.set_exception(self._stalled(kind, now))
                return
            self._bytes += len(data)
            self._last_data = now
            det.saw_data(now)
            size = self._read_size
            if len(data) <= size:
                self.queue.put_nowait((now, data))
            else:  # in read-sized chunks, as reads would have handed them out
                for i in range(0, len(data), size):
                    self.queue.put_nowait((now, data[i : i + size]))
            self._wake_idle(claim=True)
        except Exception as exc:  # raised in the ingest task (rule 10), as a read's would be
            ended.set_exception(exc)

    # -- estimate ---------------------------------------------------------------------------------
    async def estimate_loop(self) -> None:
        """Decode queued bytes and emit outputs; return after a finite source's end."""
        loop = self._loop
        lane = self._lane
        queue = self.queue
        try:
            while True:
                item: object = None
                if lane is not None and queue.empty():
                    item = await self._next_item(lane)
                    if item is _SLACK:
                        await self._run_slack(lane)
                        continue
                has_turn = item is not None  # a chunk taken with its turn of the lane
                if item is None:
                    item = await queue.get()  # (at once after _next_item: an item is queued)
                if item is _END or item is _BREAK:
                    self._step(None, None)
                    if self._unsettled(slack=True):
                        self._settle(slack=True)
                    if item is _END:
                        return
                else:
                    assert isinstance(item, tuple)
                    arrived, chunk = item
                    if self._pacer is not None:  # a paced replay's bytes "arrive" when released
                        arrived = max(arrived, loop.time())
                    if lane is not None and not has_turn:
                        await lane.turn()
                    try:
                        frames_before, epochs_before = self.core.frames_total(), self._epochs
                        delay = self._step(chunk, arrived)
                        if self._burst is not None:
                            self._burst.stepped(self, arrived, lane.urgent_waiting)  # type: ignore[union-attr]
                        if self.core.frames_total() > frames_before:
                            self._detector.saw_frame(loop.time())
                        unsettled = self._unsettled(slack=not self._midway)
                    except BaseException:
                        if lane is not None:
                            lane.done()
                        raise
                    if unsettled:
                        # The deferred part of the step (receiver-bias fit, messages after the
                        # epoch) after every urgent step waiting: the snapshot just emitted does
                        # not depend on it (StepLane, StationPipeline.settle).
                        if lane is not None:
                            await lane.done_then_turn(background=True)
                        else:
                            await asyncio.sleep(0)  # the outputs go out first
                        try:
                            self._settle(slack=not self._midway)
                        finally:
                            if lane is not None:
                                lane.done()
                    elif lane is not None:
                        lane.done()
                    if self._midway:
                        self._slack_after(arrived, self._epochs != epochs_before)
                    if delay > 0:  # replay pacing is planned idleness, not a stuck pipeline
                        self._progress = loop.time() + delay
                        await asyncio.sleep(delay)
                self._progress = loop.time()
                if lane is None or not queue.empty():
                    # One chunk per turn: a garbage flood never starves others. (With the lane and
                    # nothing queued the turn is given up anyway: the next chunk waits for its
                    # ingest read, then for its turn of the lane.)
                    await asyncio.sleep(0)
        finally:
            self.finished.set()
            if self._on_finished is not None:
                self._on_finished()

    async def _next_item(self, lane: StepLane) -> object:
        """Sleep until an item is queued; return the chunk taken with the lane's turn for it
        (None: the item is in the queue, and no turn was claimed for it), or ``_SLACK`` when the
        core's slack work fell due first (:meth:`_slack_after`).

        A chunk pushed while the task sleeps is taken off the queue at once and claims the lane's
        turn for it (:meth:`_wake_idle`, ``StepLane.claim``), so the task wakes up once, holding
        the chunk and its turn, instead of once to take the chunk and again for its turn: the
        same steps in the same order, the chunk out of the queue while it waits for its turn (as
        when the task took it itself, one iteration later), one wake-up less."""
        fut: asyncio.Future[bool] = self._loop.create_future()
        self._idle = fut
        at = self._slack_at
        timer = None if at is None else self._loop.call_at(at, self._slack_due, fut)
        try:
            await fut
        except asyncio.CancelledError:
            if self._idle is fut:
                self._idle = None
            self._slack_now = False
            if self._in_hand is not None:
                self._in_hand = None
                if fut.done() and not fut.cancelled():
                    lane.done()  # handed the lane, then cancelled: pass it on
            raise
        finally:
            if timer is not None:
                timer.cancel()
        if self._slack_now:
            self._slack_now = False
            return _SLACK
        item, self._in_hand = self._in_hand, None
        return item

    def _slack_due(self, fut: asyncio.Future[bool]) -> None:
        """The slack timer: wake the estimate task for the slack work if it still sleeps in
        :meth:`_next_item` (an item queued first takes precedence: its step settles it)."""
        if self._idle is fut and not fut.done():
            self._idle = None
            self._slack_now = True
            fut.set_result(False)

    def _slack_after(self, arrived: float, epoch: bool) -> None:
        """After a step (``epoch``: it emitted a snapshot): note when the core's slack work is
        due, ``slack_after_s`` after the bytes of the epoch that left it arrived. A step without
        an epoch keeps the time of the work already pending (a serial port's trickle of small
        reads does not postpone it); an epoch's step settled that work and left its own."""
        after = self.core.slack_after_s()
        if after is None:
            self._slack_at = None
        elif epoch or self._slack_at is None:
            self._slack_at = arrived + after

    async def _run_slack(self, lane: StepLane) -> None:
        """The core's slack work, in a background turn: after every urgent step waiting (none
        when another entry, a checkpoint say, did it meanwhile)."""
        self._slack_at = None
        if self.core.slack_after_s() is None:
            return
        await lane.turn(background=True)
        try:
            self._contained(self.core.settle_slack, None)
        finally:
            lane.done()
        self._progress = self._loop.time()

    def _wake_idle(self, *, claim: bool = False) -> None:
        """An item was queued: wake the estimate task if it sleeps in :meth:`_next_item`. With
        ``claim`` (the pushed chunks of one I/O callback, all queued in the same call), the first
        chunk is taken for it and the lane's turn claimed: the task wakes up with its turn."""
        fut = self._idle
        if fut is None:
            return
        self._idle = None
        if fut.done():  # cancelled meanwhile
            return
        if claim and self._lane is not None:
            item = self.queue.get_nowait()
            assert isinstance(item, tuple)  # (only chunks are pushed)
            self._in_hand = item
            self._lane.claim(fut)
        else:
            fut.set_result(False)

    def _step(self, chunk: bytes | None, arrived: float | None) -> float:
        """Feed one chunk (``None``: the stream broke or ended) and emit the outputs, containing
        any failure (module docstring); return the replay pacing delay (s)."""
        if chunk is None:
            return self._contained(self.core.end_stream, None)
        return self._contained(self.core.feed, arrived, chunk)  # (not a closure per chunk)

    # -- the burst tick (``_burst``) ------------------------------------------------------------------
    def core_holding(self) -> bool:
        """The core holds an epoch for the burst tick."""
        return self._burst is not None and self.core.holding()  # type: ignore[attr-defined]

    def take_held(self) -> tuple[StationEstimator, ObsEpoch] | None:
        """The estimator and epoch the core holds, taken for the tick (None: none, or the station
        stopped meanwhile: its pipeline estimates it alone at its next entry, if any)."""
        if self.finished.is_set():
            return None
        pipe = self.core.consumer  # type: ignore[attr-defined]
        epoch = pipe.take_held()
        return None if epoch is None else (pipe.estimator, epoch)

    def tick_done(self, epoch: ObsEpoch, snap: StationSnapshot, arrived: float | None) -> None:
        """The tick's snapshot of the held epoch: routed and emitted as the step's own would
        have been (counted, latency observed from ``arrived``, published)."""
        pipe = self.core.consumer  # type: ignore[attr-defined]
        self._contained(lambda: [pipe.finish_epoch(epoch, snap)], arrived)

    def tick_failed(self, exc: Exception) -> None:
        """The tick failed: counted and logged as a failed step of this station."""
        self._pipeline_failed(exc)

    def _unsettled(self, *, slack: bool = True) -> bool:
        """Deferred work is pending (with ``slack``, the core's slack work counted too)."""
        return (
            self.core.unsettled()
            or (self._also is not None and self._also.unsettled())
            or (slack and self.core.slack_after_s() is not None)
        )

    def _settle(self, *, slack: bool = True) -> None:
        """The deferred part of the last step (``StationCore.settle``: it decodes the frames held
        back, so its decode errors count as such), then that of the outputs (``also_settle``,
        after the outputs the core's settle emits), contained like a step; with ``slack``, then
        the core's slack work (``settle_slack``)."""
        self._contained(self.core.settle, None)
        if self._also is not None and self._also.unsettled():
            self._contained(self._settle_also, None)
        if slack:
            self._slack_at = None
            if self.core.slack_after_s() is not None:
                self._contained(self.core.settle_slack, None)

    def settle_outputs(self) -> None:
        """Do the outputs' deferred work (``also_settle``) now, contained like a step: for the
        daemon, before its status tick reads the alarms and after it cancelled the station
        (whose background turn may never come)."""
        if self._also is not None and self._also.unsettled():
            self._contained(self._settle_also, None)

    def _settle_also(self) -> Sequence[object]:
        assert self._also is not None
        self._also.settle()
        return ()

    def _contained(
        self, work: Callable[..., Sequence[object]], arrived: float | None, *args: bytes
    ) -> float:
        """Run ``work(*args)`` (decode and estimate) and emit its outputs, containing any
        failure."""
        try:
            try:
                outputs = work(*args)
            except TOLERATED_DECODE_ERRORS as exc:
                self._decode_errors += 1
                self._log_limited(
                    "decode", logging.WARNING, "%s: decode error, chunk skipped: %s", exc
                )
                outputs = ()
            # (nothing to count or emit in an empty list, as most settle steps return; anything
            # else, however empty, goes through _handle's check as before)
            delay = (
                self._handle(outputs, arrived)
                if outputs or not isinstance(outputs, (list, tuple))
                else 0.0
            )
        except UNCONTAINED_ERRORS:
            raise
        except Exception as exc:
            self._pipeline_failed(exc)
            return 0.0
        self._failing_steps = 0
        return delay

    def _pipeline_failed(self, exc: Exception) -> None:
        self._pipeline_errors += 1
        self._failing_steps += 1
        self._log_limited(
            type(exc).__name__,
            logging.ERROR,
            "%s: pipeline step failed, its outputs dropped: %r",
            exc,
            exc_info=exc,
        )
        if self._failing_steps >= PIPELINE_RESET_AFTER:
            self._failing_steps = 0
            self._pipeline_resets += 1
            self._log_limited(
                "reset",
                logging.ERROR,
                "%s: pipeline failed %d steps in a row: resetting the station's framer and "
                "estimator state (reset %d)",
                PIPELINE_RESET_AFTER,
                self._pipeline_resets,
            )
            self.core.reset()

    def _log_limited(
        self, key: str, level: int, msg: str, *args: object, exc_info: Exception | None = None
    ) -> None:
        """Log ``msg % (station, *args)`` at most once per PIPELINE_LOG_INTERVAL_S per ``key``."""
        now = self._loop.time()
        seen = self._log_limit.get(key)
        if seen is not None and now - seen[0] < PIPELINE_LOG_INTERVAL_S:
            self._log_limit[key] = (seen[0], seen[1] + 1)
            return
        self._log_limit[key] = (now, 0)
        if seen is not None and seen[1]:
            msg += f" ({seen[1]} more like it in the last {now - seen[0]:.0f} s)"
        log.log(level, msg, self.name, *args, exc_info=exc_info)

    def _handle(self, outputs: object, arrived: float | None = None) -> float:
        """Count and emit outputs; return the replay pacing delay (s) they call for."""
        now = self._loop.time()
        delay = 0.0
        assert isinstance(outputs, (list, tuple))
        for out in outputs:
            if isinstance(out, StationSnapshot):
                self._epochs += 1
                self._last_epoch = now
                self._latest = out
                self.epoch_arrived_s = arrived
                self._detector.saw_epoch(now)
                if self._pacer is not None:
                    delay = max(delay, self._pacer.delay(out.time.total_s, now))
                if self._on_latency is not None and arrived is not None:
                    # bytes that completed the epoch read → snapshot out (queue wait + decode)
                    self._on_latency(self.name, now - arrived)
            elif isinstance(out, FixStatus):
                self._fixes += 1
                self._latest_fix = out
            self._emit(out)
        return delay
