"""Outputs bench: MQTT publish-acknowledged latency and exporter scrape time.

1. 20 stations × 1 Hz (all stations' epochs arrive together at each second, as receivers align
   epochs to the GPS second) with 40 satellites each, through Mosquitto: per epoch, the alarm
   engine and the formatting run, then the publisher queues and sends. Latency = from the snapshot
   handed to the outputs (alarm evaluation + formatting included) to the broker's PUBACK for its
   summary. Brokers: the shared one (IONWARDEN_TEST_MQTT_HOST/PORT, default 127.0.0.1:1883, run
   with mosquitto's default ``set_tcp_nodelay false``) one message at a time (``publish_window``
   1, as before pipelining), pipelined without and with the re-armed TCP_QUICKACK; then private
   brokers (tests/_mqtt_support.PrivateBroker) with the default and with ``set_tcp_nodelay true``.
2. Frame received → summary PUBACK with the real estimator pipeline: the simulator's invented
   quiet-day stream replayed as 20 stations, fed chunk by chunk (one second each) through each
   station's FramingCore + StationPipeline built as the daemon builds them (``defer``: the
   receiver-bias fit and the frames after the epoch wait for ``settle``), alarms and the
   publisher (shared broker). First with every station's frames arriving at the top of the
   second and one task per station (as the daemon runs them), without and with the daemon's
   StepLane (one step per loop iteration, urgent steps before the deferred ``settle`` steps);
   then a single loop feeding the stations in turn, all at the top of the second (settling after
   the last station) and spread over it (latency from each frame's scheduled arrival, so waiting
   behind the other stations counts).
3. Exporter: the text exposition for 20 stations × 40 satellites, in-process and over real HTTP.

Usage: .venv/bin/python bench/bench_outputs.py [--seconds 20] [--stations 20] [--sats 40]
       .venv/bin/python bench/bench_outputs.py --shards 2 [--seconds 30]  (only 2., stations split
       over processes that burst together: the latencies of all pooled)
Targets (issue 8): publish-ack p99 ≤ 10 ms; scrape ≤ 50 ms. The machine may be shared: figures are
under contention.
"""

from __future__ import annotations

import argparse
import asyncio
import functools
import multiprocessing
import os
import statistics
import sys
import tempfile
import time
import urllib.request
from collections import deque
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from prometheus_client import CollectorRegistry, generate_latest

from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.config import AlarmSettings, MqttSettings, PrometheusSettings
from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.daemon.outputs import (
    Exporter,
    MqttPublisher,
    OutboundMessage,
    _client,
    summary_payload,
)
from ionwarden.daemon.runtime import FramingCore, StepLane
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from tests._mqtt_support import PrivateBroker
from tests._outputs_support import T0, make_snapshot


def pct(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, round(q * (len(s) - 1)))]


