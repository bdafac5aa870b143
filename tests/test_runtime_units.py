"""Pure runtime pieces: backoff, stall detection, replay pacing, bounded queues, summary lines."""

from __future__ import annotations

import asyncio
import random

import pytest

from ionwarden.daemon.ingest import parse_source
from ionwarden.daemon.runtime import (
    BoundedQueue,
    DecoderCounts,
    Overflow,
    ReplayPacer,
    StallDetector,
    StallKind,
    StallLimits,
    StationState,
    backoff_delays,
    max_delay_s,
)
from ionwarden.daemon.runtime._station_records import StationStatistics
from ionwarden.daemon.runtime._summary import format_status, format_summary


def test_backoff_doubles_up_to_the_cap_with_downward_jitter() -> None:
    """backoff_delays doubles from initial to cap, each delay jittered into [80%, 100%] of its bound."""
    gen = backoff_delays(initial_s=1.0, cap_s=30.0, jitter=0.2, rng=random.Random(1))
    delays = [next(gen) for _ in range(12)]
    for i, d in enumerate(delays):
        bound = max_delay_s(i, initial_s=1.0, cap_s=30.0)
        assert 0.8 * bound <= d <= bound  # common practice: capped exponential, jitter down only
    assert max(delays) <= 30.0
    assert delays[-1] >= 24.0


def test_backoff_is_deterministic_with_a_seeded_rng() -> None:
    """backoff_delays yields the same sequence when given the same seed."""
    a = backoff_delays(rng=random.Random(5))
    b = backoff_delays(rng=random.Random(5))
    assert [next(a) for _ in range(6)] == [next(b) for _ in range(6)]


def test_backoff_without_jitter_is_exact() -> None:
    """backoff_delays yields 1, 2, 4, 8, 8 with jitter 0 and a cap of 8."""
    gen = backoff_delays(initial_s=1, cap_s=8, jitter=0)
    assert [next(gen) for _ in range(5)] == [1, 2, 4, 8, 8]


@pytest.mark.parametrize(
    "kwargs", [{"initial_s": 0}, {"initial_s": 5, "cap_s": 1}, {"factor": 0.5}, {"jitter": 1.0}]
)
def test_backoff_rejects_nonsense(kwargs: dict[str, float]) -> None:
    """backoff_delays raises ValueError on a non-positive start, cap below start, or bad factor/jitter."""
    with pytest.raises(ValueError):
        next(backoff_delays(**kwargs))


def test_stall_detector_reports_the_most_basic_stall_first() -> None:
    """StallDetector says no-data before no-frame before no-epoch, each at its own limit."""
    det = StallDetector(StallLimits(no_data_s=5, no_frame_s=10, no_epoch_s=20), now=100.0)
    assert det.check(104.9) is None
    assert det.deadline() == 105.0
    assert det.check(105.0) is StallKind.NO_DATA
    det.saw_data(109.0)
    assert det.check(110.0) is StallKind.NO_FRAME
    det.saw_frame(115.0)
    det.saw_data(119.0)
    assert det.check(120.0) is StallKind.NO_EPOCH
    det.reset(200.0)
    assert det.check(204.0) is None


def test_pacer_follows_data_time_at_the_rate_factor() -> None:
    """ReplayPacer waits (t - t0)/speed after the first epoch, and never at speed 0."""
    p = ReplayPacer(10.0)
    assert p.delay(1000.0, now=50.0) == 0.0
    assert p.delay(1010.0, now=50.2) == pytest.approx(0.8)  # 10 s of data at 10x = 1 s
    assert ReplayPacer(0).delay(5.0, now=0.0) == 0.0


def test_pacer_reanchors_on_backward_or_large_jumps() -> None:
    """ReplayPacer restarts its anchor when data time goes back (a loop) or jumps past max_gap_s."""
    p = ReplayPacer(1.0, max_gap_s=60)
    p.delay(1000.0, now=0.0)
    assert p.delay(900.0, now=1.0) == 0.0
    assert p.delay(5000.0, now=2.0) == 0.0
    assert p.delay(5001.0, now=2.0) == pytest.approx(1.0)


def test_queue_drop_oldest_keeps_the_newest_and_counts() -> None:
    """BoundedQueue with DROP_OLDEST discards the oldest item when full and counts it."""

    async def main() -> None:
        q: BoundedQueue[int] = BoundedQueue(3, Overflow.DROP_OLDEST, stage="t")
        for i in range(5):
            q.put_nowait(i)
        assert [q.get_nowait() for _ in range(3)] == [2, 3, 4]
        st = q.statistics()
        assert (st.dropped_total, st.peak, st.put_total, st.depth) == (2, 3, 5, 0)

    asyncio.run(main())


def test_queue_drop_newest_refuses_and_wait_blocks() -> None:
    """BoundedQueue DROP_NEWEST refuses new items when full; WAIT raises QueueFull on put_nowait."""

    async def main() -> None:
        q: BoundedQueue[int] = BoundedQueue(2, Overflow.DROP_NEWEST, stage="t")
        assert [q.put_nowait(i) for i in range(3)] == [True, True, False]
        assert [q.get_nowait(), q.get_nowait()] == [0, 1]
        w: BoundedQueue[int] = BoundedQueue(1, Overflow.WAIT, stage="t")
        await w.put(1)
        with pytest.raises(asyncio.QueueFull):
            w.put_nowait(2)
        assert w.statistics().dropped_total == 0

    asyncio.run(main())


