"""The runtime machinery around a station's step (bounded queue, step lane, the ingest's stall
timing) against verbatim copies of the previous implementations kept here as oracles: the leaner
machinery must take the same decisions (items, drops, counters, step order, stall verdicts,
reconnects, log lines) on the same inputs."""

from __future__ import annotations

import asyncio
import logging
import os
import random
import socket
import struct
import tty
from collections import deque
from dataclasses import dataclass
from typing import Any, Generic, TypeVar

import pytest

from ionwarden.daemon.errors import ParseError, TransportError
from ionwarden.daemon.ingest import (
    SerialSource,
    SerialTransport,
    SourceUnavailableError,
    StdinSource,
    TcpListenTransport,
    TcpSource,
    TcpTransport,
    map_transport_errors,
)
from ionwarden.daemon.ingest import _serial as serial_mod
from ionwarden.daemon.runtime import (
    BoundedQueue,
    Overflow,
    QueueStatistics,
    SourceEvent,
    StallLimits,
    StationConfig,
    StationRunner,
    StationState,
    StepLane,
    run_virtual,
)
from ionwarden.daemon.runtime import _station as station_mod
from ionwarden.daemon.runtime._stall import StallKind

from ._runtime_support import StandInCore, rtcm_frame, run_pure_virtual

T = TypeVar("T")


# -- oracle: the previous BoundedQueue (verbatim, daemon/runtime/_queues.py) -------------------------
class OldBoundedQueue(Generic[T]):
    """An ``asyncio.Queue`` with an explicit bound, an overflow policy and counters."""

    def __init__(self, maxsize: int, policy: Overflow, *, stage: str, station: str = ""):
        if maxsize < 1:
            raise ValueError(f"queue {stage}[{station}]: maxsize must be >= 1, got {maxsize}")
        self._q: asyncio.Queue[T] = asyncio.Queue(maxsize)
        self.policy = policy
        self._stage = stage
        self._station = station
        self._peak = 0
        self._put = 0
        self._dropped = 0

    def put_nowait(self, item: T) -> bool:
        """Enqueue without waiting; return False when the item (or the oldest one) was dropped.

        With the ``WAIT`` policy a full queue raises ``asyncio.QueueFull`` (use :meth:`put`).
        """
        self._put += 1
        kept = True
        if self._q.full():
            if self.policy is Overflow.WAIT:
                self._put -= 1
                raise asyncio.QueueFull
            self._dropped += 1
            kept = False
            if self.policy is Overflow.DROP_NEWEST:
                return False
            self._q.get_nowait()
            self._q.task_done()
        self._q.put_nowait(item)
        self._peak = max(self._peak, self._q.qsize())
        return kept

    async def put(self, item: T) -> bool:
        """Enqueue; waits only with the ``WAIT`` policy. Returns as :meth:`put_nowait`."""
        if self.policy is Overflow.WAIT:
            await self._q.put(item)
            self._put += 1
            self._peak = max(self._peak, self._q.qsize())
            return True
        return self.put_nowait(item)

    async def get(self) -> T:
        item = await self._q.get()
        self._q.task_done()
        return item

    def get_nowait(self) -> T:
        item = self._q.get_nowait()
        self._q.task_done()
        return item

    def qsize(self) -> int:
        return self._q.qsize()

    def empty(self) -> bool:
        return self._q.empty()

    def statistics(self) -> QueueStatistics:
        return QueueStatistics(
            stage=self._stage,
            station=self._station,
            policy=self.policy.value,
            capacity=self._q.maxsize,
            depth=self._q.qsize(),
            peak=self._peak,
            put_total=self._put,
            dropped_total=self._dropped,
        )


# -- oracle: the previous StepLane (verbatim, daemon/runtime/_lane.py) -------------------------------
class OldStepLane:
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
        asyncio.get_running_loop().call_soon(self._hand_on)

    def _hand_on(self) -> None:
        for waiters in (self._urgent, self._background):
            while waiters:
                fut = waiters.popleft()
                if not fut.done():  # skip waiters cancelled meanwhile
                    fut.set_result(None)  # the lane stays busy: it is theirs now
                    return
        self._busy = False


# -- oracle: the previous ingest read loop and estimate loop (verbatim, daemon/runtime/_station.py) --
_BREAK, _END, _StalledError, log = (
    station_mod._BREAK,
    station_mod._END,
    station_mod._StalledError,
    station_mod.log,
)