async def bench_mqtt(
    seconds: int,
    n_stations: int,
    n_sats: int,
    *,
    host: str,
    port: int,
    label: str,
    window: int | None = None,
    quickack: bool = True,
) -> None:
    extra = {} if window is None else {"publish_window": window}
    settings = MqttSettings(host=host, port=port, topic_prefix=f"iwbench/{os.getpid()}", **extra)
    saved_quickack = _client._TCP_QUICKACK
    if not quickack:  # comparison only: the pipelined window without re-armed TCP_QUICKACK
        _client._TCP_QUICKACK = None
    submitted: dict[bytes, float] = {}
    acked: list[float] = []
    all_acks: list[float] = []

    def on_published(msg: OutboundMessage, queued_to_ack_s: float) -> None:
        all_acks.append(queued_to_ack_s)
        t0 = submitted.pop(msg.payload, None)
        if t0 is not None:
            acked.append(time.perf_counter() - t0)

    pub = MqttPublisher(settings, on_published=on_published)
    engines = [StationAlarms(f"ST{i:02d}", AlarmSettings()) for i in range(n_stations)]
    snaps = [
        [make_snapshot(f"ST{i:02d}", T0 + float(s), n=n_sats) for i in range(n_stations)]
        for s in range(seconds)
    ]
    work: list[float] = []
    async with asyncio.TaskGroup() as tg:
        tg.create_task(pub.run(), name="daemon.output[mqtt]")
        await asyncio.wait_for(pub.wait_connected(), 10)
        loop = asyncio.get_running_loop()
        start = loop.time()
        for s in range(seconds):
            await asyncio.sleep(max(0.0, start + s - loop.time()))
            for i in range(n_stations):
                snap = snaps[s][i]
                key = summary_payload(snap)  # matches the acknowledgement to this snapshot
                t0 = time.perf_counter()
                pub.publish_transitions_nowait(engines[i].observe_snapshot(snap))
                pub.publish_snapshot_nowait(snap)
                work.append(time.perf_counter() - t0)
                submitted[key] = t0
                await asyncio.sleep(0)  # each station's estimator is its own task in the daemon
            for e in engines:  # the alarms' deferred learning: the daemon's background steps
                e.settle()
        await asyncio.wait_for(pub.wait_drained(), 30)
        pub.stop()
    _client._TCP_QUICKACK = saved_quickack
    st = pub.statistics()
    ms = [x * 1e3 for x in acked]
    how = f"window {settings.publish_window}" + ("" if quickack else ", TCP_QUICKACK off")
    print(
        f"MQTT [{label}; {how}] {n_stations} stations x 1 Hz x {seconds} s, "
        f"{n_sats} sats: "
        f"{st.published_total} messages acknowledged, {st.dropped_epoch_total} dropped"
    )
    print(
        f"  snapshot -> summary PUBACK latency: n={len(ms)} p50={pct(ms, 0.5):.2f} ms "
        f"p99={pct(ms, 0.99):.2f} ms max={max(ms):.2f} ms  (target p99 <= 10 ms)"
    )
    q = [x * 1e3 for x in all_acks]
    print(
        f"  any message queued -> PUBACK: n={len(q)} p50={pct(q, 0.5):.2f} ms p99={pct(q, 0.99):.2f} ms"
    )
    w = [x * 1e6 for x in work]
    print(
        f"  outputs work per snapshot on the event loop (alarms + formatting + queue + send): "
        f"median={statistics.median(w):.0f} us p99={pct(w, 0.99):.0f} us"
    )


async def bench_outputs_work(seconds: int, n_stations: int, n_sats: int) -> None:
    """Outputs work per snapshot without the socket: alarms + formatting + queueing only (the
    publisher is not connected, so nothing is sent; with a connection the send is added)."""
    pub = MqttPublisher(MqttSettings(topic_prefix="iwbench/work", epoch_buffer=10))
    engines = [StationAlarms(f"ST{i:02d}", AlarmSettings()) for i in range(n_stations)]
    work: list[float] = []
    for s in range(seconds):
        for i in range(n_stations):
            snap = make_snapshot(f"ST{i:02d}", T0 + float(s), n=n_sats)
            t0 = time.perf_counter()
            pub.publish_transitions_nowait(engines[i].observe_snapshot(snap))
            pub.publish_snapshot_nowait(snap)
            work.append(time.perf_counter() - t0)
        for e in engines:  # deferred learning, untimed (the daemon's background steps)
            e.settle()
    w = [x * 1e6 for x in work]
    print(
        f"Outputs work per snapshot, no socket (alarms + formatting + queueing), {n_stations} "
        f"stations x {seconds} s, {n_sats} sats: median={statistics.median(w):.0f} us "
        f"p99={pct(w, 0.99):.0f} us (satellites every 10 s per station, staggered)"
    )


