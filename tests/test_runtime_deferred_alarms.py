"""The daemon evaluates a snapshot's alarms in the station's background turn, after its summary
went out (runtime/_deferred_alarms.py). The oracle is the previous code path: each snapshot
evaluated at once in the urgent step, before its summary (``_immediate`` below replays the
daemon's emit of before). The alarm events and retained states the daemon queues must equal the
oracle's byte for byte (same transitions, sequence numbers, values, times), on our simulator's
invented "demo" scenario (daemon/sim: a storm front and a jammed L2 band), with a fix between a
snapshot and its evaluation, and when the station stops or its stream ends before the background
turn. Real framer, estimator, alarms and publisher (not connected: it buffers what it is given,
which is what is compared; its clock is frozen, STYLE rule 25)."""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import json
import re
from collections.abc import Callable
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from ionwarden.daemon.config import (
    AlarmSettings,
    MqttSettings,
    PrometheusSettings,
    Settings,
    ThresholdAlarm,
)
from ionwarden.daemon.estimator import FixStatus, StationSnapshot
from ionwarden.daemon.ingest import FileSource, TcpSource
from ionwarden.daemon.outputs import Exporter, MqttPublisher
from ionwarden.daemon.runtime import StationConfig, run_virtual
from ionwarden.daemon.runtime._app import make_factory
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import gps_to_utc
from ionwarden.parsers._nmea import GgaFix, decode_sentence
from ionwarden.parsers._nmea_encode import encode_gga

from ._mqtt_support import free_port
from ._runtime_support import ScriptedServer

_NOW = dt.datetime(2026, 12, 3, 12, 0, 0, tzinfo=dt.UTC)
#: The demo's first snapshot transition: ROT raised on the epoch 60 s after the start (its 30 s
#: hold after the first arcs' ROT; found by running the scenario, checked in the tests).
ROT_EPOCH = 60


@pytest.fixture(scope="module")
def demo() -> tuple[dt.datetime, list[bytes]]:
    """The demo scenario's HARC stream, one chunk per 1 Hz epoch (MSM4 then its NMEA), 800 s:
    ROT raised at 60 s, GPS L2 C/N0 drop at 790 s (the jamming starts at 780 s)."""
    sc = build_scenario("demo", duration_s=800.0)
    return gps_to_utc(sc.start), [chunk for _, chunk in iter_stream(Simulator(sc), 0)]


def _publisher(monotonic: Callable[[], float] | None = None) -> MqttPublisher:
    # nobody listens on this port: the publisher buffers (and retries much later) what it is given
    settings = MqttSettings(
        host="127.0.0.1", port=free_port(), reconnect_initial_s=3600.0, reconnect_cap_s=3600.0
    )
    if monotonic is None:
        return MqttPublisher(settings, clock=lambda: _NOW)
    return MqttPublisher(settings, clock=lambda: _NOW, monotonic=monotonic)


def _summaries(pub: MqttPublisher) -> int:
    return sum(m.topic.value.endswith("/summary") for m in pub._buffer._epoch)


def _alarm_messages(pub: MqttPublisher) -> list[tuple[str, bytes]]:
    """Alarm events and retained alarm states queued, in order (station status left out)."""
    return [
        (m.topic.value, m.payload)
        for m in pub._buffer._alarm
        if m.topic.value.endswith("/events") or "/alarm/" in m.topic.value
    ]


def _events(messages: list[tuple[str, bytes]]) -> list[tuple[int, str, str]]:
    out = []
    for topic, payload in messages:
        if topic.endswith("/events"):
            ev = json.loads(payload)
            out.append((ev["seq"], ev["alarm"], ev["state"]))
    return out


def _satellites(pub: MqttPublisher) -> list[tuple[str, bytes]]:
    """Satellites messages queued, in order."""
    return [
        (m.topic.value, m.payload)
        for m in pub._buffer._bulk
        if m.topic.value.endswith("/satellites")
    ]


def _immediate(bundle: StationBundle, chunks: list[bytes]) -> list[tuple[str, bytes]]:
    """The oracle: the daemon's emit before the change (each snapshot's alarms at once, then its
    summary; the core's deferred part after each chunk, then the alarms' learning)."""
    return _immediate_pub(bundle, chunks)[0]


