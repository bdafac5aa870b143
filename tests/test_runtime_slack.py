"""The station runtime runs the core's slack work (the receiver-bias fit and the orbits evaluated
ahead, ``StationPipeline(slack=True)``) in a background turn of its own, midway to the next
epoch: ``slack_after_s`` (half the epoch interval) after the bytes of the epoch that left it
arrived, away from the bursts of all stations' epochs (issue 8).

The real framer and station pipeline, fed the simulator's invented quiet-day stream (our own
scenario, daemon/sim) by a scripted transport on a purely virtual clock (``run_pure_virtual``:
it moves only when the loop would wait, so the steps' own time does not count): one read per
epoch at the epoch's time. The figures are the plain pipeline's, bit for bit, whenever the
slack work runs (tests/test_pipeline_slack.py); here: when it runs.
"""

from __future__ import annotations

import asyncio
import random
from typing import Any

import pytest

from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.daemon.estimator._estimator import StationEstimator
from ionwarden.daemon.ingest import FileSource, TcpSource
from ionwarden.daemon.runtime import (
    FramingCore,
    StallLimits,
    StationConfig,
    StationRunner,
    StepLane,
)
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers._framer import Framer, NmeaFrame

from ._runtime_support import run_pure_virtual
from .test_pipeline_settle import _assert_same_outputs

#: Tolerance (s of the virtual clock) on when a call ran (float rounding only).
_EPS_S = 1e-6


def _stream(rate_hz: float, seconds: float) -> tuple[list[bytes], object]:
    sc = build_scenario("quiet-day", duration_s=seconds, rate_hz=rate_hz)
    return [data for _, data in iter_stream(Simulator(sc), 0)], sc.start


class _Transport:
    """Hands out one chunk per read at the scripted virtual times (s after the first read),
    then hangs."""

    def __init__(self, chunks: list[bytes], times_s: list[float]):
        self._chunks, self._times_s = list(chunks), times_s
        self._t0: float | None = None
        self._k = 0

    async def read(self, max_bytes: int) -> bytes:
        loop = asyncio.get_running_loop()
        if self._t0 is None:
            self._t0 = loop.time()
        if self._k == len(self._chunks):
            await asyncio.sleep(3600)
        await asyncio.sleep(max(0.0, self._t0 + self._times_s[self._k] - loop.time()))
        self._k += 1
        return self._chunks[self._k - 1]

    async def aclose(self) -> None:
        pass


class _Recording(FramingCore):
    """The daemon's core (FramingCore(defer=True) around StationPipeline(defer, slack)), noting
    (call, loop time) of its steps and the phase any receiver-bias fit ran in."""

    phase = "idle"

    def __init__(self, start: object, log: list[tuple[str, float]]):
        pipe = StationPipeline("HARC", reference_time=start, defer=True, slack=True)  # type: ignore[arg-type]
        super().__init__(consumer=pipe, defer=True)
        self.log = log

    def _noted(self, what: str, work: Any, *a: Any) -> Any:
        self.log.append((what, asyncio.get_running_loop().time()))
        _Recording.phase = what
        try:
            return work(*a)
        finally:
            _Recording.phase = "idle"

    def feed(self, data: bytes) -> Any:
        return self._noted("feed", super().feed, data)

    def settle(self) -> Any:
        return self._noted("settle", super().settle)

    def settle_slack(self) -> Any:
        return self._noted("slack", super().settle_slack)


def _run(
    chunks: list[bytes],
    start: object,
    every_s: float,
    *,
    lane: bool = True,
    times_s: list[float] | None = None,
    paced: bool = False,
    epochs: int | None = None,
) -> tuple[list[tuple[str, float]], list[object], list[str]]:
    """(core calls with their times, the outputs emitted, the phases of the fits): the chunks
    read every ``every_s`` (or at ``times_s``), from a TCP source (or a paced file replay)."""
    log: list[tuple[str, float]] = []
    fits: list[str] = []
    fit = StationEstimator._update_receiver_bias

    def noting_fit(self: StationEstimator, *a: Any, **kw: Any) -> Any:
        fits.append(_Recording.phase)
        return fit(self, *a, **kw)

    async def main() -> list[object]:
        outputs: list[object] = []
        snapshots = 0
        all_in = asyncio.Event()

        def emit(item: object) -> None:
            nonlocal snapshots
            outputs.append(item)
            snapshots += isinstance(item, StationSnapshot)
            if snapshots == (epochs or len(chunks)):
                all_in.set()

        core = _Recording(start, log)
        transport = _Transport(chunks, times_s or [k * every_s for k in range(len(chunks))])

        async def opener(_spec: object, _pw: str) -> _Transport:
            return transport

        cfg = StationConfig(
            name="HARC",
            source=FileSource(path="scripted", speed=1.0) if paced else TcpSource(host="h", port=9),
            stall=StallLimits(no_data_s=600, no_frame_s=600, no_epoch_s=600),
        )
        runner = StationRunner(
            cfg,
            core,
            emit=emit,
            opener=opener,
            rng=random.Random(1),
            lane=StepLane() if lane else None,
        )
        async with asyncio.TaskGroup() as tg:
            tasks = [tg.create_task(runner.ingest_loop()), tg.create_task(runner.estimate_loop())]
            async with asyncio.timeout(3 * len(chunks) * max(every_s, 1.0) + 60):
                await all_in.wait()
            await asyncio.sleep(2.0)  # the last epoch's slack work
            for t in tasks:
                t.cancel()
        return [x for x in outputs if isinstance(x, (StationSnapshot, FixStatus))]

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(StationEstimator, "_update_receiver_bias", noting_fit)
        out = run_pure_virtual(main())
    return log, out, fits


