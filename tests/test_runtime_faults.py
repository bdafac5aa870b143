"""Fault tests of one station's supervision, on a virtual clock (runtime autojump loop) against
real loopback sockets, a real pty and real files: drops, hangs, garbage floods, truncation, NTRIP 401,
a serial device unplugged and plugged back."""

from __future__ import annotations

import asyncio
import itertools
import os
import random
import tty
from collections.abc import Awaitable, Callable
from pathlib import Path

import pytest

from ionwarden.daemon.ingest import FileSource, NtripSource, SerialSource, TcpSource
from ionwarden.daemon.runtime import (
    SourceEvent,
    StallLimits,
    StationConfig,
    StationRunner,
    StationState,
    max_delay_s,
    run_virtual,
)

from ._runtime_support import Caster, ScriptedServer, StandInCore, rtcm_frame

Script = Callable[[asyncio.StreamReader, asyncio.StreamWriter], Awaitable[None]]


def frames(start: int, stop: int) -> bytes:
    """RTCM 1077-typed frames carrying a sequence number (the stand-in core counts them as epochs)."""
    return b"".join(rtcm_frame(1077, i.to_bytes(4, "big")) for i in range(start, stop))


def seqs(core: StandInCore) -> list[int]:
    return [int.from_bytes(p[2:6], "big") for p in core.seen]


class Receiver(ScriptedServer):
    """A loopback TCP 'receiver': connection i runs scripts[min(i, last)]."""


async def drive(
    cfg: StationConfig,
    core: StandInCore,
    until: Callable[[StationRunner, list[object]], bool],
    *,
    virtual_timeout_s: float = 600.0,
) -> tuple[StationRunner, list[object], list[tuple[float, object]]]:
    """Run the station's two tasks until ``until`` holds; return the runner and what it emitted."""
    loop = asyncio.get_running_loop()
    events: list[object] = []
    timeline: list[tuple[float, object]] = []
    changed = asyncio.Event()

    def emit(item: object) -> None:
        events.append(item)
        timeline.append((loop.time(), item))
        changed.set()

    runner = StationRunner(cfg, core, emit=emit, rng=random.Random(3), on_finished=changed.set)
    async with asyncio.TaskGroup() as tg:
        tasks = [
            tg.create_task(runner.ingest_loop(), name=f"daemon.ingest[{cfg.name}]"),
            tg.create_task(runner.estimate_loop(), name=f"daemon.estimate[{cfg.name}]"),
        ]
        async with asyncio.timeout(virtual_timeout_s):
            while not until(runner, events):
                changed.clear()
                await changed.wait()
        for t in tasks:
            t.cancel()
    return runner, events, timeline


def states(events: list[object]) -> list[tuple[StationState, str]]:
    return [(e.state, e.detail) for e in events if isinstance(e, SourceEvent)]


def _cfg(source: object, **kw: object) -> StationConfig:
    return StationConfig(
        name="st1",
        source=source,
        stall=StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60),
        **kw,
    )  # type: ignore[arg-type]