class OldStationRunner(StationRunner):
    """StationRunner with the previous ``_pump`` / ``estimate_loop`` and the previous queue."""

    def __init__(self, config: StationConfig, core: Any, **kw: Any) -> None:
        super().__init__(config, core, **kw)
        q = self.queue
        self.queue = OldBoundedQueue(  # type: ignore[assignment]
            q.statistics().capacity, q.policy, stage="estimator", station=config.name
        )

    async def _pump(self, transport: Any) -> bool:
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
        while True:
            deadline = det.deadline()
            try:
                if deadline == float("inf"):
                    data = await transport.read(self._read_size)
                else:
                    async with asyncio.timeout_at(deadline):
                        data = await transport.read(self._read_size)
            except TimeoutError:
                data = None
            now = loop.time()
            if data is None or data:
                kind = det.check(now)
                if kind is not None:
                    quiet = (
                        now
                        - {
                            StallKind.NO_DATA: det.last_data,
                            StallKind.NO_FRAME: det.last_frame,
                            StallKind.NO_EPOCH: det.last_epoch,
                        }[kind]
                    )
                    raise _StalledError(kind, quiet)
            if data is None:
                continue
            if not data:
                return True
            self._bytes += len(data)
            self._last_data = now
            det.saw_data(now)
            await self.queue.put((now, data))
            det.saw_data(loop.time())  # time spent waiting on our own queue is not the source's

    async def estimate_loop(self) -> None:
        """Decode queued bytes and emit outputs; return after a finite source's end."""
        loop = self._loop
        try:
            while True:
                item = await self.queue.get()
                if item is _END or item is _BREAK:
                    self._step(None, None)
                    if self._unsettled():
                        self._settle()
                    if item is _END:
                        return
                else:
                    assert isinstance(item, tuple)
                    arrived, chunk = item
                    if self._pacer is not None:  # a paced replay's bytes "arrive" when released
                        arrived = max(arrived, loop.time())
                    lane = self._lane
                    if lane is not None:
                        await lane.turn()
                    try:
                        frames_before = self.core.frames_total()
                        delay = self._step(chunk, arrived)
                        if self.core.frames_total() > frames_before:
                            self._detector.saw_frame(loop.time())
                    finally:
                        if lane is not None:
                            lane.done()
                    if self._unsettled():
                        # The deferred part of the step (receiver-bias fit, messages after the
                        # epoch) after every urgent step waiting: the snapshot just emitted does
                        # not depend on it (StepLane, StationPipeline.settle).
                        if lane is not None:
                            await lane.turn(background=True)
                        else:
                            await asyncio.sleep(0)  # the outputs go out first
                        try:
                            self._settle()
                        finally:
                            if lane is not None:
                                lane.done()
                    if delay > 0:  # replay pacing is planned idleness, not a stuck pipeline
                        self._progress = loop.time() + delay
                        await asyncio.sleep(delay)
                self._progress = loop.time()
                await asyncio.sleep(0)  # one chunk per turn: a garbage flood never starves others
        finally:
            self.finished.set()
            if self._on_finished is not None:
                self._on_finished()

    def _step(self, chunk: bytes | None, arrived: float | None) -> float:
        """Feed one chunk (``None``: the stream broke or ended) and emit the outputs, containing
        any failure (module docstring); return the replay pacing delay (s)."""
        return self._old_contained(
            self.core.end_stream if chunk is None else lambda: self.core.feed(chunk), arrived
        )

    def _old_contained(self, work: Any, arrived: float | None) -> float:
        """Run ``work`` (decode and estimate) and emit its outputs, containing any failure."""
        try:
            try:
                outputs = work()
            except station_mod.TOLERATED_DECODE_ERRORS as exc:
                self._decode_errors += 1
                self._log_limited(
                    "decode", logging.WARNING, "%s: decode error, chunk skipped: %s", exc
                )
                outputs = ()
            delay = self._handle(outputs, arrived)
        except station_mod.UNCONTAINED_ERRORS:
            raise
        except Exception as exc:
            self._pipeline_failed(exc)
            return 0.0
        self._failing_steps = 0
        return delay

    def _settle(self) -> None:
        self._old_contained(self.core.settle, None)
        if self._also is not None and self._also.unsettled():
            self._old_contained(self._settle_also, None)


