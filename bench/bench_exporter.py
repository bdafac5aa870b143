"""Exporter bench: scrape time of the text exposition for 20 stations × 40 satellites (issue 8).

Three figures on the same invented snapshot (tests/_outputs_support.py, alarms evaluated once):

1. collect+render in-process: ``generate_latest(registry)`` — prometheus_client renders every
   family the registry holds, ours included (the path the tests and the asset checks use);
2. our exposition in-process: ``Exporter.exposition()``, the body the HTTP endpoint serves (our
   writer for the snapshot families and for the registry's other families), timed with a new
   snapshot object before every scrape (as the runtime hands one over each second) and as a
   re-scrape of an unchanged snapshot;
3. HTTP scrape on loopback: a real GET of /metrics with urllib, plain and with gzip asked for.

Usage: .venv/bin/python bench/bench_exporter.py [--stations 20] [--sats 40] [--repeats 200]
       [--profile]   (cProfile of our exposition in-process, top entries by own time)
Target (issue 8): scrape ≤ 50 ms. The machine may be shared: figures are under contention.
"""

from __future__ import annotations

import argparse
import cProfile
import dataclasses
import gc
import os
import pstats
import sys
import time
import urllib.request
from pathlib import Path
from typing import TYPE_CHECKING

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from prometheus_client import CollectorRegistry, generate_latest

from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.config import AlarmSettings, PrometheusSettings
from ionwarden.daemon.outputs import DaemonSnapshot, Exporter, IngestFigures, StationFigures
from tests._outputs_support import T0, make_snapshot

if TYPE_CHECKING:
    from collections.abc import Callable


def pct(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, round(q * (len(s) - 1)))]


def build(n_stations: int, n_sats: int) -> DaemonSnapshot:
    stations = []
    alarms = []
    for i in range(n_stations):
        name = f"ST{i:02d}"
        snap = make_snapshot(name, T0, n=n_sats)
        eng = StationAlarms(name, AlarmSettings())
        eng.observe_snapshot(snap)
        alarms += eng.statuses()
        stations.append(
            StationFigures(
                station=name,
                snapshot=snap,
                ingest=IngestFigures(bytes_total=10**6, frames_total=10**4, connected=True),
                last_epoch_monotonic_s=time.monotonic(),
                epochs_total=1000,
            )
        )
    return DaemonSnapshot(stations=tuple(stations), alarms=tuple(alarms))


def timed(fn: Callable[[], object], repeats: int) -> list[float]:
    gc.collect()  # start each series without the previous one's garbage
    out = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        out.append((time.perf_counter() - t0) * 1e3)
    return out


def line(label: str, ms: list[float]) -> str:
    return f"  {label:<44} p50={pct(ms, 0.5):6.2f} ms p99={pct(ms, 0.99):6.2f} ms"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stations", type=int, default=20)
    ap.add_argument("--sats", type=int, default=40)
    ap.add_argument("--repeats", type=int, default=200)
    ap.add_argument("--profile", action="store_true")
    args = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs (shared machine)")
    snap = build(args.stations, args.sats)
    registry = CollectorRegistry()
    exp = Exporter(PrometheusSettings(port=0), registry=registry)
    exp.update(snap)
    for i in range(args.stations):
        for _ in range(10):
            exp.observe_epoch_latency(f"ST{i:02d}", 0.004)
    body = generate_latest(registry)
    n_lines = sum(1 for ln in body.splitlines() if ln and not ln.startswith(b"#"))
    print(
        f"Exporter {args.stations} stations x {args.sats} sats: {n_lines} samples, "
        f"{len(body)} bytes"
    )

    # What is served is what prometheus_client would write (tests/test_exporter.py checks it too);
    # ages are taken at each scrape from the real clock, so those lines differ.
    def steady(text: bytes) -> list[bytes]:
        return [ln for ln in text.splitlines() if not ln.startswith(b"ionwarden_station_last_")]

    assert steady(exp.exposition()[0]) == steady(generate_latest(registry))

    def fresh() -> None:  # a new snapshot object each scrape, as the runtime hands over
        exp.update(dataclasses.replace(snap))
        exp.exposition()

    print(
        line(
            "collect+render in-process (generate_latest):",
            timed(lambda: generate_latest(registry), args.repeats),
        )
    )
    prof = cProfile.Profile() if args.profile else None
    if prof is not None:
        prof.enable()
    print(line("our exposition, new snapshot each time:", timed(fresh, args.repeats)))
    exp.update(snap)
    print(line("our exposition, unchanged snapshot:", timed(exp.exposition, args.repeats)))
    if prof is not None:
        prof.disable()
        pstats.Stats(prof).sort_stats("tottime").print_stats(18)

    with exp:
        url = f"http://127.0.0.1:{exp.port}/metrics"

        def get(gzip: bool) -> None:
            req = urllib.request.Request(url, headers={"Accept-Encoding": "gzip"} if gzip else {})
            with urllib.request.urlopen(req, timeout=10) as resp:
                resp.read()

        def get_fresh(gzip: bool) -> None:
            exp.update(dataclasses.replace(snap))
            get(gzip)

        print(
            line(
                "HTTP scrape on loopback (new snapshot):",
                timed(lambda: get_fresh(False), args.repeats),
            )
        )
        print(
            line("HTTP scrape, gzip (new snapshot):", timed(lambda: get_fresh(True), args.repeats))
        )
        print("  (target <= 50 ms)")


if __name__ == "__main__":
    main()