def test_station_recovers_after_a_drop_mid_frame_without_losing_later_frames() -> None:
    """StationRunner reconnects after the peer drops mid-frame and receives every frame sent after."""

    async def first(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(frames(0, 5) + frames(5, 6)[:7])  # cut inside frame 5
        await w.drain()

    async def second(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(frames(5, 12))
        await w.drain()
        await asyncio.sleep(3600)

    async def main() -> None:
        core = StandInCore()
        async with Receiver(first, second) as rx:
            runner, _events, timeline = await drive(
                _cfg(TcpSource(host="127.0.0.1", port=rx.port)),
                core,
                lambda r, e: len(core.seen) >= 12,
            )
        assert seqs(core) == list(range(12))
        st = runner.statistics()
        assert st.reconnects_total == 1
        assert st.state is StationState.STREAMING
        assert st.decoder.truncated_frames_total == 1  # the cut frame, counted at the break
        # recovery within the first backoff bound (1 s, jitter only shortens it)
        t_drop = next(
            t
            for t, e in timeline
            if isinstance(e, SourceEvent) and e.state is StationState.RETRY_WAIT
        )
        t_back = [
            t
            for t, e in timeline
            if isinstance(e, SourceEvent) and e.state is StationState.STREAMING
        ][1]
        assert t_back - t_drop <= max_delay_s(0) + 0.5

    run_virtual(main())


def test_station_detects_a_hung_source_and_reconnects() -> None:
    """StationRunner declares a no-data stall after stall_no_data_s of silence, then reconnects."""

    async def hang(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(frames(0, 3))
        await w.drain()
        await asyncio.sleep(3600)  # open, silent

    async def good(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(frames(3, 6))
        await w.drain()
        await asyncio.sleep(3600)

    async def main() -> None:
        core = StandInCore()
        async with Receiver(hang, good) as rx:
            runner, events, timeline = await drive(
                _cfg(TcpSource(host="127.0.0.1", port=rx.port)),
                core,
                lambda r, e: len(core.seen) >= 6,
            )
        assert (StationState.STALLED, "no-data") in states(events)
        assert seqs(core) == list(range(6))
        st = runner.statistics()
        assert st.stalls_total == 1
        assert st.reconnects_total == 1
        t_open = next(
            t
            for t, e in timeline
            if isinstance(e, SourceEvent) and e.state is StationState.STREAMING
        )
        t_stall = next(
            t for t, e in timeline if isinstance(e, SourceEvent) and e.state is StationState.STALLED
        )
        assert (
            10.0 <= t_stall - t_open <= 10.5
        )  # the configured no-data limit, on the virtual clock

    run_virtual(main())


def test_station_survives_10_mb_of_garbage_and_keeps_good_frames() -> None:
    """StationRunner skips 10 MB of garbage (counted) and decodes every good frame around it."""
    garbage = random.Random(11).randbytes(10_000_000)  # common practice: seeded noise

    async def spew(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        w.write(frames(0, 3))
        for i in range(0, len(garbage), 1 << 20):
            w.write(garbage[i : i + (1 << 20)])
            await w.drain()
        w.write(frames(3, 8))
        await w.drain()
        await asyncio.sleep(3600)

    async def main() -> None:
        core = StandInCore()
        async with Receiver(spew) as rx:
            runner, _, _ = await drive(
                _cfg(TcpSource(host="127.0.0.1", port=rx.port), queue_size=4096),
                core,
                lambda r, e: len(core.seen) >= 8,
            )
        assert seqs(core) == list(range(8))
        st = runner.statistics()
        assert st.decoder.discarded_bytes_total >= 9_900_000
        assert st.reconnects_total == 0
        assert st.state is StationState.STREAMING

    run_virtual(main())


def test_station_reads_a_truncated_file_to_the_end(tmp_path: Path) -> None:
    """StationRunner replays a file cut mid-frame: every whole frame decoded, the cut one counted."""
    path = tmp_path / "cut.bin"
    path.write_bytes(frames(0, 20) + frames(20, 21)[:9])

    async def main() -> None:
        core = StandInCore()
        runner, _events, _ = await drive(
            _cfg(FileSource(path=str(path), speed=0)), core, lambda r, e: r.finished.is_set()
        )
        assert seqs(core) == list(range(20))
        st = runner.statistics()
        assert st.state is StationState.FINISHED
        assert st.decoder.truncated_frames_total == 1
        assert st.queue.dropped_total == 0

    run_virtual(main())


def test_station_reports_ntrip_401_as_refused_and_keeps_retrying() -> None:
    """StationRunner shows 'refused (unauthorized)' on NTRIP 401 and retries with growing delays."""

    async def main() -> None:
        async with Caster(mounts={"M": frames(0, 3)}, users={"u": "right"}) as caster:
            spec = NtripSource(host="127.0.0.1", port=caster.port, mount="M", user="u")
            core = StandInCore()
            runner, events, timeline = await drive(
                _cfg(spec, password="wrong"), core, lambda r, e: len(caster.requests) >= 4
            )
        assert (StationState.REFUSED, "unauthorized") in states(events)
        assert core.seen == []
        assert runner.statistics().connects_total == 0
        tries = [
            t
            for t, e in timeline
            if isinstance(e, SourceEvent) and e.state is StationState.CONNECTING
        ]
        gaps = [b - a for a, b in itertools.pairwise(tries)]
        for i, gap in enumerate(gaps):
            assert 0.8 * max_delay_s(i) - 0.1 <= gap <= max_delay_s(i) + 0.5

    run_virtual(main())


def test_station_reopens_a_serial_device_after_unplug(tmp_path: Path) -> None:
    """StationRunner reopens the device path after the pty vanishes and decodes the new stream."""
    link = tmp_path / "ttyGNSS"  # like a udev /dev/serial/by-id link
    ptys: list[tuple[int, int]] = []

    def plug() -> int:
        master, slave = os.openpty()
        tty.setraw(master)
        ptys.append((master, slave))
        if link.is_symlink():
            link.unlink()
        link.symlink_to(os.ttyname(slave))
        return master

    async def main() -> None:
        loop = asyncio.get_running_loop()
        core = StandInCore()
        master = plug()
        phase = {"n": 0}

        def until(r: StationRunner, events: list[object]) -> bool:
            nonlocal master
            if phase["n"] == 0 and r.state is StationState.STREAMING:
                os.write(master, frames(0, 4))
                phase["n"] = 1
            elif phase["n"] == 1 and len(core.seen) >= 4:
                m, s = ptys[0]
                os.close(s)
                os.close(m)  # unplug: the reader gets EIO / hang-up
                link.unlink()
                phase["n"] = 2
            elif phase["n"] == 2 and r.state is StationState.RETRY_WAIT:
                loop.call_later(2.0, plug)  # plug back in 2 s later
                phase["n"] = 3
            elif phase["n"] == 3 and r.state is StationState.STREAMING and len(ptys) == 2:
                os.write(ptys[1][0], frames(4, 8))
                phase["n"] = 4
            return len(core.seen) >= 8

        spec = SerialSource(device=str(link))
        runner, _events, _ = await drive(_cfg(spec), core, until)
        assert seqs(core) == list(range(8))
        assert runner.statistics().reconnects_total == 1
        for m, s in ptys[1:]:
            os.close(s)
            os.close(m)

    run_virtual(main())


@pytest.mark.parametrize("speed", [0.0, 10.0])
def test_station_paces_a_replay_by_data_time(tmp_path: Path, speed: float) -> None:
    """StationRunner replays a file as fast as possible at speed 0, and paced by epoch time otherwise."""
    from ionwarden.daemon.estimator import StationSnapshot

    path = tmp_path / "r.bin"
    path.write_bytes(frames(0, 11))

    class TimedCore(StandInCore):
        def feed_frames(self, fr: object) -> list[object]:
            out = []
            for item in super().feed_frames(fr):
                seq = int.from_bytes(item[1][2:6], "big")  # type: ignore[index]
                out.append(_snapshot(1000.0 + 10.0 * seq))
            return out

    async def main() -> None:
        loop = asyncio.get_running_loop()
        t0 = loop.time()
        core = TimedCore()
        await drive(
            _cfg(FileSource(path=str(path), speed=speed)), core, lambda r, e: r.finished.is_set()
        )
        elapsed = loop.time() - t0
        if speed == 0:
            assert elapsed < 1.0
        else:
            assert 9.5 <= elapsed <= 11.0  # 100 s of data at 10x
        assert sum(isinstance(x, StationSnapshot) for x in []) == 0

    run_virtual(main())


def _snapshot(total_s: float) -> object:
    import numpy as np

    from ionwarden.daemon.estimator import SatelliteFigures, StationSnapshot
    from ionwarden.parsers import GpsTime

    e = np.zeros(0)
    sats = SatelliteFigures(
        sat=np.zeros(0, np.int16), pair=(), el_deg=e, az_deg=e, ipp_lat_deg=e, ipp_lon_deg=e,
        stec_tecu=e, vtec_tecu=e, rot_tecu_per_min=e, roti_tecu_per_min=e, iono_l1_m=e,
        if_code_m=e, if_phase_m=e, if_code_smoothed_m=e, slip=np.zeros(0, np.bool_), arc_id=np.zeros(0, np.int32),
    )  # fmt: skip
    nan = float("nan")
    return StationSnapshot(
        station="st1", time=GpsTime.from_total(2.3e9 + total_s), n_sats=0, vtec_tecu=nan,
        roti_max_tecu_per_min=nan, roti_median_tecu_per_min=nan, rot_max_abs_tecu_per_min=nan,
        gradient_mm_per_km=nan, gradient_tecu_per_km=nan, gradient_azimuth_deg=nan,
        dual_freq_fraction=nan, receiver_bias_tecu=nan, receiver_bias_sigma_tecu=nan, satellites=sats,
        cell_sat=np.zeros(0, np.int16), cell_sig=np.zeros(0, np.uint16), cell_el_deg=e,
        cell_cn0_dbhz=np.zeros(0, np.float32),
    )  # fmt: skip


def test_station_listener_waits_for_its_receiver_without_stalling() -> None:
    """StationRunner on tcp-listen stays 'listening' (no stall) until a receiver connects, then streams."""
    import socket as _socket

    from ionwarden.daemon.ingest import TcpListenSource

    with _socket.socket() as probe:  # a free port for the listener
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]

    async def main() -> None:
        core = StandInCore()
        events: list[object] = []
        changed = asyncio.Event()

        def emit(item: object) -> None:
            events.append(item)
            changed.set()

        runner = StationRunner(_cfg(TcpListenSource(host="127.0.0.1", port=port)), core, emit=emit)
        async with asyncio.TaskGroup() as tg:
            tasks = [
                tg.create_task(runner.ingest_loop(), name="daemon.ingest[st1]"),
                tg.create_task(runner.estimate_loop(), name="daemon.estimate[st1]"),
            ]
            await asyncio.sleep(60)  # virtual: six times the no-data limit
            assert runner.state is StationState.CONNECTING
            assert runner.statistics().stalls_total == 0
            _, w = await asyncio.open_connection("127.0.0.1", port)
            w.write(frames(0, 3))
            async with asyncio.timeout(30):
                while len(core.seen) < 3:
                    changed.clear()
                    await changed.wait()
            for t in tasks:
                t.cancel()
            w.close()
        assert (StationState.CONNECTING, "listening") in states(events)
        assert seqs(core) == [0, 1, 2]

    run_virtual(main())


def test_station_is_stuck_only_when_input_waits_without_progress() -> None:
    """StationRunner.is_stuck is true once queued input waited limit_s with no estimate step."""

    async def main() -> None:
        loop = asyncio.get_running_loop()
        runner = StationRunner(
            _cfg(TcpSource(host="127.0.0.1", port=9)), StandInCore(), emit=lambda _: None
        )
        now = loop.time()
        assert not runner.is_stuck(now + 100, 10)  # idle with nothing queued is healthy
        runner.queue.put_nowait(b"x")
        assert not runner.is_stuck(now + 5, 10)
        assert runner.is_stuck(now + 11, 10)

    run_virtual(main())


def test_station_reports_epoch_latency_without_replay_pacing(tmp_path: Path) -> None:
    """StationRunner reports one latency per epoch of a paced replay, excluding the pacing waits."""
    path = tmp_path / "r.bin"
    path.write_bytes(frames(0, 6))

    class TimedCore(StandInCore):
        def feed_frames(self, fr: object) -> list[object]:
            return [
                _snapshot(1000.0 + 10.0 * int.from_bytes(item[1][2:6], "big"))  # type: ignore[index]
                for item in super().feed_frames(fr)
            ]

    latencies: list[float] = []

    async def main() -> None:
        cfg = StationConfig(
            name="st1", source=FileSource(path=str(path), speed=10.0), read_size=12
        )  # one 12-byte frame per read: each chunk completes one epoch
        runner = StationRunner(
            cfg,
            TimedCore(),
            emit=lambda _i: None,
            on_latency=lambda _station, s: latencies.append(s),
        )
        async with asyncio.TaskGroup() as tg:
            tg.create_task(runner.ingest_loop(), name="daemon.ingest[st1]")
            tg.create_task(runner.estimate_loop(), name="daemon.estimate[st1]")

    run_virtual(main())
    assert len(latencies) == 6
    assert all(0.0 <= s < 0.5 for s in latencies)  # pacing waits 1 s per epoch at 10x