class _SummaryTimes:
    """Times of each station's summaries, in publish order, matched to their PUBACKs by topic: one
    connection acknowledges the QoS 1 messages of a topic in the order they were sent (MQTT 5.0
    §4.6), so the bench need not format a payload again to recognise it (that would add ~25 µs per
    station to the path it times)."""

    def __init__(self) -> None:
        self._by_topic: dict[str, deque[Any]] = {}

    def sent(self, pub: MqttPublisher, station: str, times: Any) -> None:
        topic = str(pub.topics.summary(station))
        self._by_topic.setdefault(topic, deque()).append(times)

    def acked(self, msg: OutboundMessage) -> Any:
        q = self._by_topic.get(str(msg.topic))
        return q.popleft() if q else None


def _replayed_stations(
    seconds: int, n_stations: int
) -> tuple[list[bytes], list[FramingCore], list[StationAlarms]]:
    """The simulator's invented quiet-day stream (one chunk per second) and ``n_stations``
    pipelines + alarm engines that have taken its first chunk (ephemerides, arc set-up: untimed)."""
    sc = build_scenario("quiet-day", duration_s=seconds + 1.0)
    chunks = [data for _, data in iter_stream(Simulator(sc), 0)]
    names = [f"ST{i:02d}" for i in range(n_stations)]
    # As the daemon builds them (runtime make_factory): the receiver-bias fit and the frames after
    # each epoch wait for settle(), run once the other stations' snapshots are out. (The daemon
    # also passes slack=True: the fit and the orbits ahead then wait for settle_slack() midway
    # to the next epoch; here settle() does all of the deferred work, as before.)
    pipes = [
        FramingCore(consumer=StationPipeline(n, reference_time=sc.start, defer=True), defer=True)
        for n in names
    ]
    engines = [StationAlarms(n, AlarmSettings()) for n in names]
    for p in pipes:
        p.feed(chunks[0])
        p.settle()
    return chunks, pipes, engines


async def bench_frames(
    seconds: int, n_stations: int, *, host: str, port: int, stagger: bool
) -> None:
    """Frame bytes received → estimator pipeline → alarms → summary PUBACK, on the simulator's
    invented quiet-day stream (one simulated receiver replayed as ``n_stations`` stations)."""
    chunks, pipes, engines = _replayed_stations(seconds, n_stations)
    settings = MqttSettings(host=host, port=port, topic_prefix=f"iwbench/{os.getpid()}")
    submitted = _SummaryTimes()
    acked: list[float] = []

    def on_published(msg: OutboundMessage, _queued_to_ack_s: float) -> None:
        t0 = submitted.acked(msg)
        if t0 is not None:
            acked.append(time.perf_counter() - t0)

    est: list[float] = []
    pub = MqttPublisher(settings, on_published=on_published)
    async with asyncio.TaskGroup() as tg:
        tg.create_task(pub.run(), name="daemon.output[mqtt]")
        await asyncio.wait_for(pub.wait_connected(), 10)
        loop = asyncio.get_running_loop()
        start = loop.time()
        pc_at_start = time.perf_counter()
        for s, chunk in enumerate(chunks[1:]):
            for i in range(n_stations):
                offset = i / n_stations if stagger else 0.0
                await asyncio.sleep(max(0.0, start + s + offset - loop.time()))
                # Latency counts from the frame's arrival (its scheduled time), so a station that
                # waits behind the others' estimation at the top of the second is charged for it.
                arrived = pc_at_start + s + offset
                t0 = time.perf_counter()
                for out in pipes[i].feed(chunk):
                    if isinstance(out, StationSnapshot):
                        est.append(time.perf_counter() - t0)
                        pub.publish_transitions_nowait(engines[i].observe_snapshot(out))
                        pub.publish_snapshot_nowait(out)
                        submitted.sent(pub, out.station, arrived)
                    elif isinstance(out, FixStatus):
                        pub.publish_transitions_nowait(engines[i].observe_fix(out))
                if stagger or i == n_stations - 1:
                    # the deferred parts: at once when spread, after every station's snapshot
                    # when all arrived together (as the daemon's StepLane orders them)
                    for j in (i,) if stagger else range(n_stations):
                        for out in pipes[j].settle():
                            if isinstance(out, FixStatus):
                                pub.publish_transitions_nowait(engines[j].observe_fix(out))
                        engines[j].settle()
        await asyncio.wait_for(pub.wait_drained(), 30)
        pub.stop()
    ms = [x * 1e3 for x in acked]
    e = [x * 1e3 for x in est]
    how = "spread over the second" if stagger else "all at the top of the second"
    print(
        f"Frames -> summary PUBACK [{n_stations} stations x 1 Hz x {len(chunks) - 1} s, epochs {how}, "
        f"real estimator on simulated quiet-day stream]: n={len(ms)} p50={pct(ms, 0.5):.2f} ms "
        f"p99={pct(ms, 0.99):.2f} ms; estimator per epoch median={statistics.median(e):.2f} ms"
    )