# -- BoundedQueue --------------------------------------------------------------------------------
async def _queue_trace(qcls: Any, policy: Overflow, seed: int) -> list[object]:
    """Random puts, gets, waiting putters/getters and their cancellation; every outcome traced."""
    rnd = random.Random(seed)
    q = qcls(rnd.choice((1, 2, 3, 5)), policy, stage="estimator", station="st")
    trace: list[object] = []
    tasks: dict[int, asyncio.Task[None]] = {}

    async def getter(i: int) -> None:
        trace.append(("got", i, await q.get()))

    async def putter(i: int, x: int) -> None:
        trace.append(("put", i, x, await q.put(x)))

    for k in range(400):
        op = rnd.random()
        try:
            if op < 0.3:
                trace.append(("put_nowait", k, q.put_nowait(k)))
            elif op < 0.45:
                trace.append(("get_nowait", q.get_nowait()))
            elif op < 0.6:
                tasks[k] = asyncio.create_task(getter(k), name=f"test.get[{k}]")
            elif op < 0.75:
                tasks[k] = asyncio.create_task(putter(k, k), name=f"test.put[{k}]")
            elif op < 0.85 and tasks:
                victim = rnd.choice(sorted(tasks))
                tasks[victim].cancel()
                trace.append(("cancel", victim))
            else:
                for _ in range(rnd.randrange(3)):
                    await asyncio.sleep(0)
        except asyncio.QueueFull:
            trace.append(("full", k))
        except asyncio.QueueEmpty:
            trace.append(("empty", k))
        trace.append((q.qsize(), q.empty(), q.statistics()))
    for t in tasks.values():
        t.cancel()
    await asyncio.gather(*tasks.values(), return_exceptions=True)
    trace.append([t.cancelled() for t in tasks.values()])
    trace.append((q.qsize(), q.statistics()))
    return trace


@pytest.mark.parametrize("policy", list(Overflow))
@pytest.mark.parametrize("seed", range(12))
def test_bounded_queue_decides_as_the_previous_queue(policy: Overflow, seed: int) -> None:
    """BoundedQueue hands out, drops, counts and wakes waiters exactly as the previous one did
    (equal to the previous implementation (oracle copy)) under random puts, gets and cancels."""
    new = asyncio.run(_queue_trace(BoundedQueue, policy, seed))
    old = asyncio.run(_queue_trace(OldBoundedQueue, policy, seed))
    assert new == old


# -- StepLane --------------------------------------------------------------------------------------
async def _lane_order(lane_cls: Any, seed: int) -> list[str]:
    """Bursts of stations (urgent step, then a background step for some) plus a background tick;
    the order in which the steps ran."""
    rnd = random.Random(seed)
    lane = lane_cls()
    log_: list[str] = []
    for burst in range(4):
        start = asyncio.Event()
        names = [f"s{i}" for i in range(rnd.randrange(1, 12))]
        deferred = {n for n in names if rnd.random() < 0.7}

        async def station(name: str, ev: asyncio.Event = start, d: set[str] = deferred) -> None:
            await ev.wait()
            await lane.turn()
            try:
                log_.append(f"urgent {name}")
            finally:
                lane.done()
            if name in d:
                await lane.turn(background=True)
                try:
                    log_.append(f"background {name}")
                finally:
                    lane.done()

        async def tick(ev: asyncio.Event = start) -> None:
            # (with the burst: a waiter arriving some iterations later may find the faster lane
            # further on, which is timing, not order)
            await ev.wait()
            await lane.turn(background=True)
            try:
                log_.append("tick")
            finally:
                lane.done()

        async with asyncio.TaskGroup() as tg:
            at = rnd.randrange(len(names) + 1)
            for i, name in enumerate(names):
                if i == at:
                    tg.create_task(tick(), name="daemon.status[all]")
                tg.create_task(station(name), name=f"daemon.estimate[{name}]")
            if at == len(names):
                tg.create_task(tick(), name="daemon.status[all]")
            await asyncio.sleep(0)
            start.set()
        log_.append(f"end of burst {burst}")
        for _ in range(3):
            await asyncio.sleep(0)
        assert lane.waiting == 0
    return log_


@pytest.mark.parametrize("seed", range(10))
def test_step_lane_orders_a_burst_as_the_previous_lane(seed: int) -> None:
    """StepLane runs the urgent and background steps of epochs arriving together in the same
    order as before (equal to the previous implementation (oracle copy))."""
    assert asyncio.run(_lane_order(StepLane, seed)) == asyncio.run(_lane_order(OldStepLane, seed))


