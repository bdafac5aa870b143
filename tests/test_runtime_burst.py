"""The daemon's burst tick (runtime/_burst.py: each station's epoch of a burst held by its pipeline,
then all estimated as one ``TickBatch`` tick after the last urgent step) and the pipeline's hold.

Oracles (STYLE rule 23): our own previous path, each epoch estimated in its station's own step
(``[runtime] batch_estimates = 0``, and a ``StationPipeline`` without ``hold``), on the same
inputs: the simulator's invented quiet day and storm front (daemon/sim), different seeds and
sites per station. What the daemon queues for MQTT (every summary and satellites message, byte
for byte, in order per station) must be equal with and without the tick; the tick must have
served most epochs.
"""

from __future__ import annotations

import asyncio
import datetime as dt
from collections import defaultdict
from dataclasses import replace

import pytest

from ionwarden.daemon.config import MqttSettings, Settings
from ionwarden.daemon.estimator import StationPipeline, StationSnapshot, _tick
from ionwarden.daemon.estimator._tick import TickBatch
from ionwarden.daemon.ingest import TcpSource
from ionwarden.daemon.outputs import MqttPublisher
from ionwarden.daemon.runtime import StationConfig, run_virtual
from ionwarden.daemon.runtime._app import make_factory
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions
from ionwarden.daemon.sim import Simulator, SlipEvent, build_scenario, iter_stream
from ionwarden.parsers import ObsEpoch, gps_to_utc

from ._mqtt_support import free_port
from ._runtime_support import ScriptedServer
from .test_estimator_tick import _assert_bits
from .test_runtime_deferred_alarms import _one_epoch_a_second

_NOW = dt.datetime(2026, 12, 4, 12, 0, 0, tzinfo=dt.UTC)
SECONDS = 45


def _streams() -> tuple[dt.datetime, list[list[bytes]]]:
    """Four stations' 1 Hz streams over the same seconds: quiet days of two seeds at different
    sites, and a storm front with an early slip (arcs restart: seconds the tick leaves to each
    station's own path)."""
    out = []
    start = None
    for i in range(4):
        sc = build_scenario("storm-front" if i == 3 else "quiet-day", seed=i + 1,
                            duration_s=float(SECONDS))  # fmt: skip
        if i == 3:
            sc = replace(sc, slips=(SlipEvent(t_s=20.0, sat=-1, cycles=7),))
        sc = replace(sc, stations=(sc.stations[i % len(sc.stations)],))
        start = sc.start if start is None else start
        assert sc.start == start
        out.append([chunk for _, chunk in iter_stream(Simulator(sc), 0)])
    return gps_to_utc(start), out


def _publisher(monotonic: object) -> MqttPublisher:
    # nobody listens on this port: the publisher buffers what it is given (what is compared)
    settings = MqttSettings(
        host="127.0.0.1",
        port=free_port(),
        reconnect_initial_s=3600.0,
        reconnect_cap_s=3600.0,
        satellites_interval_s=5.0,
    )
    return MqttPublisher(settings, clock=lambda: _NOW, monotonic=monotonic)  # type: ignore[arg-type]