async def bench_frames_synchronized(
    seconds: int,
    n_stations: int,
    *,
    host: str,
    port: int,
    use_lane: bool = True,
    start_wall_s: float | None = None,
    label: str = "",
) -> list[float]:
    """Frames of every station arrive together at the top of each second (receivers align epochs
    to the GPS second); as in the daemon, each station's estimate step is its own task. Splits the
    frame → summary PUBACK latency into the wait behind other stations' steps (queueing), the
    station's own estimation, and snapshot → PUBACK (alarms, formatting, queueing, the MQTT path).
    ``start_wall_s``: the wall-clock time (``time.time()``) of the first burst, so that shards in
    several processes burst together. Returns the latencies (ms)."""
    chunks, pipes, engines = _replayed_stations(seconds, n_stations)
    settings = MqttSettings(host=host, port=port, topic_prefix=f"iwbench/{os.getpid()}")
    # per summary: (frame arrival, station step start, snapshot out)
    submitted = _SummaryTimes()
    rows: list[tuple[float, float, float, float]] = []  # arrival, start, snapshot, ack

    def on_published(msg: OutboundMessage, _queued_to_ack_s: float) -> None:
        t = submitted.acked(msg)
        if t is not None:
            rows.append((*t, time.perf_counter()))

    est: list[float] = []
    pub = MqttPublisher(settings, on_published=on_published)
    inboxes: list[asyncio.Queue[tuple[float, bytes] | None]] = [
        asyncio.Queue() for _ in range(n_stations)
    ]

    lane = StepLane() if use_lane else None

    async def station(i: int) -> None:
        while (item := await inboxes[i].get()) is not None:
            arrived, chunk = item
            if lane is not None:  # as StationRunner.estimate_loop does with the daemon's lane
                await lane.turn()
            t0 = time.perf_counter()
            for out in pipes[i].feed(chunk):
                if isinstance(out, StationSnapshot):
                    t1 = time.perf_counter()
                    est.append(t1 - t0)
                    pub.publish_transitions_nowait(engines[i].observe_snapshot(out))
                    pub.publish_snapshot_nowait(out)
                    submitted.sent(pub, out.station, (arrived, t0, t1))
                elif isinstance(out, FixStatus):
                    pub.publish_transitions_nowait(engines[i].observe_fix(out))
            if lane is not None:
                lane.done()
            if pipes[i].unsettled() or engines[i].unsettled():  # as StationRunner.estimate_loop
                if lane is not None:
                    await lane.turn(background=True)
                else:
                    await asyncio.sleep(0)
                for out in pipes[i].settle():
                    if isinstance(out, FixStatus):
                        pub.publish_transitions_nowait(engines[i].observe_fix(out))
                engines[i].settle()  # the alarms' deferred baseline learning
                if lane is not None:
                    lane.done()
            await asyncio.sleep(0)  # one chunk per turn, as the daemon's estimate loop

    async with asyncio.TaskGroup() as tg:
        tg.create_task(pub.run(), name="daemon.output[mqtt]")
        await asyncio.wait_for(pub.wait_connected(), 10)
        tasks = [
            tg.create_task(station(i), name=f"daemon.estimate[ST{i:02d}]")
            for i in range(len(pipes))
        ]
        loop = asyncio.get_running_loop()
        start = loop.time()
        if start_wall_s is not None:
            start += max(0.0, start_wall_s - time.time())
        for s, chunk in enumerate(chunks[1:]):
            await asyncio.sleep(max(0.0, start + s - loop.time()))
            arrived = time.perf_counter()
            for q in inboxes:
                q.put_nowait((arrived, chunk))
        for q in inboxes:
            q.put_nowait(None)
        await asyncio.gather(*tasks)
        await asyncio.wait_for(pub.wait_drained(), 30)
        pub.stop()
    ms = [(ack - arr) * 1e3 for arr, _, _, ack in rows]
    wait = [(st - arr) * 1e3 for arr, st, _, _ in rows]
    out = [(ack - snap) * 1e3 for _, _, snap, ack in rows]
    e = [x * 1e3 for x in est]
    print(
        f"Frames -> summary PUBACK [{label}{n_stations} stations x 1 Hz x {len(chunks) - 1} s, "
        f"epochs all at the top of the second, one task per station, "
        f"{'StepLane' if use_lane else 'no lane'}, real estimator]: n={len(ms)} "
        f"p50={pct(ms, 0.5):.2f} ms p99={pct(ms, 0.99):.2f} ms"
    )
    print(
        f"  of which: waiting behind other stations' steps p50={pct(wait, 0.5):.2f} ms "
        f"p99={pct(wait, 0.99):.2f} ms; own estimation median={statistics.median(e):.2f} ms; "
        f"snapshot -> summary PUBACK p50={pct(out, 0.5):.2f} ms p99={pct(out, 0.99):.2f} ms"
    )
    last: dict[float, float] = {}  # the second's last PUBACK (its 20th station)
    for (arr, _, _, _), x in zip(rows, ms, strict=True):
        last[arr] = max(last.get(arr, 0.0), x)
    per_s = sorted(last.values())
    first = min(last)
    worst = sorted(((x, round(a - first)) for a, x in last.items()), reverse=True)[:3]
    print(
        f"  last station of each second: median={statistics.median(per_s):.2f} ms, slowest "
        + ", ".join(f"{x:.1f} ms (s {k + 1})" for x, k in worst)
    )
    return ms