# -- the ingest read loop: stall verdicts, reconnects, counters ---------------------------------------
@dataclass
class _Scripted:
    """A transport whose reads follow a script: (virtual seconds to wait, bytes | error)."""

    steps: list[tuple[float, Any]]
    hang_after: bool = True

    async def read(self, max_bytes: int) -> bytes:
        if not self.steps:
            if self.hang_after:
                await asyncio.sleep(3600)
            return b""
        wait, what = self.steps.pop(0)
        await asyncio.sleep(wait)
        if isinstance(what, Exception):
            raise what
        data: bytes = what
        return data[:max_bytes]

    async def aclose(self) -> None:
        pass


class _DeferringCore(StandInCore):
    """StandInCore with deferred work after each chunk (settled in a background step, some
    settles emitting), a decode error on chunks holding ``BAD`` and a failing step on ``BOOM``."""

    def __init__(self) -> None:
        super().__init__()
        self._pending = False
        self.settles = 0

    def feed(self, data: bytes) -> Any:
        if b"BAD" in data:
            raise ParseError("scripted: undecodable", message_id=1077, offset=len(data))
        if b"BOOM" in data:
            raise ValueError("scripted: hostile values")
        self._pending = True
        return super().feed(data)

    def unsettled(self) -> bool:
        return self._pending

    def settle(self) -> list[object]:
        self._pending = False
        self.settles += 1
        return [("settled", self.settles)] if self.settles % 3 == 0 else []


def _frames(a: int, b: int) -> bytes:
    return b"".join(rtcm_frame(1077, i.to_bytes(4, "big")) for i in range(a, b))


def _connections() -> list[_Scripted]:
    every_s = [(1.0, _frames(i, i + 1)) for i in range(3)]
    return [
        _Scripted([(0.5, _frames(0, 2)), (0.5, _frames(2, 3))]),  # then silent: no-data
        _Scripted(  # bytes but no frame (some undecodable, some failing the step): no-frame
            [(0.5, b"\x00garbage\xff" * 9), (0.5, b"BAD"), (0.5, b"BOOM"), (0.5, b"BOOM")]
            + [(1.0, b"\x01junk\xfe" * 7)] * 40
        ),
        _Scripted([(0.5, _frames(10, 11))] + [(1.0, _frames(11 + i, 12 + i)) for i in range(70)]),
        _Scripted([*every_s, (0.2, b"")]),  # the peer closes the stream
        _Scripted([*every_s, (0.3, SourceUnavailableError("scripted: link lost"))]),
        _Scripted([(9.0, _frames(90, 91)), (9.0, _frames(91, 92)), (9.0, _frames(92, 93))]),
    ]


async def _drive(
    runner_cls: Any, lane_cls: Any, *, finite: bool, hold: tuple[float, float] | None = None
) -> dict[str, Any]:
    """Run one station over the scripted connections until they are used up (or, for a finite
    source, until its end); ``hold``: (at, for) virtual seconds an outside step holds the lane."""
    conns = _connections()
    opened: list[int] = []
    events: list[object] = []
    changed = asyncio.Event()

    async def opener(_spec: object, _pw: str) -> _Scripted:
        if len(opened) == len(conns):
            raise SourceUnavailableError("scripted: no more connections")
        opened.append(1)
        return conns[len(opened) - 1]

    def emit(item: object) -> None:
        events.append(item)
        changed.set()

    def over() -> bool:
        return any(
            isinstance(e, SourceEvent)
            and (e.state is StationState.FINISHED or "no more" in e.detail)
            for e in events
        )

    core = _DeferringCore()
    cfg = StationConfig(
        name="st1",
        source=StdinSource() if finite else TcpSource(host="127.0.0.1", port=9),
        stall=StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60),
        queue_size=1 if finite else 2,
    )
    lane = lane_cls()
    runner = runner_cls(cfg, core, emit=emit, opener=opener, rng=random.Random(3), lane=lane)

    async def holder(at_s: float, for_s: float) -> None:
        await asyncio.sleep(at_s)
        await lane.turn()
        try:
            await asyncio.sleep(for_s)
        finally:
            lane.done()

    async with asyncio.TaskGroup() as tg:
        tasks = [
            tg.create_task(runner.ingest_loop(), name="daemon.ingest[st1]"),
            tg.create_task(runner.estimate_loop(), name="daemon.estimate[st1]"),
        ]
        if hold is not None:
            tasks.append(tg.create_task(holder(*hold), name="test.hold[lane]"))
        async with asyncio.timeout(3600):
            while not over():
                changed.clear()
                await changed.wait()
            for _ in range(5):
                await asyncio.sleep(0)
        for t in tasks:
            t.cancel()
    st = runner.statistics()
    return {
        "states": [(e.state, e.detail) for e in events if isinstance(e, SourceEvent)],
        "state_times": [e.monotonic_s for e in events if isinstance(e, SourceEvent)],
        "last": (st.last_data_monotonic_s, st.progress_monotonic_s),
        "outputs": [e for e in events if not isinstance(e, SourceEvent)],
        "seen": [int.from_bytes(p[2:6], "big") for p in core.seen],
        "counts": (
            st.bytes_total,
            st.connects_total,
            st.reconnects_total,
            st.stalls_total,
            st.epochs_total,
            st.fixes_total,
            st.decode_errors_total,
            st.decoder,
            st.queue,
            st.pipeline_errors_total,
            st.pipeline_resets_total,
            core.settles,
            st.state,
            st.connected,
        ),
    }