def _immediate_pub(
    bundle: StationBundle, chunks: list[bytes]
) -> tuple[list[tuple[str, bytes]], MqttPublisher]:
    """:func:`_immediate`'s alarm messages, and its publisher (the satellites messages queued
    with each summary, at once)."""
    pub = _publisher()
    alarms = bundle.alarms
    assert alarms is not None
    pub.publish_alarm_states_nowait(alarms.statuses())

    def emit(outputs: object) -> None:
        assert isinstance(outputs, (list, tuple))
        for out in outputs:
            if isinstance(out, StationSnapshot):
                pub.publish_transitions_nowait(alarms.observe_snapshot(out))
                pub.publish_snapshot_nowait(out)
            elif isinstance(out, FixStatus):
                pub.publish_transitions_nowait(alarms.observe_fix(out))

    core = bundle.core
    for chunk in chunks:
        emit(core.feed(chunk))
        emit(core.settle())
        alarms.settle()
    emit(core.end_stream())
    emit(core.settle())
    return _alarm_messages(pub), pub


def _tcp_config(port: int) -> StationConfig:
    return StationConfig(
        name="HARC", source=TcpSource(host="127.0.0.1", port=port), fingerprint="HARC"
    )


class _EpochWatch(Exporter):
    """The real exporter, also telling the test when the daemon emitted its n-th snapshot (its
    epoch-latency observation is made in the urgent step, as the snapshot is emitted)."""

    def __init__(self, n: int) -> None:
        super().__init__(PrometheusSettings(port=0), registry=CollectorRegistry())
        self.n = n
        self.reached = asyncio.Event()

    def observe_epoch_latency(self, station: str, seconds: float) -> None:
        super().observe_epoch_latency(station, seconds)
        self.n -= 1
        if self.n == 0:
            self.reached.set()


async def _one_epoch_a_second(chunks: list[bytes], w: asyncio.StreamWriter) -> None:
    for chunk in chunks:  # like a receiver: one epoch's bytes each second
        w.write(chunk)
        await w.drain()
        await asyncio.sleep(1.0)
    await asyncio.sleep(3600)


@pytest.mark.slow
def test_daemon_transitions_equal_immediate_evaluation_on_a_storm(
    demo: tuple[dt.datetime, list[bytes]], tmp_path: Path
) -> None:
    """800 s of the demo storm replayed from a file through the daemon (1 kB reads: most steps
    complete one epoch, whose evaluation waits for the background turn; some complete none or
    two) queue the same alarm messages as evaluating at once; the last ones at the end."""
    _, chunks = demo
    path = tmp_path / "harc.bin"
    path.write_bytes(b"".join(chunks))
    cfg = StationConfig(name="HARC", source=FileSource(path=str(path)), read_size=1024)
    settings = Settings()
    expected = _immediate(make_factory(settings)(cfg), chunks)

    async def main() -> MqttPublisher:
        pub = _publisher(asyncio.get_running_loop().time)
        opts = DaemonOptions(stations=(cfg,), summary_interval_s=0)
        assert await Daemon(opts, factory=make_factory(settings), publisher=pub).run() == 0
        return pub

    got = _alarm_messages(run_virtual(main(), real_poll_s=0.01))
    events = _events(expected)
    assert [e[1:] for e in events] == [
        ("rot", "active"),
        ("cn0-drop-g2", "active"),
    ]
    assert got == expected


def _with_bad_fix(chunk: bytes) -> bytes:
    """``chunk`` with its GGA's fix quality set to 0 (invalid), re-encoded (NMEA 0183 GGA)."""
    m = re.search(rb"\$GNGGA[^\r]*\r\n", chunk)
    assert m is not None
    fix = decode_sentence(m.group())
    assert isinstance(fix, GgaFix)
    bad = encode_gga(dataclasses.replace(fix, quality=0))
    return chunk[: m.start()] + bad + chunk[m.end() :]


def test_daemon_evaluates_a_pending_snapshot_before_the_fix_that_follows_it(
    demo: tuple[dt.datetime, list[bytes]],
) -> None:
    """The epoch whose snapshot raises ROT also carries an invalid GGA (fix-quality alarm with no
    hold): the fix is decoded in the station's deferred part (the NMEA after the epoch's RTCM),
    while the snapshot's evaluation waits too; ROT must still come first (seq 1, then the fix's
    seq 2), as evaluating at once gives, and the fix alarm's clearing after it."""
    start, chunks = demo
    chunks = chunks[: ROT_EPOCH + 12]
    chunks[ROT_EPOCH] = _with_bad_fix(chunks[ROT_EPOCH])
    quick = ThresholdAlarm(raise_at=0.5, clear_at=0.5, raise_after_s=0.0, clear_after_s=5.0)
    settings = Settings(alarms=AlarmSettings(fix_quality=quick))

    async def main() -> MqttPublisher:
        server = ScriptedServer(lambda _r, w: _one_epoch_a_second(chunks, w))
        async with server:
            cfg = _tcp_config(server.port)
            pub = _publisher(asyncio.get_running_loop().time)
            opts = DaemonOptions(stations=(cfg,), summary_interval_s=0)
            watch = _EpochWatch(len(chunks))
            factory = make_factory(settings, utc_now=lambda: start)
            daemon = Daemon(opts, factory=factory, publisher=pub, exporter=watch)
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await watch.reached.wait()
                await asyncio.sleep(0.5)  # its background turn
                daemon.request_stop()
        return pub

    got = _alarm_messages(run_virtual(main(), real_poll_s=0.01))
    expected = _immediate(make_factory(settings, utc_now=lambda: start)(_tcp_config(1)), chunks)
    assert _events(expected) == [
        (1, "rot", "active"),
        (2, "fix-quality", "active"),
        (3, "fix-quality", "normal"),
    ]
    assert got == expected


