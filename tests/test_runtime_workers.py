"""``[runtime] workers`` > 1: stations shared by worker processes behind one main process.

Units: the assignment (round-robin, sticky on reload), the merging of the workers' snapshots and
MQTT figures, the link's messages (a real estimator snapshot through a real socket pair). Then the
real thing: ``ionwarden run`` with two workers on four TCP "receivers" fed the simulator's invented
quiet-day stream, the local Mosquitto and a real HTTP scrape of the exporter: every station's
summaries arrive (schema-valid), one exporter serves all four stations, one health message counts
them, a killed worker is restarted and its stations resume, SIGHUP keeps every station on its
worker, SIGTERM stops everything with exit status 0 and retained "offline" statuses.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import json
import math
import os
import pickle
import re
import signal
import socket
import subprocess
import sys
import urllib.request
from pathlib import Path

import aiomqtt
import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from ionwarden.daemon.alarms import AlarmStatus, StationAlarms
from ionwarden.daemon.config import AlarmSettings, EstimatorSettings, PrometheusSettings
from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.daemon.outputs import (
    DaemonSnapshot,
    Exporter,
    IngestFigures,
    MqttStatistics,
    QueueFigures,
    StationFigures,
    health_payload,
)
from ionwarden.daemon.runtime._link import (
    REPORT_SATELLITE_FIELDS,
    Assign,
    Link,
    Notify,
    Report,
    _dumps,
)
from ionwarden.daemon.runtime._pool import (
    assign_stations,
    merge_mqtt,
    merge_snapshots,
    worker_environment,
)
from ionwarden.daemon.runtime._supervisor import tick_delay_s
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import GpsTime

from ._mqtt_support import BROKER_HOST, BROKER_PORT, need, port_open, unique_prefix
from .conftest import REPO
from .test_outputs_payloads import validate


# -- assignment ------------------------------------------------------------------------------------
def test_assignment_is_round_robin_in_config_order() -> None:
    """Stations that burst together split evenly: a, c, e | b, d."""
    assert assign_stations(["a", "b", "c", "d", "e"], 2) == (("a", "c", "e"), ("b", "d"))
    assert assign_stations(["a"], 3) == (("a",), (), ())


def test_reload_keeps_each_station_on_its_worker() -> None:
    """A kept station never moves (its checkpoint has one writer); new ones fill the emptiest."""
    before = assign_stations(["a", "b", "c", "d"], 2)  # (a, c) (b, d)
    after = assign_stations(["d", "c", "x", "y", "z"], 2, before)
    # c stays on 0, d on 1; x goes to 0 (1 each, lowest index), y to 1, z to 0
    assert after == (("c", "x", "z"), ("d", "y"))
    with pytest.raises(ValueError, match="at least 1"):
        assign_stations(["a"], 0)


# -- merging ---------------------------------------------------------------------------------------
def _mqtt(connected: bool, n: int) -> MqttStatistics:
    return MqttStatistics(
        connected=connected,
        buffered_alarm=n,
        buffered_epoch=2 * n,
        published_total=10 * n,
        dropped_epoch_total=n,
        dropped_alarm_total=0,
        connects_total=1,
        disconnects_total=n,
    )


def test_mqtt_figures_merge_as_one_connection() -> None:
    """Connected only when every connection is; counters and buffers summed."""
    m = merge_mqtt([_mqtt(True, 1), None, _mqtt(True, 2)])
    assert m == MqttStatistics(
        connected=True,
        buffered_alarm=3,
        buffered_epoch=6,
        published_total=30,
        dropped_epoch_total=3,
        dropped_alarm_total=0,
        connects_total=2,
        disconnects_total=3,
    )
    assert merge_mqtt([_mqtt(True, 1), _mqtt(False, 1)]).connected is False  # type: ignore[union-attr]
    assert merge_mqtt([None]) is None


def test_snapshots_merge_in_config_order() -> None:
    parts = [
        DaemonSnapshot(
            stations=(StationFigures(station="c"), StationFigures(station="a")),
            mqtt=_mqtt(True, 1),
        ),
        DaemonSnapshot(stations=(StationFigures(station="b"),), mqtt=_mqtt(True, 1)),
    ]
    merged = merge_snapshots(parts, order=["a", "b", "c"], mqtt=_mqtt(True, 0), started_s=5.0)
    assert [s.station for s in merged.stations] == ["a", "b", "c"]
    assert merged.started_monotonic_s == 5.0
    assert merged.mqtt is not None
    assert merged.mqtt.published_total == 20


def test_worker_environment_drops_systemd_socket_keeps_watchdog_period() -> None:
    env = worker_environment(
        {"NOTIFY_SOCKET": "/run/x", "WATCHDOG_PID": "7", "WATCHDOG_USEC": "60000000", "A": "1"}
    )
    assert env == {"WATCHDOG_USEC": "60000000", "A": "1"}


# -- the link --------------------------------------------------------------------------------------
def _real_snapshot() -> StationSnapshot:
    """The estimator's snapshot of a few minutes of the simulator's invented quiet day."""
    sc = build_scenario("quiet-day", duration_s=120.0)
    pipe = StationPipeline("LNK", EstimatorSettings())
    last: StationSnapshot | None = None
    for _t, chunk in iter_stream(Simulator(sc), 0):
        for out in pipe.feed(chunk):
            if isinstance(out, StationSnapshot):
                last = out
    assert last is not None
    return last


def _same(a: object, b: object) -> bool:
    """Equal through our records, tuples, lists and dicts: arrays with their dtype, NaN equal
    to NaN, containers and records of the same type."""
    if isinstance(a, tuple | list):
        return (
            type(a) is type(b)
            and len(a) == len(b)  # type: ignore[arg-type]
            and all(_same(x, y) for x, y in zip(a, b, strict=True))  # type: ignore[call-overload]
        )
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.dtype == b.dtype and np.array_equal(a, b, True)
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    if hasattr(a, "__slots__") and not isinstance(a, str | bytes | int | float):
        return type(a) is type(b) and all(
            _same(getattr(a, f), getattr(b, f))
            for f in type(a).__slots__  # type: ignore[attr-defined]
        )
    return a == b


def test_link_carries_reports_notifications_and_assignments_intact() -> None:
    """A real snapshot (numpy arrays, NaNs) crosses a real socket pair bit for bit."""
    snap = _real_snapshot()
    report = Report(
        DaemonSnapshot(stations=(StationFigures(station="LNK", snapshot=snap),)),
        (("LNK", 0.004),),
    )

    async def main() -> list[object]:
        a, b = socket.socketpair()
        left, right = await Link.open(a), await Link.open(b)
        left.send(Assign(("LNK", "X"), 1))
        left.send(Notify(("READY=1", "STATUS=1/1 stations streaming")))
        left.send(report)
        left.close()
        got = [await right.receive() for _ in range(4)]
        right.close()
        return got

    got = asyncio.run(main())
    assert got[0] == Assign(("LNK", "X"), 1)
    assert got[1] == Notify(("READY=1", "STATUS=1/1 stations streaming"))
    assert isinstance(got[2], Report)
    assert got[2].latencies == (("LNK", 0.004),)
    back = got[2].snapshot.stations[0].snapshot
    assert _same(snap, back)
    assert got[3] is None  # end of file: the peer closed


def _daemon_snapshot(snap: StationSnapshot) -> DaemonSnapshot:
    alarms = StationAlarms("LNK", AlarmSettings())
    alarms.observe_snapshot(snap)
    return DaemonSnapshot(
        stations=(
            StationFigures(
                station="LNK",
                snapshot=snap,
                ingest=IngestFigures(bytes_total=1234, frames_total=56, connected=True),
                last_epoch_monotonic_s=99.5,
                epochs_total=120,
            ),
            StationFigures(station="NOEPOCH"),
        ),
        alarms=alarms.statuses(),
        queues=(
            QueueFigures(
                stage="estimate", station="LNK", depth=0, capacity=256, peak=3, dropped_total=0
            ),
        ),
        mqtt=_mqtt(True, 1),
        started_monotonic_s=10.0,
    )


@pytest.mark.parametrize("per_satellite", [True, False])
def test_a_report_serves_the_same_exporter_page_and_health_as_the_full_snapshot(
    per_satellite: bool,
) -> None:
    """A report carries a slim view (only the exporter's per-satellite columns), pickled our own
    way: the main process's exporter page and health message are byte for byte those the
    one-process daemon serves from the full snapshot (equal to the one-process path)."""
    full = _daemon_snapshot(_real_snapshot())
    sent = pickle.loads(_dumps(Report(full), per_satellite))
    assert isinstance(sent, Report)

    def page(snap: DaemonSnapshot) -> bytes:
        exporter = Exporter(
            PrometheusSettings(port=0, per_satellite=per_satellite),
            registry=CollectorRegistry(),
            monotonic=lambda: 100.0,
        )
        exporter.update(snap)
        return exporter.exposition()[0]

    assert page(sent.snapshot) == page(full)
    now = dt.datetime(2026, 12, 3, 8, 0, tzinfo=dt.UTC)
    assert health_payload(sent.snapshot, now, 100.0) == health_payload(full, now, 100.0)
    assert len(sent.snapshot.alarms) == len(full.alarms)
    assert all(_same(a, b) for a, b in zip(sent.snapshot.alarms, full.alarms, strict=True))
    figs = sent.snapshot.stations[0].snapshot.satellites
    if per_satellite:  # the exporter's columns, intact
        for name in REPORT_SATELLITE_FIELDS:
            assert _same(getattr(figs, name), getattr(full.stations[0].snapshot.satellites, name))
    else:
        assert figs.sat.size == 0


@dataclasses.dataclass(frozen=True, slots=True)
class _NoFields:
    """A record without fields (pickled by reference: at module level)."""


def _previous_report_view(snapshot: DaemonSnapshot, per_satellite: bool) -> DaemonSnapshot:
    """The report's view as ``runtime/_link.py`` built it before 2026-12-03 (fifth session), copied
    as the oracle: the slim snapshot as new records (``dataclasses.replace``), then pickled whole."""
    empty_f64 = np.zeros(0)
    empty_cells = {
        "cell_sat": np.zeros(0, np.int16),
        "cell_sig": np.zeros(0, np.uint16),
        "cell_el_deg": empty_f64,
        "cell_cn0_dbhz": np.zeros(0, np.float32),
    }

    def slim(snap: StationSnapshot) -> StationSnapshot:
        figs = snap.satellites
        dropped: dict[str, object] = {}
        for f in dataclasses.fields(figs):
            if per_satellite and f.name in REPORT_SATELLITE_FIELDS:
                continue
            value = getattr(figs, f.name)
            if isinstance(value, np.ndarray):
                dropped[f.name] = value[:0] if value.dtype != np.float64 else empty_f64
            elif isinstance(value, tuple):
                dropped[f.name] = ()
        return dataclasses.replace(
            snap, satellites=dataclasses.replace(figs, **dropped), **empty_cells
        )

    return dataclasses.replace(
        snapshot,
        stations=tuple(
            st if st.snapshot is None else dataclasses.replace(st, snapshot=slim(st.snapshot))
            for st in snapshot.stations
        ),
    )


@pytest.mark.parametrize("per_satellite", [True, False])
def test_a_slim_report_equals_the_previous_view(per_satellite: bool) -> None:
    """The report's view written in the pickling pass unpickles to what the previous code's
    view (new records, then pickled) did: every record, field and array, dtypes and shapes
    included (the oracle is our own previous view code, copied above; both go through today's
    pickler and rebuild, whose field order the whole report's round trip checks). A whole report
    still carries everything, and records without fields cross too."""
    full = _daemon_snapshot(_real_snapshot())
    report = Report(full, (("LNK", 0.004),), (("LNK", 0.006),))
    now = pickle.loads(_dumps(report, per_satellite))
    view = _previous_report_view(full, per_satellite)
    before = pickle.loads(_dumps(Report(view, report.latencies, report.deliveries)))
    assert _same(now, before)
    assert _same(pickle.loads(_dumps(report)), report)
    assert len(_dumps(report, per_satellite)) < len(_dumps(report)) / 2
    dropped = now.snapshot.stations[0].snapshot.satellites.az_deg
    assert dropped.size == 0
    assert dropped.flags.writeable  # (as the previous view's were)
    assert type(pickle.loads(_dumps((_NoFields(),), per_satellite))[0]) is _NoFields


def test_alarm_statuses_and_queues_cross_as_columns() -> None:
    """A report's alarm statuses and queue figures (tuples of records of one class) are pickled
    as one tuple of values per field, not one reduce per record: they unpickle to the same
    records in the same order (a ``since`` time, NaN values, enums), and so does a tuple that
    is not all of one class, or too short, or empty."""
    full = _daemon_snapshot(_real_snapshot())
    alarms = full.alarms
    assert len(alarms) >= 4
    since = GpsTime(2400, 345600.0)
    varied = (
        dataclasses.replace(alarms[0], since=since, value=math.nan),
        *alarms[1:-1],
        dataclasses.replace(alarms[-1], pending=True, value=-0.0),
    )
    queues = (
        *full.queues,
        QueueFigures(stage="mqtt", station="", depth=2, capacity=1000, peak=9, dropped_total=4),
    )
    for snap in (
        dataclasses.replace(full, alarms=varied, queues=queues),
        dataclasses.replace(full, alarms=(*varied, full.queues[0]), queues=()),  # mixed classes
        dataclasses.replace(full, alarms=varied[:1], queues=queues[:1]),  # one record each
    ):
        data = _dumps(Report(snap), True)
        back = pickle.loads(data)
        assert _same(back.snapshot.alarms, snap.alarms)
        assert _same(back.snapshot.queues, snap.queues)
        signs = [  # (-0.0 stays negative)
            math.copysign(1.0, a.value)
            for a in (*back.snapshot.alarms, *snap.alarms)
            if isinstance(a, AlarmStatus)
        ]
        assert signs[: len(signs) // 2] == signs[len(signs) // 2 :]
        assert _same(pickle.loads(_dumps(snap)), snap)  # (a whole message too)
    # The columns are what went: one rebuild of the tuple, no reduce per status.
    standard = pickle.dumps(
        Report(dataclasses.replace(full, alarms=varied, queues=queues)), protocol=5
    )
    assert b"_rebuild_columns" in _dumps(Report(dataclasses.replace(full, alarms=varied)), True)
    assert b"_rebuild_columns" not in standard  # (the standard pickler, for contrast)
    assert b"_rebuild_columns" not in _dumps(
        Report(dataclasses.replace(full, alarms=(*varied, full.queues[0]), queues=())), True
    )


# -- the real daemon with two workers ---------------------------------------------------------------
def _children(pid: int) -> set[int]:
    out: set[int] = set()
    for task in Path(f"/proc/{pid}/task").iterdir():
        with contextlib.suppress(OSError):
            out |= {int(x) for x in (task / "children").read_text().split()}
    return out


def _config(
    path: Path, ports: list[int], names: list[str], prefix: str, prom: int, state: Path
) -> None:
    text = "".join(
        f'[[stations]]\nname = "{n}"\nsource = "tcp://127.0.0.1:{p}"\n\n'
        for n, p in zip(names, ports, strict=True)
    )
    text += (
        f'[mqtt]\nenabled = true\nhost = "{BROKER_HOST}"\nport = {BROKER_PORT}\n'
        f'topic_prefix = "{prefix}"\nclient_id = "iwtest-{os.getpid()}"\n\n'
        f'[prometheus]\nenabled = true\naddress = "127.0.0.1"\nport = {prom}\n\n'
        f'[runtime]\nstate_dir = "{state}"\nworkers = 2\nsummary_interval_s = 0\n'
    )
    path.write_text(text)


def _scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return r.read().decode()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class _Receivers:
    """TCP "receivers": each serves every connection the simulator's epochs, one per tick."""

    def __init__(self, n: int) -> None:
        sc = build_scenario("quiet-day", duration_s=600.0)
        self.chunks = [c for _t, c in iter_stream(Simulator(sc), 0)]
        self.writers: list[list[asyncio.StreamWriter]] = [[] for _ in range(n)]
        self.connects = [0] * n
        self.servers: list[asyncio.Server] = []
        self.n = n

    async def start(self) -> list[int]:
        for i in range(self.n):

            async def accepted(
                _r: asyncio.StreamReader, w: asyncio.StreamWriter, i: int = i
            ) -> None:
                self.connects[i] += 1
                w.write(self.chunks[0])  # ephemerides and the first epoch
                self.writers[i].append(w)

            self.servers.append(await asyncio.start_server(accepted, "127.0.0.1", 0))
        return [int(s.sockets[0].getsockname()[1]) for s in self.servers]

    async def feed(self, stop: asyncio.Event) -> None:
        k = 1
        while not stop.is_set():
            for ws in self.writers:
                for w in ws:
                    if not w.is_closing():
                        w.write(self.chunks[k % len(self.chunks)] if k < len(self.chunks) else b"")
            k += 1
            await asyncio.sleep(0.2)  # 5x real time: a minute of data in 12 s

    async def close(self) -> None:
        for ws in self.writers:
            for w in ws:
                w.close()
        for s in self.servers:
            s.close()


@pytest.mark.integration
@pytest.mark.slow
def test_two_workers_serve_every_station_restart_reload_and_stop(tmp_path: Path) -> None:
    need(f"MQTT broker at {BROKER_HOST}:{BROKER_PORT}", port_open(BROKER_HOST, BROKER_PORT))
    names = ["wk0", "wk1", "wk2", "wk3"]
    prefix = unique_prefix()
    prom = _free_port()
    cfg = tmp_path / "ionwarden.toml"
    log = tmp_path / "daemon.log"
    notify_path = tmp_path / "notify"  # systemd's side of sd_notify(3)
    notify = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    notify.bind(str(notify_path))
    notify.setblocking(False)
    notes: list[str] = []

    def drain() -> None:
        # Read as systemd does, as they come: the kernel queues at most
        # /proc/sys/net/unix/max_dgram_qlen datagrams (often 10) and the daemon's non-blocking
        # sends beyond that fail, so reading only at the end lost the last ones (STOPPING=1) on a
        # run long enough for a dozen watchdog pings.
        with contextlib.suppress(BlockingIOError):
            while True:
                notes.extend(notify.recv(4096).decode().split("\n"))

    async def main() -> dict[str, object]:
        asyncio.get_running_loop().add_reader(notify.fileno(), drain)
        rx = _Receivers(len(names))
        ports = await rx.start()
        _config(cfg, ports, names, prefix, prom, tmp_path / "state")
        stop_feed = asyncio.Event()
        feeder = asyncio.create_task(rx.feed(stop_feed))
        summaries: dict[str, int] = dict.fromkeys(names, 0)
        retained: dict[str, dict[str, object]] = {}
        history: list[tuple[str, object]] = []  # (station, state) of every status message
        out: dict[str, object] = {}
        async with aiomqtt.Client(BROKER_HOST, BROKER_PORT, timeout=10) as sub:
            await sub.subscribe(f"{prefix}/#", qos=1)

            async def listen() -> None:
                async for msg in sub.messages:
                    topic = msg.topic.value
                    payload = msg.payload if isinstance(msg.payload, bytes) else b""
                    if not payload:
                        continue
                    leaf = topic.split("/")[-1]
                    if leaf == "summary":
                        validate("summary", payload)
                        summaries[topic.split("/")[-2]] += 1
                    elif leaf in ("status", "health"):
                        retained[topic] = json.loads(payload)
                        if leaf == "status":
                            history.append((topic.split("/")[-2], retained[topic]["state"]))

            listener = asyncio.create_task(listen())
            env = dict(os.environ, NOTIFY_SOCKET=str(notify_path), WATCHDOG_USEC="2000000")
            with log.open("wb") as logf:
                proc = await asyncio.create_subprocess_exec(
                    sys.executable, "-m", "ionwarden.daemon.cli", "run", "--config", str(cfg),
                    stdout=logf, stderr=logf, env=env,
                )  # fmt: skip
            try:

                async def until(cond: object, timeout_s: float = 30.0) -> None:
                    async with asyncio.timeout(timeout_s):
                        while not cond():  # type: ignore[operator]
                            assert proc.returncode is None, log.read_text()
                            await asyncio.sleep(0.1)

                await until(lambda: all(summaries[n] >= 3 for n in names))
                workers = _children(proc.pid)
                out["workers"] = len(workers)
                page = ""

                def served(what: str) -> list[str]:
                    return sorted(n for n in names if f'{what}{{station="{n}"}}' in page)

                async with asyncio.timeout(20):  # the workers report once a second
                    while served("ionwarden_mqtt_summary_delivery_seconds_count") != names:
                        await asyncio.sleep(0.5)
                        page = await asyncio.to_thread(_scrape, prom)
                out["scraped"] = served("ionwarden_station_epochs_total")
                # frame → PUBACK, observed by the workers, served here
                out["delivered"] = served("ionwarden_mqtt_summary_delivery_seconds_count")
                health = f"{prefix}/_daemon/health"
                await until(  # the first ones may come before every worker reported
                    lambda: health in retained and len(retained[health]["stations"]) == 4  # type: ignore[arg-type]
                )
                validate("daemon-health", json.dumps(retained[health]).encode())
                out["health"] = retained[health]
                # a worker dies: restarted, its stations resume
                victim = min(workers)
                os.kill(victim, signal.SIGKILL)
                before = dict(summaries)
                await until(lambda: all(summaries[n] >= before[n] + 3 for n in names), 60.0)
                out["restarted"] = (
                    victim not in _children(proc.pid) and len(_children(proc.pid)) == 2
                )
                # SIGHUP with the same stations: nobody moves, everyone carries on
                proc.send_signal(signal.SIGHUP)
                before = dict(summaries)
                await until(lambda: all(summaries[n] >= before[n] + 2 for n in names))
                proc.send_signal(signal.SIGTERM)
                async with asyncio.timeout(15):
                    out["rc"] = await proc.wait()
                await asyncio.sleep(0.5)  # the retained "offline" messages
            finally:
                if proc.returncode is None:
                    proc.kill()
                    await proc.wait()
                stop_feed.set()
                await feeder
                listener.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await listener
                await rx.close()
        out["retained"] = retained
        out["history"] = history
        out["summaries"] = summaries
        return out

    try:
        out = asyncio.run(main())  # (the loop's reader goes with the loop)
        drain()
    finally:
        notify.close()
    text = log.read_text()
    assert out["rc"] == 0, text
    # only the main process speaks to systemd, for every worker (WATCHDOG_USEC=2 s: a ping a second)
    assert notes.count("READY=1") >= 2  # at start, and after the SIGHUP's RELOADING=1
    assert "RELOADING=1" in notes
    # (the run lasts 4-15 s after READY, with the kill's restart in it: at least one ping)
    assert "WATCHDOG=1" in notes
    assert any(n.startswith("STATUS=2 workers: 2/2 stations streaming") for n in notes), notes
    assert notes[-2:] == ["STOPPING=1", "STATUS=stopping"]
    assert out["workers"] == 2, text
    assert out["scraped"] == names  # one exporter serves every worker's stations
    assert out["delivered"] == names
    health = out["health"]
    assert isinstance(health, dict)
    assert len(health["stations"]) == len(names)
    assert out["restarted"], text
    assert "exited with status -9; restarting" in text
    # the killed worker's two stations: "offline" (said by the main process), then "online" again
    history = out["history"]
    assert isinstance(history, list)
    revived = {
        n
        for n in names
        if any(h == (n, "offline") and (n, "online") in history[i:] for i, h in enumerate(history))
    }
    assert len(revived) == 2, history
    retained = out["retained"]
    assert isinstance(retained, dict)
    assert retained[f"{prefix}/_daemon/status"]["state"] == "offline"
    for n in names:
        assert retained[f"{prefix}/{n}/status"]["state"] == "offline"
    assert "reload: worker" not in text  # SIGHUP with the same stations moved none
    assert "Traceback" not in text
    assert "[worker 0] " in text
    assert "[worker 1] " in text


@pytest.mark.integration
@pytest.mark.slow
def test_two_workers_replay_files_to_the_end_without_losing_an_epoch(tmp_path: Path) -> None:
    """Three file replays (the bundled demo, invented data) at full speed over two workers: each
    worker exits when its sources end, then the daemon, with status 0; every station counts every
    epoch of the capture, as the one-process daemon does."""
    demo = REPO / "daemon" / "data" / "demo.bin"
    names = ["rp0", "rp1", "rp2"]

    def run(workers: int) -> tuple[int, str, str]:
        cfg = tmp_path / f"w{workers}.toml"
        cfg.write_text(
            "".join(
                f'[[stations]]\nname = "{n}"\nsource = "file://{demo}?speed=0"\n' for n in names
            )
            + "[mqtt]\nenabled = false\n[prometheus]\nenabled = false\n"
            + f'[runtime]\nstate_dir = "{tmp_path / "state"}"\nworkers = {workers}\n'
            + "checkpoint_interval_s = 0\n"
        )
        done = subprocess.run(
            [sys.executable, "-m", "ionwarden.daemon.cli", "run", "--config", str(cfg)],
            capture_output=True,
            text=True,
            timeout=150,
            check=False,
        )
        return done.returncode, done.stdout, done.stderr

    def epochs(stdout: str) -> dict[str, str]:
        got = {}
        for line in stdout.splitlines():
            name = line.split(" ", 1)[0]
            if name in names:
                got[name] = re.search(r"epochs (\d+)", line).group(1)  # type: ignore[union-attr]
        return got

    rc2, out2, err2 = run(2)
    assert rc2 == 0, err2
    assert "every worker's sources have ended" in err2
    assert "[worker 0] " in err2
    assert "[worker 1] " in err2
    rc1, out1, err1 = run(1)
    assert rc1 == 0, err1
    assert epochs(out2) == epochs(out1)
    assert set(epochs(out2)) == set(names)
    assert all(int(v) > 1000 for v in epochs(out2).values())  # demo.md: 1,200 epochs


def test_status_tick_aims_midway_between_bursts() -> None:
    """The tick lands half an interval after the latest epoch, never within a quarter interval."""
    assert tick_delay_s(10.1, None, 1.0) == 1.0  # no epoch yet: a plain interval
    assert tick_delay_s(10.1, 10.0, 1.0) == pytest.approx(0.4)
    assert tick_delay_s(10.4, 10.0, 1.0) == pytest.approx(1.1)  # too close: the next midpoint
    assert tick_delay_s(12.3, 10.0, 1.0) == pytest.approx(1.2)  # epochs stopped: same phase
    assert tick_delay_s(10.0, 10.0, 2.0) == pytest.approx(1.0)
