"""The supervisor end to end on a virtual clock: 20 stations at 1 Hz over loopback TCP, systemd
notifications on a real AF_UNIX datagram socket, SIGHUP reload, SIGTERM stop, checkpoints."""

from __future__ import annotations

import asyncio
import datetime as dt
import os
import random
import signal
import socket
from pathlib import Path
from typing import Any

import pytest

from ionwarden.daemon.ingest import FileSource, TcpSource
from ionwarden.daemon.runtime import (
    SdNotifier,
    StallLimits,
    StationConfig,
    StationState,
    run_virtual,
)
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle

from ._runtime_support import ScriptedServer, StandInCore, rtcm_frame

N_STATIONS = 20


async def _one_hz(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
    i = 0
    while True:
        w.write(rtcm_frame(1077, i.to_bytes(4, "big")))
        await w.drain()
        i += 1
        await asyncio.sleep(1.0)


class Fleet:
    """N loopback 'receivers', each sending one numbered 1077 frame per (virtual) second."""

    def __init__(self, n: int):
        self.servers = [ScriptedServer(_one_hz) for _ in range(n)]

    async def __aenter__(self) -> Fleet:
        for s in self.servers:
            await s.__aenter__()
        return self

    async def __aexit__(self, *exc: object) -> None:
        for s in self.servers:
            await s.__aexit__(*exc)

    def ports(self) -> list[int]:
        return [s.port for s in self.servers]


def _station(name: str, port: int, **kw: object) -> StationConfig:
    return StationConfig(
        name=name,
        source=TcpSource(host="127.0.0.1", port=port),
        stall=StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60),
        queue_size=64,
        fingerprint=f"{name}:{port}",
        **kw,  # type: ignore[arg-type]
    )


def _factory(cores: dict[str, StandInCore]):
    def build(cfg: StationConfig) -> StationBundle:
        core = StandInCore()
        cores[cfg.name] = core
        return StationBundle(core=core, produces_epochs=False)

    return build


@pytest.fixture
def notify_socket(tmp_path: Path):
    """A real AF_UNIX datagram socket standing in for systemd's notify socket."""
    path = tmp_path / "notify"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))
    sock.setblocking(False)
    yield path, sock
    sock.close()


def _drain(sock: socket.socket) -> list[str]:
    out = []
    while True:
        try:
            out.append(sock.recv(4096).decode())
        except BlockingIOError:
            return out


@pytest.mark.integration
def test_daemon_runs_20_stations_without_queue_growth(notify_socket, tmp_path: Path) -> None:
    """Daemon streams 20 stations at 1 Hz for a minute: every epoch arrives, queues stay shallow."""
    path, sock = notify_socket

    async def main() -> None:
        loop = asyncio.get_running_loop()
        cores: dict[str, StandInCore] = {}
        async with Fleet(N_STATIONS) as fleet:
            opts = DaemonOptions(
                stations=tuple(_station(f"st{i:02d}", p) for i, p in enumerate(fleet.ports())),
                summary_interval_s=0,
            )
            daemon = Daemon(opts, factory=_factory(cores), notifier=SdNotifier(str(path)))
            async with asyncio.TaskGroup() as tg:
                run = tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                msgs = _drain(sock)
                assert any(m.startswith("READY=1") for m in msgs)
                t0 = loop.time()
                await asyncio.sleep(60)
                stats = daemon.statistics()
                daemon.request_stop()
            assert run.result() == 0
            assert loop.time() - t0 < 65
        assert len(stats) == N_STATIONS
        for st in stats:
            assert st.state is StationState.STREAMING, st
            assert st.queue.peak <= 2
            assert st.queue.dropped_total == 0
            assert st.decoder.frames_total >= 60
        for core in cores.values():
            seq = [int.from_bytes(p[2:6], "big") for p in core.seen]
            assert seq == list(range(len(seq)))  # nothing lost, nothing reordered
        msgs = _drain(sock)
        assert any("STATUS=20/20 stations streaming" in m for m in msgs)
        assert msgs[-1].startswith("STATUS=") or "STOPPING=1" in "".join(msgs)

    run_virtual(main(), real_poll_s=0.01)