def _daemon_run(
    chunks: list[bytes], start: dt.datetime, *, hold_lane: bool
) -> tuple[int, int, list[tuple[int, str, str]], MqttPublisher]:
    """The daemon on ``chunks`` (one a second over TCP; the default settings); with
    ``hold_lane``, woken in the iteration after the last urgent step, before the station
    resumes for its background turn, an urgent step of the test's goes first and holds the
    lane, and the station is stopped there. The satellites messages, summaries and alarm events
    queued by then (all, without ``hold_lane``), and the publisher."""
    factory = make_factory(Settings(), utc_now=lambda: start)

    async def main() -> tuple[int, int, list[tuple[int, str, str]], MqttPublisher]:
        server = ScriptedServer(lambda _r, w: _one_epoch_a_second(chunks, w))
        async with server:
            cfg = _tcp_config(server.port)
            pub = _publisher(asyncio.get_running_loop().time)
            opts = DaemonOptions(stations=(cfg,), summary_interval_s=0)
            watch = _EpochWatch(len(chunks))
            daemon = Daemon(opts, factory=factory, publisher=pub, exporter=watch)
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await watch.reached.wait()
                if hold_lane:
                    await daemon._lane.turn()
                else:
                    await asyncio.sleep(0.5)  # its background turn
                sats, summaries = len(_satellites(pub)), _summaries(pub)
                events = _events(_alarm_messages(pub))
                daemon.request_stop()
        if hold_lane:
            daemon._lane.done()
        return sats, summaries, events, pub

    return run_virtual(main(), real_poll_s=0.01)


def test_daemon_stopping_a_station_evaluates_its_pending_snapshot(
    demo: tuple[dt.datetime, list[bytes]],
) -> None:
    """The stream stops on the epoch that raises ROT, and the station is stopped after that
    epoch's urgent step, before its background turn (the test holds the step lane): the summary
    is out, the ROT transition not yet; stopping evaluates and publishes it, as at once."""
    start, chunks = demo
    chunks = chunks[: ROT_EPOCH + 1]
    settings = Settings()
    _, summaries, events, pub = _daemon_run(chunks, start, hold_lane=True)
    evaluated = any(e[1] == "rot" for e in events)
    assert (evaluated, summaries) == (False, len(chunks))
    got = _alarm_messages(pub)
    expected = _immediate(make_factory(settings, utc_now=lambda: start)(_tcp_config(1)), chunks)
    assert _events(expected) == [(1, "rot", "active")]
    assert got == expected


def test_daemon_satellites_messages_equal_publishing_them_at_once(
    demo: tuple[dt.datetime, list[bytes]],
) -> None:
    """The satellites messages the daemon formats in each station's background turn are those
    the summary's publish would have queued at once (same payloads, same order), three of them
    in 22 s (every ``satellites_interval_s``: 10 s)."""
    start, chunks = demo
    chunks = chunks[:22]
    _, _, _, pub = _daemon_run(chunks, start, hold_lane=False)
    _, oracle = _immediate_pub(
        make_factory(Settings(), utc_now=lambda: start)(_tcp_config(1)), chunks
    )
    assert len(_satellites(oracle)) == 3  # (the simulator's demo: found by running it)
    assert _satellites(pub) == _satellites(oracle)


def test_daemon_leaves_a_due_satellites_message_for_the_background_turn(
    demo: tuple[dt.datetime, list[bytes]],
) -> None:
    """The 11th epoch's satellites message is due (10 s after the first): after that epoch's
    urgent step its summary is queued and its satellites message not yet (the lane held before
    the station's background turn); stopping the station queues it, as at once."""
    start, chunks = demo
    chunks = chunks[:11]
    sats, summaries, _, pub = _daemon_run(chunks, start, hold_lane=True)
    _, oracle = _immediate_pub(
        make_factory(Settings(), utc_now=lambda: start)(_tcp_config(1)), chunks
    )
    assert len(_satellites(oracle)) == 2
    assert (sats, summaries) == (1, len(chunks))
    assert _satellites(pub) == _satellites(oracle)