def _log_lines(caplog: pytest.LogCaptureFixture) -> list[str]:
    return [r.getMessage() for r in caplog.records if r.name == station_mod.log.name]


@pytest.mark.parametrize(
    ("finite", "hold"),
    [(False, None), (False, (20.0, 25.0)), (True, None), (True, (1.5, 25.0))],
    ids=["live", "live-lane-held", "finite", "finite-lane-held"],
)
def test_station_reads_stalls_and_reconnects_as_before(
    caplog: pytest.LogCaptureFixture, finite: bool, hold: tuple[float, float] | None
) -> None:
    """StationRunner declares the same stalls (no data, no frame, no epoch; not while it waits on
    its own full queue), reconnects, counts and emits the same as before on a scripted source
    (equal to the previous implementation (oracle copy)); the verdicts follow the configured
    limits (10/30/60 s)."""
    caplog.set_level(logging.INFO, logger=station_mod.log.name)
    new = run_pure_virtual(_drive(StationRunner, StepLane, finite=finite, hold=hold))
    new_log = _log_lines(caplog)
    caplog.clear()
    old = run_pure_virtual(_drive(OldStationRunner, OldStepLane, finite=finite, hold=hold))
    assert new == old
    assert new_log == _log_lines(caplog)
    decode_errors, pipeline_errors, settles = new["counts"][6], new["counts"][9], new["counts"][11]
    assert (decode_errors, pipeline_errors) == (1, 2)
    assert settles > 0
    stalls = [d for s, d in new["states"] if s is StationState.STALLED]
    if not finite:
        assert stalls == ["no-data", "no-frame", "no-epoch", "no-data"]
        assert any("stalled: no-epoch for 60 s" in line for line in new_log)


def test_station_ingest_cancelled_while_reading_is_cancelled_not_stalled() -> None:
    """StationRunner's ingest task, cancelled from outside while a read waits under the stall
    limit, ends cancelled: the stall timer never turns an outside cancellation into a stall."""

    async def main() -> None:
        async def opener(_spec: object, _pw: str) -> _Scripted:
            return _Scripted([(0.5, _frames(0, 1))])

        events: list[object] = []
        cfg = StationConfig(name="st1", source=TcpSource(host="127.0.0.1", port=9))
        runner = StationRunner(cfg, StandInCore(), emit=events.append, opener=opener)
        task = asyncio.create_task(runner.ingest_loop(), name="daemon.ingest[st1]")
        await asyncio.sleep(5.0)
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        assert task.cancelled()
        assert runner.statistics().stalls_total == 0
        await asyncio.sleep(30.0)  # no timer of the station is left to fire
        assert [e.state for e in events if isinstance(e, SourceEvent)] == [
            StationState.CONNECTING,
            StationState.STREAMING,
        ]

    run_virtual(main())


# -- the TCP transport's read: errors translated as before ---------------------------------------------
class OldTcpTransport(TcpTransport):
    """TcpTransport with the previous ``read`` (verbatim, daemon/ingest/_net.py)."""

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        with map_transport_errors(f"{self._what}: read"):
            return await self._reader.read(max_bytes)