def _daemon_messages(batch: bool) -> tuple[dict[str, list[tuple[str, bytes]]], int, int]:
    """Per station, the epoch messages the daemon queued (topic, payload) in order, and the
    station-epochs the tick served batched and alone."""
    start, streams = _streams()
    settings = Settings()

    async def main() -> tuple[MqttPublisher, int, int]:
        servers = [
            ScriptedServer(lambda _r, w, c=chunks: _one_epoch_a_second(c, w)) for chunks in streams
        ]
        for s in servers:
            await s.__aenter__()
        try:
            cfgs = tuple(
                StationConfig(
                    name=f"ST{i}",
                    source=TcpSource(host="127.0.0.1", port=s.port),
                    fingerprint=f"ST{i}",
                )
                for i, s in enumerate(servers)
            )
            pub = _publisher(asyncio.get_running_loop().time)
            opts = DaemonOptions(
                stations=cfgs, summary_interval_s=0, batch_estimates=4 if batch else 0
            )
            daemon = Daemon(
                opts, factory=make_factory(settings, utc_now=lambda: start), publisher=pub
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(daemon.run(), name="test.daemon")
                await asyncio.sleep(SECONDS + 2.5)
                daemon.request_stop()
            burst = daemon._burst
            served = (0, 0) if burst is None else (burst.batch.served_batched,
                                                   burst.batch.served_alone)  # fmt: skip
            return pub, *served
        finally:
            for s in servers:
                await s.__aexit__(None, None, None)

    pub, batched, alone = run_virtual(main(), real_poll_s=0.01)
    by_station: dict[str, list[tuple[str, bytes]]] = defaultdict(list)
    for m in pub._buffer._epoch:
        by_station[m.topic.value.split("/")[1]].append((m.topic.value, m.payload))
    for m in pub._buffer._bulk:
        by_station[m.topic.value.split("/")[1]].append((m.topic.value, m.payload))
    return dict(by_station), batched, alone


@pytest.mark.slow
def test_daemon_with_the_burst_tick_queues_what_each_station_alone_does() -> None:
    """Four TCP stations stepping together for 45 s through the daemon: every summary and
    satellites message equal, byte for byte and in order, with and without the burst tick, and
    station-epochs served by the tick's shared core."""
    alone, _, _ = _daemon_messages(batch=False)
    batched, n_batched, n_alone = _daemon_messages(batch=True)
    assert sorted(alone) == [f"ST{i}" for i in range(4)]
    assert all(len(v) >= SECONDS - 2 for v in alone.values()), {k: len(v) for k, v in alone.items()}
    assert batched == alone
    assert n_batched + n_alone == sum(
        sum(t.endswith("/summary") for t, _ in v) for v in batched.values()
    )
    # How many share a tick depends on which of the four connections' reads land in one poll
    # of the loop (a loaded CI host spreads them); the equality above is the point, and it must
    # have covered ticks of several stations.
    assert n_batched > 0, (n_batched, n_alone)


def _outputs_per_second(pipe: StationPipeline, chunks: list[bytes]) -> list[list[object]]:
    out = []
    for chunk in chunks:
        got = list(pipe.feed(chunk))
        got += pipe.settle()
        out.append(got)
    out.append(list(pipe.feed(b"")) + list(pipe.settle()))
    return out


def test_a_held_epoch_nobody_ticks_is_estimated_at_the_next_entry() -> None:
    """A pipeline that holds its epochs for a tick that never comes loses nothing: each held
    epoch is estimated alone by the next entry (the settle after the chunk, here), its snapshot
    first, and every second's outputs are those of the pipeline without ``hold``; a checkpoint
    taken while an epoch is held keeps its snapshot for the next entry."""
    sc = build_scenario("quiet-day", duration_s=40.0)
    chunks = [chunk for _, chunk in iter_stream(Simulator(sc), 0)]
    plain = StationPipeline("A", reference_time=sc.start, defer=True, slack=True)
    held = StationPipeline("A", reference_time=sc.start, defer=True, slack=True)
    held.hold = True
    _assert_bits(_outputs_per_second(held, chunks), _outputs_per_second(plain, chunks), "hold")

    plain = StationPipeline("B", reference_time=sc.start, defer=True, slack=True)
    held = StationPipeline("B", reference_time=sc.start, defer=True, slack=True)
    held.hold = True
    want = [list(plain.feed(c)) + list(plain.settle()) for c in chunks[:10]]
    got = []
    for c in chunks[:10]:
        first = list(held.feed(c))
        assert not any(isinstance(o, StationSnapshot) for o in first)  # (held)
        held.state_dict()  # a checkpoint: estimates the held epoch, keeps its snapshot
        got.append(first + list(held.settle()))
    _assert_bits(got, want, "checkpoint")
    _assert_bits(held.state_dict(), plain.state_dict(), "state")


def test_a_station_failing_in_the_tick_leaves_the_others_their_snapshots() -> None:
    """One station's estimate raises in the tick (its station figures' step, patched to fail):
    ``TickBatch.run`` returns that exception in its place and the other stations' snapshots,
    equal bit for bit to their own path's (copies of the estimators updated alone); a failure in
    the shared core before it commits sends every station down its own path, with the same
    snapshots."""
    _, streams = _streams()
    pipes = []
    held: list[ObsEpoch | None] = [None] * 3
    for i, chunks in enumerate(streams[:3]):
        p = StationPipeline(f"S{i}", defer=True, slack=True)
        for c in chunks[:20]:
            p.feed(c)
            p.settle_slack()
        p.hold = True
        pipes.append(p)
    for k, shared_fails in ((20, False), (21, True)):
        for i, p in enumerate(pipes):
            p.feed(streams[i][k])
            held[i] = p.take_held()
        items = [(p.estimator, e) for p, e in zip(pipes, held, strict=True) if e is not None]
        assert len(items) == 3
        oracle = [est.copy().update(e) for est, e in items]
        tick = TickBatch()
        if shared_fails:
            with pytest.MonkeyPatch.context() as mp:
                mp.setattr(_tick, "_einsum", _boom)  # (before the core commits anything)
                got = tick.run(items)
            assert tick.served_alone == 3
            for g, o in zip(got, oracle, strict=True):
                _assert_bits(g, o, f"second {k}")
        else:
            with pytest.MonkeyPatch.context() as mp:
                mp.setattr(items[1][0], "_post", _boom)
                got = tick.run(items)
            assert isinstance(got[1], RuntimeError)
            _assert_bits(got[0], oracle[0], "first")
            _assert_bits(got[2], oracle[2], "third")
            assert tick.served_batched == 3  # (the failure came after the shared core)
        for p, e, g in zip(pipes, held, got, strict=True):
            if isinstance(g, StationSnapshot):
                p.finish_epoch(e, g)  # type: ignore[arg-type]
            p.settle_slack()


def _boom(*_a: object, **_k: object) -> None:
    raise RuntimeError("injected")