def _shard(args: tuple[int, int, str, int, float, int]) -> list[float]:
    seconds, n_stations, host, port, start_wall_s, k = args
    return asyncio.run(
        bench_frames_synchronized(
            seconds, n_stations, host=host, port=port, start_wall_s=start_wall_s,
            label=f"shard {k}: ",
        )
    )  # fmt: skip


def bench_frames_sharded(
    seconds: int, n_stations: int, shards: int, *, host: str, port: int
) -> None:
    """The synchronised burst with the stations split over ``shards`` processes (each its own
    event loop, lane and MQTT connection), every shard bursting at the same wall-clock second:
    whether more cores alone bring the frame → PUBACK latency down (DEVELOPERS.md, "Scaling
    further"). The latencies of all shards are pooled."""
    per = [n_stations // shards + (k < n_stations % shards) for k in range(shards)]
    start_wall_s = time.time() + 15.0  # after every shard has built its scenario
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(shards) as pool:
        parts = pool.map(
            _shard, [(seconds, n, host, port, start_wall_s, k) for k, n in enumerate(per)]
        )
    ms = [x for part in parts for x in part]
    print(
        f"Frames -> summary PUBACK [{n_stations} stations in {shards} processes ({per}), bursts "
        f"aligned, pooled]: n={len(ms)} p50={pct(ms, 0.5):.2f} ms p99={pct(ms, 0.99):.2f} ms"
    )


def bench_exporter(n_stations: int, n_sats: int, repeats: int = 50) -> None:
    from bench_exporter import build  # this directory is sys.path[0] when run as a script

    registry = CollectorRegistry()
    exp = Exporter(PrometheusSettings(port=0), registry=registry)
    exp.update(build(n_stations, n_sats))
    for i in range(n_stations):
        for _ in range(10):
            exp.observe_epoch_latency(f"ST{i:02d}", 0.004)
    body = generate_latest(registry)

    def steady(page: bytes) -> list[bytes]:  # ages are computed at scrape time
        return [ln for ln in page.splitlines() if b"last_epoch_age_seconds{" not in ln]

    assert steady(exp.exposition()[0]) == steady(body), "served page = prometheus_client's"
    t_in = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        exp.exposition()  # what /metrics serves (our writer; generate_latest is bench_exporter's)
        t_in.append((time.perf_counter() - t0) * 1e3)
    t_http = []
    with exp:
        url = f"http://127.0.0.1:{exp.port}/metrics"
        for _ in range(repeats):
            t0 = time.perf_counter()
            with urllib.request.urlopen(url, timeout=10) as resp:
                resp.read()
            t_http.append((time.perf_counter() - t0) * 1e3)
    n_lines = sum(1 for line in body.splitlines() if line and not line.startswith(b"#"))
    print(f"Exporter {n_stations} stations x {n_sats} sats: {n_lines} samples, {len(body)} bytes")
    print(f"  collect+render in-process: p50={pct(t_in, 0.5):.1f} ms p99={pct(t_in, 0.99):.1f} ms")
    print(
        f"  HTTP scrape on loopback:   p50={pct(t_http, 0.5):.1f} ms p99={pct(t_http, 0.99):.1f} ms"
        "  (target <= 50 ms)"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=int, default=20)
    ap.add_argument("--stations", type=int, default=20)
    ap.add_argument("--sats", type=int, default=40)
    ap.add_argument(
        "--shards", type=int, default=0,
        help="only the synchronised frame bench, the stations split over this many processes",
    )  # fmt: skip
    args = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs (shared machine)")
    host = os.environ.get("IONWARDEN_TEST_MQTT_HOST", "127.0.0.1")
    port = int(os.environ.get("IONWARDEN_TEST_MQTT_PORT", "1883"))
    if args.shards:
        bench_frames_sharded(args.seconds, args.stations, args.shards, host=host, port=port)
        return
    asyncio.run(bench_outputs_work(max(args.seconds, 30), args.stations, args.sats))
    run = functools.partial(bench_mqtt, args.seconds, args.stations, args.sats)
    shared = f"shared broker {host}:{port}"
    asyncio.run(run(host=host, port=port, label=shared, window=1))
    asyncio.run(run(host=host, port=port, label=shared, quickack=False))
    asyncio.run(run(host=host, port=port, label=shared))
    for extra, label in (
        ("", "private mosquitto, default set_tcp_nodelay false"),
        ("set_tcp_nodelay true\n", "private mosquitto, set_tcp_nodelay true"),
    ):
        with tempfile.TemporaryDirectory() as tmp:
            broker = PrivateBroker(Path(tmp), extra_config=extra)
            broker.start()
            try:
                asyncio.run(run(host="127.0.0.1", port=broker.port, label=label))
            finally:
                broker.stop()
    for use_lane in (False, True):
        asyncio.run(
            bench_frames_synchronized(
                args.seconds, args.stations, host=host, port=port, use_lane=use_lane
            )
        )
    for stagger in (False, True):
        asyncio.run(
            bench_frames(args.seconds, args.stations, host=host, port=port, stagger=stagger)
        )
    bench_exporter(args.stations, args.sats)


if __name__ == "__main__":
    main()