async def _read_outcomes(cls: type[TcpTransport]) -> list[object]:
    """Read a peer that sends bytes then resets the connection (SO_LINGER 0), then read again
    after close: what each read returned or raised (type, message, cause type)."""

    async def serve(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(b"\xd3abc")
        await w.drain()
        await asyncio.sleep(0.05)
        sock = w.get_extra_info("socket")
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        w.transport.abort()

    server = await asyncio.start_server(serve, "127.0.0.1", 0)
    port = server.sockets[0].getsockname()[1]
    out: list[object] = []
    async with server:
        t = await cls.connect("127.0.0.1", port)
        for _ in range(3):
            try:
                out.append(await t.read(100))
            except Exception as exc:
                out.append((type(exc), str(exc).replace(str(port), "PORT"), type(exc.__cause__)))
        await t.aclose()
        try:
            await t.read(100)
        except Exception as exc:
            out.append((type(exc), str(exc).replace(str(port), "PORT"), type(exc.__cause__)))
    return out


def test_tcp_transport_translates_read_errors_as_before() -> None:
    """TcpTransport.read hands out the bytes, then turns a reset connection into the same
    SourceUnavailableError (message and cause) and a read after close into the same
    TransportError as before (equal to the previous implementation (oracle copy))."""
    new = asyncio.run(_read_outcomes(TcpTransport))
    old = asyncio.run(_read_outcomes(OldTcpTransport))
    assert new == old
    assert new[0] == b"\xd3abc"
    assert any(isinstance(o, tuple) and o[0] is SourceUnavailableError for o in new)


@pytest.mark.parametrize("outside_too", [False, True])
def test_stall_timer_tells_its_cancellation_from_an_outside_one(outside_too: bool) -> None:
    """StallTimer interrupts a read at the no-data limit (10 s, configured) and reports it as its
    own; when an outside cancellation comes in the same loop iteration, the read stays cancelled
    (as asyncio.timeout_at decides, Task.uncancel)."""
    from ionwarden.daemon.runtime._stall import StallDetector, StallTimer

    async def main() -> list[object]:
        loop = asyncio.get_running_loop()
        det = StallDetector(StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60), loop.time())
        outcome: list[object] = []

        async def reader() -> None:
            task = asyncio.current_task()
            assert task is not None
            timer = StallTimer(det, loop, task)
            timer.arm(det.deadline())
            try:
                await asyncio.sleep(3600)
            except BaseException as exc:
                timer.reading = False
                if not (timer.fired and timer.took(exc)):
                    outcome.append("cancelled from outside")
                    raise
                outcome.append(("stalled at", loop.time(), det.check(loop.time())))
            finally:
                timer.close()

        t = asyncio.create_task(reader(), name="test.read")
        await asyncio.sleep(0)
        if outside_too:  # due with the stall timer, after it (armed later)
            loop.call_at(det.deadline(), t.cancel)
        await asyncio.gather(t, return_exceptions=True)
        outcome.append(t.cancelled())
        return outcome

    got = run_pure_virtual(main())
    if outside_too:
        assert got == ["cancelled from outside", True]
    else:
        assert got == [("stalled at", 10.0, StallKind.NO_DATA), False]


class OldSerialTransport(SerialTransport):
    """SerialTransport with the previous ``read`` (verbatim, daemon/ingest/_serial.py)."""

    async def read(self, max_bytes: int) -> bytes:
        with serial_mod._map_serial(f"{self._what}: read"):
            try:
                return await self._inner.read(max_bytes)
            except TransportError:
                raise
            except asyncio.IncompleteReadError as exc:  # pragma: no cover - adapter detail
                raise SourceUnavailableError(f"{self._what}: read: {exc}") from exc


async def _serial_outcomes(cls: type[SerialTransport]) -> list[object]:
    """Read a pty "device" that sends bytes and is then unplugged (its master side closed)."""
    master, slave = os.openpty()
    tty.setraw(master)
    device = os.ttyname(slave)
    try:
        t = await cls.open(SerialSource(device=device, baud=115200))
        os.write(master, b"\xd3abc")
        out: list[object] = [await t.read(100)]
        os.close(master)
        master = -1
        for _ in range(2):
            try:
                out.append(await t.read(100))
            except Exception as exc:
                msg = str(exc).replace(device, "DEV")
                out.append((type(exc), msg, type(exc.__cause__)))
        await t.aclose()
        return out
    finally:
        if master >= 0:
            os.close(master)
        os.close(slave)


def test_serial_transport_translates_read_errors_as_before() -> None:
    """SerialTransport.read hands out the bytes, then turns an unplugged device into the same
    transport error (type, message, cause) as before (equal to the previous implementation
    (oracle copy))."""
    new = asyncio.run(_serial_outcomes(SerialTransport))
    old = asyncio.run(_serial_outcomes(OldSerialTransport))
    assert new == old
    assert new[0] == b"\xd3abc"
    assert any(isinstance(o, tuple) and issubclass(o[0], TransportError) for o in new)