def test_daemon_reload_restarts_only_changed_stations(notify_socket) -> None:
    """Daemon on SIGHUP stops removed or changed stations, starts new ones, leaves the rest running."""
    path, sock = notify_socket

    async def main() -> None:
        cores: dict[str, StandInCore] = {}
        async with Fleet(4) as fleet:
            p = fleet.ports()
            first = DaemonOptions(
                stations=(_station("a", p[0]), _station("b", p[1]), _station("c", p[2])),
                summary_interval_s=0,
            )
            second = DaemonOptions(
                stations=(_station("a", p[0]), _station("b", p[3]), _station("d", p[2])),
                summary_interval_s=0,
            )
            daemon = Daemon(
                first,
                factory=_factory(cores),
                notifier=SdNotifier(str(path)),
                reload=lambda: second,
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(5)
                core_a, core_b = cores["a"], cores["b"]
                os.kill(os.getpid(), signal.SIGHUP)
                await asyncio.sleep(5)
                names = [s.station for s in daemon.statistics()]
                assert names == ["a", "b", "d"]
                assert cores["a"] is core_a  # untouched
                assert cores["b"] is not core_b  # its source changed: restarted
                assert len(core_a.seen) >= 9
                os.kill(os.getpid(), signal.SIGTERM)
        msgs = _drain(sock)
        assert any(m.startswith("RELOADING=1") for m in msgs)
        assert any("STOPPING=1" in m for m in msgs)

    run_virtual(main())


def test_daemon_stops_on_sigterm_within_the_budget(notify_socket) -> None:
    """Daemon stops all stations and returns 0 promptly after SIGTERM."""
    path, _sock = notify_socket

    async def main() -> None:
        loop = asyncio.get_running_loop()
        async with Fleet(2) as fleet:
            p = fleet.ports()
            opts = DaemonOptions(
                stations=(_station("a", p[0]), _station("b", p[1])), summary_interval_s=0
            )
            daemon = Daemon(opts, factory=_factory({}), notifier=SdNotifier(str(path)))
            async with asyncio.TaskGroup() as tg:
                run = tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(3)
                t0 = loop.time()
                os.kill(os.getpid(), signal.SIGTERM)
            assert run.result() == 0
            assert loop.time() - t0 < 5.0
            assert daemon.statistics() == ()

    run_virtual(main())


def test_daemon_checkpoints_and_restores_station_state(tmp_path: Path) -> None:
    """Daemon writes each station's state at stop and restores it on the next start when valid."""
    cap = tmp_path / "cap.bin"
    cap.write_bytes(b"".join(rtcm_frame(1077, i.to_bytes(4, "big")) for i in range(7)))
    cfg = StationConfig(name="base", source=FileSource(path=str(cap), speed=0), fingerprint="fp1")
    state_dir = tmp_path / "state"

    async def once(cfg: StationConfig, now: float) -> StandInCore:
        cores: dict[str, StandInCore] = {}
        opts = DaemonOptions(
            stations=(cfg,), state_dir=state_dir, summary_interval_s=0, checkpoint_max_age_s=3600
        )
        daemon = Daemon(opts, factory=_factory(cores), wall_clock=lambda: now)
        assert await daemon.run() == 0  # the replay ends: the daemon stops by itself
        return cores["base"]

    first = run_virtual(once(cfg, 1000.0))
    assert first.state == {"arcs": 7}
    assert (state_dir / "checkpoint-base.npz").is_file()
    second = run_virtual(once(cfg, 2000.0))
    assert second.state == {"arcs": 14}  # restored 7, then replayed 7 more
    stale = run_virtual(once(cfg, 2000.0 + 7200.0))
    assert stale.state == {"arcs": 7}  # too old: not restored
    changed = run_virtual(
        once(StationConfig(name="base", source=cfg.source, fingerprint="fp2"), 9300.0)
    )
    assert changed.state == {"arcs": 7}  # config changed: not restored


def test_daemon_summary_lines_are_printed_per_station() -> None:
    """Daemon prints one summary line per station at each summary interval."""
    lines: list[str] = []

    async def main() -> None:
        async with Fleet(2) as fleet:
            p = fleet.ports()
            opts = DaemonOptions(
                stations=(_station("a", p[0]), _station("b", p[1])),
                summary_interval_s=10,
                status_interval_s=5,
            )
            daemon = Daemon(opts, factory=_factory({}), summary=lines.append)
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(25)
                daemon.request_stop()

    run_virtual(main(), real_poll_s=0.02)
    assert len(lines) == 4
    assert lines[0].startswith("a ")
    assert lines[1].startswith("b ")
    assert "streaming" in lines[2]
    assert "frames" in lines[2]


def test_sd_notifier_is_silent_without_notify_socket(monkeypatch: pytest.MonkeyPatch) -> None:
    """SdNotifier does nothing (and does not fail) when $NOTIFY_SOCKET is unset."""
    monkeypatch.delenv("NOTIFY_SOCKET", raising=False)
    n = SdNotifier()
    assert not n.enabled
    n.notify("READY=1")
    assert n.sent == ["READY=1"]


def test_sd_notifier_reaches_an_abstract_socket() -> None:
    """SdNotifier sends to an abstract-namespace socket named with a leading '@'."""
    name = f"ionwarden-test-{os.getpid()}-{random.Random().randrange(1 << 30)}"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
        sock.bind("\0" + name)
        n = SdNotifier("@" + name)
        n.notify("READY=1", "STATUS=ok")
        assert sock.recv(100) == b"READY=1\nSTATUS=ok"
        n.close()


def test_watchdog_interval_is_half_of_watchdog_usec() -> None:
    """watchdog_interval_s returns WatchdogSec/2 for this process, and None when off or foreign."""
    from ionwarden.daemon.runtime import watchdog_interval_s

    assert watchdog_interval_s({"WATCHDOG_USEC": "20000000"}) == 10.0
    assert (
        watchdog_interval_s({"WATCHDOG_USEC": "20000000", "WATCHDOG_PID": str(os.getpid())}) == 10.0
    )
    assert watchdog_interval_s({"WATCHDOG_USEC": "20000000", "WATCHDOG_PID": "1"}) is None
    assert watchdog_interval_s({}) is None


def test_daemon_pings_the_watchdog_while_pipelines_progress(notify_socket, monkeypatch) -> None:
    """Daemon sends WATCHDOG=1 every half WatchdogSec while no station's pipeline is stuck."""
    path, sock = notify_socket
    monkeypatch.setenv("WATCHDOG_USEC", "2000000")  # WatchdogSec=2s → ping every 1 s
    monkeypatch.delenv("WATCHDOG_PID", raising=False)

    async def main() -> None:
        async with Fleet(1) as fleet:
            opts = DaemonOptions(stations=(_station("a", fleet.ports()[0]),), summary_interval_s=0)
            daemon = Daemon(opts, factory=_factory({}), notifier=SdNotifier(str(path)))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(6.5)
                daemon.request_stop()

    run_virtual(main())
    pings = [m for m in _drain(sock) if m == "WATCHDOG=1"]
    assert 5 <= len(pings) <= 7


@pytest.mark.integration
def test_daemon_feeds_the_exporter_real_scrape() -> None:
    """Daemon's ingest counters appear in a real HTTP scrape of the Prometheus exporter."""
    import urllib.request

    from prometheus_client import CollectorRegistry

    from ionwarden.daemon.config import PrometheusSettings
    from ionwarden.daemon.outputs import Exporter
    from ionwarden.daemon.runtime._app import build_daemon_snapshot

    async def main() -> str:
        loop = asyncio.get_running_loop()
        async with Fleet(1) as fleet:
            exporter = Exporter(
                PrometheusSettings(address="127.0.0.1", port=0),
                registry=CollectorRegistry(),
                monotonic=loop.time,
            )
            opts = DaemonOptions(stations=(_station("a", fleet.ports()[0]),), summary_interval_s=0)
            daemon = Daemon(
                opts,
                factory=_factory({}),
                exporter=exporter,
                build_snapshot=lambda d, stats: build_daemon_snapshot(d, None, 0.0, stats),
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(3)
                url = f"http://127.0.0.1:{exporter.port}/metrics"
                body = await asyncio.to_thread(
                    lambda: urllib.request.urlopen(url, timeout=10).read().decode()
                )
                daemon.request_stop()
        return body

    body = run_virtual(main())
    import re

    m = re.search(r'ionwarden_ingest_bytes_total\{station="a"\} (\d+(\.\d+)?)', body)
    assert m, body[:2000]
    assert float(m.group(1)) > 0
    assert 'ionwarden_ingest_connected{station="a"} 1.0' in body
    assert re.search(r'ionwarden_queue_capacity\{stage="estimator",station="a"\} 64', body)


def test_daemon_garbage_flood_on_one_station_does_not_starve_another() -> None:
    """Daemon keeps a 1 Hz station on time while another station's receiver spews 20 MB of noise."""
    noise = random.Random(5).randbytes(1 << 20)  # common practice: seeded noise

    async def spew(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        for _ in range(20):
            w.write(noise)
            await w.drain()
        await asyncio.sleep(3600)

    async def main() -> None:
        loop = asyncio.get_running_loop()
        cores: dict[str, StandInCore] = {}
        async with Fleet(1) as fleet, ScriptedServer(spew) as bad:
            opts = DaemonOptions(
                stations=(_station("good", fleet.ports()[0]), _station("noisy", bad.port)),
                summary_interval_s=0,
            )
            daemon = Daemon(opts, factory=_factory(cores))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                t0 = loop.time()
                while True:
                    noisy = next(s for s in daemon.statistics() if s.station == "noisy")
                    if noisy.bytes_total >= 20 << 20 and noisy.queue.depth == 0:
                        break
                    await asyncio.sleep(1.0)
                elapsed = loop.time() - t0
                good = next(s for s in daemon.statistics() if s.station == "good")
                daemon.request_stop()
        assert noisy.decoder.discarded_bytes_total + noisy.queue.dropped_total * 65536 >= 19 << 20
        seq = [int.from_bytes(p[2:6], "big") for p in cores["good"].seen]
        assert seq == list(range(len(seq)))  # no frame of the good station lost
        assert len(seq) >= int(elapsed) - 1  # and it kept pace at 1 Hz throughout
        assert good.queue.dropped_total == 0

    run_virtual(main())


def test_daemon_raises_the_stream_stall_alarm_for_a_silent_station() -> None:
    """Daemon feeds each station's stall age to its alarms: a silent source raises stream-stall."""
    import datetime as dt

    from ionwarden.daemon.alarms import AlarmKind, AlarmState, StationAlarms
    from ionwarden.daemon.config import AlarmSettings

    async def silent(_r: asyncio.StreamReader, _w: asyncio.StreamWriter) -> None:
        await asyncio.sleep(3600)

    alarms = StationAlarms("quiet", AlarmSettings())

    def build(cfg: StationConfig) -> StationBundle:
        return StationBundle(core=StandInCore(), produces_epochs=False, alarms=alarms)

    async def main() -> None:
        async with ScriptedServer(silent) as rx:
            opts = DaemonOptions(
                stations=(_station("quiet", rx.port),), summary_interval_s=0, status_interval_s=5
            )
            daemon = Daemon(
                opts,
                factory=build,
                utc_now=lambda: dt.datetime(2026, 3, 18, 13, 30, tzinfo=dt.UTC),
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(90)  # virtual: past the default 30 s stall threshold
                daemon.request_stop()

    run_virtual(main())
    stall = next(s for s in alarms.statuses() if s.kind is AlarmKind.STREAM_STALL)
    assert stall.state is AlarmState.ACTIVE


def _checkpointing(port: int, state: Path) -> DaemonOptions:
    """One station "a" on ``port``, checkpoints to ``state`` every 10 s."""
    return DaemonOptions(
        stations=(_station("a", port),),
        state_dir=state,
        checkpoint_interval_s=10,
        summary_interval_s=0,
        status_interval_s=5,
    )


def test_daemon_checkpoints_periodically_while_running(tmp_path: Path) -> None:
    """Daemon writes each station's checkpoint every checkpoint_interval_s, not only at stop."""
    state = tmp_path / "state"

    async def main() -> None:
        async with Fleet(1) as fleet:
            opts = _checkpointing(fleet.ports()[0], state)
            daemon = Daemon(opts, factory=_factory({}))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(12)
                assert (state / "checkpoint-a.npz").is_file()  # written while running
                daemon.request_stop()

    run_virtual(main(), real_poll_s=0.02)


def test_status_tick_waits_for_the_stations_urgent_steps() -> None:
    """The 1 Hz status tick (a snapshot of every station for the exporter and the health
    message) is a background step of the daemon's StepLane: while urgent steps hold the lane (a
    burst of epochs at the top of the second) it waits, then runs."""
    ticks: list[float] = []

    async def main() -> None:
        from ionwarden.daemon.outputs import DaemonSnapshot

        def snapshot(_d: Daemon, _stats: object) -> DaemonSnapshot:
            ticks.append(asyncio.get_running_loop().time())
            return DaemonSnapshot()

        async with Fleet(1) as fleet:
            opts = DaemonOptions(
                stations=(_station("a", fleet.ports()[0]),),
                summary_interval_s=0,
                status_interval_s=1,
            )
            daemon = Daemon(opts, factory=_factory({}), build_snapshot=snapshot)
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(2.5)
                assert len(ticks) >= 2  # ticking (the first snapshot is the one at start)
                lane = daemon._lane
                await lane.turn()  # an urgent step that holds the lane for 3 s
                held = len(ticks)
                await asyncio.sleep(3)
                assert len(ticks) == held  # no tick while the urgent step runs
                lane.done()
                await asyncio.sleep(1.5)
                assert len(ticks) > held  # the tick that waited, then the next ones
                daemon.request_stop()

    run_virtual(main(), real_poll_s=0.02)


def test_status_tick_takes_each_stations_statistics_once(monkeypatch: pytest.MonkeyPatch) -> None:
    """A status tick (exporter snapshot, stall alarms, status line, summary lines) reads every
    station's statistics once and hands the same records to the snapshot builder: building them
    (several frozen records a station) was done three times a tick."""
    from ionwarden.daemon.runtime._station import StationRunner

    calls: list[str] = []
    handed: list[tuple[object, ...]] = []
    original = StationRunner.statistics

    def counted(self: StationRunner) -> Any:
        calls.append(self.name)
        return original(self)

    monkeypatch.setattr(StationRunner, "statistics", counted)

    async def main() -> None:
        from ionwarden.daemon.outputs import DaemonSnapshot

        def snapshot(_d: Daemon, stats: object) -> DaemonSnapshot:
            handed.append(tuple(stats))  # type: ignore[call-overload]
            return DaemonSnapshot()

        async with Fleet(2) as fleet:
            opts = DaemonOptions(
                stations=tuple(_station(n, p) for n, p in zip("ab", fleet.ports(), strict=True)),
                summary_interval_s=1,
                status_interval_s=1,
            )
            daemon = Daemon(
                opts,
                factory=_factory({}),
                build_snapshot=snapshot,
                summary=lambda _line: None,
                utc_now=lambda: dt.datetime(2026, 12, 3, tzinfo=dt.UTC),
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                calls.clear()
                handed.clear()
                await asyncio.sleep(5.5)
                ticks, n_calls = list(handed), len(calls)
                daemon.request_stop()
        assert len(ticks) >= 4
        assert n_calls == 2 * len(ticks)  # one per station per tick
        assert all(tuple(st.station for st in h) == ("a", "b") for h in ticks)

    run_virtual(main(), real_poll_s=0.02)


def test_daemon_keeps_running_when_a_checkpoint_cannot_be_written(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A state directory that cannot be written (here a file stands where it should be) costs
    the checkpoints, logged per station, never the daemon: periodic saves and the one at stop."""
    state = tmp_path / "state"
    state.write_text("not a directory")
    result: list[int] = []

    async def main() -> None:
        async with Fleet(1) as fleet:
            opts = _checkpointing(fleet.ports()[0], state)
            daemon = Daemon(opts, factory=_factory({}))
            async with asyncio.TaskGroup() as tg:
                run = tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(25)  # two periodic attempts
                daemon.request_stop()
                result.append(await run)

    with caplog.at_level("ERROR", logger="ionwarden.daemon.runtime"):
        run_virtual(main(), real_poll_s=0.02)
    assert result == [0]
    failures = [r for r in caplog.records if "checkpoint not written" in r.getMessage()]
    assert len(failures) >= 3  # two periodic saves and the one at stop
    assert state.read_text() == "not a directory"


def test_daemon_publishes_retained_alarm_states_for_stations_started_by_a_reload(
    tmp_path: Path,
) -> None:
    """Daemon queues every alarm's retained state when a station starts, at start and on reload."""
    from ionwarden.daemon.alarms import StationAlarms
    from ionwarden.daemon.config import AlarmSettings, MqttSettings
    from ionwarden.daemon.outputs import MqttPublisher

    from ._mqtt_support import free_port

    path = tmp_path / "a.bin"
    path.write_bytes(rtcm_frame(1077, bytes(4)))

    def cfg(name: str) -> StationConfig:
        return StationConfig(name=name, source=FileSource(path=str(path)), fingerprint=name)

    def factory(c: StationConfig) -> StationBundle:
        alarms = StationAlarms(c.name, AlarmSettings())
        return StationBundle(core=StandInCore(), produces_epochs=False, alarms=alarms)

    per_station = len(StationAlarms("x", AlarmSettings()).statuses())

    async def main() -> tuple[int, int]:
        loop = asyncio.get_running_loop()
        # nobody listens on this port: the publisher buffers (and retries) what it is given
        settings = MqttSettings(host="127.0.0.1", port=free_port(), reconnect_initial_s=30.0)
        publisher = MqttPublisher(settings, monotonic=loop.time)
        opts = DaemonOptions(
            stations=(cfg("a"),), summary_interval_s=0, exit_when_sources_end=False
        )
        second = DaemonOptions(
            stations=(cfg("a"), cfg("b")), summary_interval_s=0, exit_when_sources_end=False
        )
        daemon = Daemon(opts, factory=factory, publisher=publisher, reload=lambda: second)
        async with asyncio.TaskGroup() as tg:
            tg.create_task(daemon.run(), name="test.daemon")
            await daemon.ready.wait()
            at_start = publisher.statistics().buffered_alarm
            daemon.request_reload()
            await asyncio.sleep(1)
            after_reload = publisher.statistics().buffered_alarm
            daemon.request_stop()
        return at_start, after_reload

    at_start, after_reload = run_virtual(main())
    assert (at_start, after_reload) == (per_station, 2 * per_station)


class _PickyCore(StandInCore):
    def load_state_dict(self, state: Any) -> None:
        raise ValueError("unknown estimator state version 99")


def test_daemon_ignores_unusable_checkpoint(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """Daemon starts the station fresh, with one warning, when its checkpoint cannot be loaded."""
    cap = tmp_path / "cap.bin"
    cap.write_bytes(b"".join(rtcm_frame(1077, i.to_bytes(4, "big")) for i in range(3)))
    cfg = StationConfig(name="base", source=FileSource(path=str(cap), speed=0), fingerprint="fp1")
    state_dir = tmp_path / "state"

    async def once(core_cls: type[StandInCore]) -> StandInCore:
        cores: dict[str, StandInCore] = {}

        def build(c: StationConfig) -> StationBundle:
            cores[c.name] = core_cls()
            return StationBundle(core=cores[c.name], produces_epochs=False)

        opts = DaemonOptions(
            stations=(cfg,), state_dir=state_dir, summary_interval_s=0, checkpoint_max_age_s=3600
        )
        daemon = Daemon(opts, factory=build, wall_clock=lambda: 1000.0)
        assert await daemon.run() == 0
        return cores["base"]

    run_virtual(once(StandInCore))  # writes a checkpoint
    picky = run_virtual(once(_PickyCore))
    assert picky.state == {"arcs": 3}  # started fresh and replayed the capture
    assert any("ignoring unusable checkpoint" in r.getMessage() for r in caplog.records)