def _plain(chunks: list[bytes], start: object) -> list[object]:
    pipe = StationPipeline("HARC", reference_time=start)  # type: ignore[arg-type]
    out: list[object] = []
    for data in chunks:
        out += pipe.feed(data)
    return out


def _slack_delays(log: list[tuple[str, float]]) -> list[float]:
    """For each slack call: the time since the feed before it."""
    out, fed = [], None
    for what, t in log:
        if what == "feed":
            fed = t
        elif what == "slack":
            assert fed is not None
            out.append(t - fed)
    return out


@pytest.mark.parametrize(("rate_hz", "seconds"), [(1.0, 70.0), (10.0, 8.0)])
def test_slack_runs_midway_to_the_next_epoch(rate_hz, seconds):
    """At 1 Hz and at 10 Hz: after each epoch the slack work runs half an epoch interval after
    its bytes arrived (0.5 s, 0.05 s), before the next epoch's feed, so no receiver-bias fit
    runs in a feed (past the first epoch's); the outputs are the plain pipeline's."""
    chunks, start = _stream(rate_hz, seconds)
    every = 1.0 / rate_hz
    log, out, fits = _run(chunks, start, every)
    delays = _slack_delays(log)
    assert len(delays) >= len(chunks) - 3, (len(delays), len(chunks))
    assert delays == pytest.approx([every / 2] * len(delays), abs=_EPS_S)
    calls = [what for what, _ in log]
    for k in range(len(calls) - 1):  # each slack call comes before the next feed
        if calls[k] == "slack":
            assert calls[k + 1] == "feed", k
    # (the first epoch's slack waits half the 1-s interval assumed until a second epoch: at
    # 10 Hz the next feed settles it; and the start's GSV fallback may settle one)
    assert fits
    assert "feed" not in fits[1:], fits
    assert fits.count("slack") >= len(fits) - 2
    _assert_same_outputs(_plain(chunks, start), out)


def test_epochs_sooner_than_midway_settle_the_slack_themselves():
    """A 1-Hz stream whose epochs arrive every 0.3 s (a receiver's backlog, say): each epoch's
    feed settles the slack work of the one before (the estimator's entries settle first), so
    the timer, renewed by each epoch, fires only after the last; same outputs."""
    chunks, start = _stream(1.0, 40.0)
    log, out, fits = _run(chunks, start, 0.3)
    assert [what for what, _ in log].count("slack") == 1
    assert _slack_delays(log) == pytest.approx([0.5], abs=_EPS_S)
    assert fits.count("feed") >= 10
    _assert_same_outputs(_plain(chunks, start), out)


def _split_tails(chunks: list[bytes]) -> list[bytes]:
    """Each second's chunk cut before its first NMEA sentence: the RTCM part (with the epoch),
    then the sentences (no epoch), as reads of a slow link may cut them."""
    out = []
    for chunk in chunks:
        nmea = [f.offset for f in Framer().feed(chunk) if isinstance(f, NmeaFrame)]
        cut = nmea[0] if nmea else len(chunk)
        out += [chunk[:cut], chunk[cut:]] if 0 < cut < len(chunk) else [chunk]
    return out


def test_reads_without_an_epoch_do_not_postpone_the_slack():
    """Each second's NMEA sentences read 0.3 s after its epoch (a read without an epoch): the
    slack work still runs 0.5 s after the epoch's bytes, not 0.5 s after the later read."""
    chunks, start = _stream(1.0, 30.0)
    pieces = _split_tails(chunks)
    assert len(pieces) > len(chunks) + 20
    times, k = [], 0.0
    for piece in pieces:  # the epoch's part at the second, the sentences 0.3 s later
        is_tail = piece[:1] == b"$"
        times.append(k + 0.3 if is_tail else k)
        k += 1.0 if is_tail else 0.0
    log, out, _ = _run(pieces, start, 1.0, times_s=times, epochs=len(chunks))
    fed = [t for what, t in log if what == "feed"]
    epochs_at = [t for t in fed if abs((t - fed[0]) - round(t - fed[0])) < _EPS_S]  # the seconds
    slack_at = [t for what, t in log if what == "slack"]
    assert len(slack_at) >= len(chunks) - 3
    for t in slack_at:
        fed = max(e for e in epochs_at if e < t)
        assert t - fed == pytest.approx(0.5, abs=_EPS_S), (t, fed)
    _assert_same_outputs(_plain(chunks, start), out)


@pytest.mark.parametrize("how", ["no lane", "paced replay"])
def test_without_a_midway_turn_slack_runs_with_the_deferred_work(how):
    """Without a lane (no turn to take), and for a paced file replay (its pacing sleeps in the
    estimate task), the slack work runs right after each step's deferred work, as all deferred
    work did before."""
    chunks, start = _stream(1.0, 20.0)
    if how == "no lane":
        log, out, fits = _run(chunks, start, 1.0, lane=False)
    else:
        log, out, fits = _run(chunks, start, 0.0, paced=True)
    delays = _slack_delays(log)
    assert len(delays) >= len(chunks) - 1
    assert max(delays) < _EPS_S
    assert "feed" not in fits
    _assert_same_outputs(_plain(chunks, start), out)