def _stats(name: str, state: StationState, detail: str = "") -> StationStatistics:
    q: BoundedQueue[int] | None = None

    async def mk() -> BoundedQueue[int]:
        return BoundedQueue(4, Overflow.DROP_OLDEST, stage="estimator", station=name)

    q = asyncio.run(mk())
    return StationStatistics(
        station=name,
        state=state,
        detail=detail,
        connected=state is StationState.STREAMING,
        bytes_total=123456,
        connects_total=2,
        reconnects_total=1,
        stalls_total=0,
        epochs_total=10,
        fixes_total=0,
        decode_errors_total=0,
        decoder=DecoderCounts(frames_total=30, crc_errors_total=1, discarded_bytes_total=2048),
        queue=q.statistics(),
        last_data_monotonic_s=None,
        last_epoch_monotonic_s=None,
        latest=None,
        latest_fix=None,
        progress_monotonic_s=0.0,
    )


def test_summary_line_shows_counts_and_no_invented_figures() -> None:
    """format_summary shows stream counters and says "no epoch yet" when there is no snapshot."""
    line = format_summary(_stats("base", StationState.STREAMING), epoch_rate_hz=1.0)
    assert line.startswith("base")
    assert "no epoch yet" in line
    assert "VTEC" not in line
    assert "frames 30" in line
    assert "crc-fail 1" in line
    assert "skipped 2.0 kB" in line
    assert "epochs 10 (1.0/s)" in line
    assert "reconnects 1" in line
    assert "pipeline-errors" not in line  # shown only once there is one


def test_summary_line_shows_contained_pipeline_errors() -> None:
    """format_summary shows the count of contained pipeline errors when there are any."""
    from dataclasses import replace

    st = replace(_stats("base", StationState.STREAMING), pipeline_errors_total=4)
    assert "pipeline-errors 4" in format_summary(st)


def test_status_line_names_stations_that_do_not_stream() -> None:
    """format_status counts streaming stations and names the others with their reason."""
    text = format_status(
        [_stats("a", StationState.STREAMING), _stats("b", StationState.REFUSED, "unauthorized")]
    )
    assert text == "1/2 stations streaming; b refused (unauthorized)"
    assert format_status([]) == "no stations configured"


@pytest.mark.parametrize(
    ("url", "message"),
    [
        ("tpc://x:1", "unknown scheme 'tpc'"),
        ("tcp://x", "missing port"),
        ("tcp://x:1?foo=1", "unknown option 'foo'"),
        ("serial://ttyUSB0", "absolute device path"),
        ("serial:///dev/ttyUSB0?parity=Q", "parity='Q'"),
        ("ntrip://u:secret@c:2101/M", "password in a secret"),
        ("ntrip://c:2101/", "one mountpoint"),
        ("ntrip://c/M?gga_interval=5", "needs lat and lon"),
        ("file:///x?speed=-1", "speed=-1 is outside"),
        ("stdin:/x", "stdin takes no path"),
    ],
)
def test_parse_source_rejects_bad_urls_with_one_line(url: str, message: str) -> None:
    """parse_source raises ConfigError naming 'source' and the problem for a bad URL."""
    from ionwarden.daemon.errors import ConfigError

    with pytest.raises(ConfigError) as err:
        parse_source(url)
    assert err.value.key == "source"
    assert message in str(err.value)
    assert "\n" not in str(err.value)


def test_parse_source_reads_every_scheme() -> None:
    """parse_source turns each documented URL form into its spec with the options applied."""
    from ionwarden.daemon import ingest as ing

    s = parse_source("serial:///dev/ttyUSB0?baud=460800&parity=E&stopbits=2&flow=rtscts")
    assert s == ing.SerialSource(
        device="/dev/ttyUSB0", baud=460800, parity="E", stopbits=2, flow="rtscts"
    )
    assert parse_source("tcp://10.0.0.5:5018") == ing.TcpSource(host="10.0.0.5", port=5018)
    assert parse_source("tcp-listen://0.0.0.0:2102") == ing.TcpListenSource(
        host="0.0.0.0", port=2102
    )
    assert parse_source("udp://0.0.0.0:9000") == ing.UdpSource(host="0.0.0.0", port=9000)
    n = parse_source("ntrip://bob@caster.example:2101/NET1?gga_interval=10&lat=48.1&lon=11.5")
    assert n == ing.NtripSource(
        host="caster.example",
        port=2101,
        mount="NET1",
        user="bob",
        gga_interval_s=10,
        lat_deg=48.1,
        lon_deg=11.5,
    )
    assert parse_source("ntrip://caster.example/M").port == 2101  # type: ignore[union-attr]
    assert parse_source("file://demo.bin?speed=0") == ing.FileSource(path="demo.bin", speed=0.0)
    assert parse_source("file:///var/x.bin?loop=1") == ing.FileSource(path="/var/x.bin", loop=True)
    assert parse_source("stdin:") == ing.StdinSource()
