"""Throughput of the rolling estimator: 40 satellites × 3 signals at 1 Hz, decode + estimate.

    .venv/bin/python bench/bench_estimator.py [--epochs N] [--rounds R] [--profile]

The input is our own invented scenario: broadcast ephemerides from the simulator's constellation
builder (GPS + Galileo + BeiDou), the 40 highest satellites over an invented site, three signals
each (G 1C/2W/5Q, E 1C/5Q/7Q, C 2I/6I/7I), code/phase from the true ranges with a smooth
ionosphere and white noise, encoded as RTCM MSM7 with our encoder. Timed, best of R rounds, one
thread:

* estimate only: ``StationEstimator.update`` over pre-decoded ``ObsEpoch`` s;
* decode only: ``StreamDecoder.feed`` over the MSM7 bytes;
* decode + estimate: ``StationPipeline.feed`` over the same bytes (what the daemon does).

The clock runs over the stream only: building the estimator and loading the navigation data (a
station's one-off start, ~8 ms here, also printed) are outside it. Each is timed over the whole run
and over its steady state, the epochs after the first 300 s: by then the 5-min ROTI window has
filled and every ring runs its steady path, as in a daemon that has run for more than 5 minutes;
the first 300 s (arcs starting, windows filling, the cold-start receiver-bias fits) cost more.

Memory: tracemalloc peak and the traced size after the first and the last third of the epochs
(no per-epoch growth means the two are equal up to noise).
"""

from __future__ import annotations

import argparse
import cProfile
import functools
import io
import os
import platform
import pstats
import time
import tracemalloc
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon.estimator import StationEstimator, StationPipeline
from ionwarden.daemon.geo import EphemerisStore, geodetic_to_ecef, satellite_geometry
from ionwarden.daemon.sim._constellation import build_constellation
from ionwarden.parsers import (
    EPOCH_DTYPES,
    GpsTime,
    ObsEpoch,
    StreamDecoder,
    carrier_frequency_hz,
    encode_msm,
    signal_code,
)

if TYPE_CHECKING:
    from collections.abc import Callable

C = 299_792_458.0
SIGNALS = {"G": ("1C", "2W", "5Q"), "E": ("1C", "5Q", "7Q"), "C": ("2I", "6I", "7I")}
T0 = GpsTime(2350, 200_000.0)
RX = geodetic_to_ecef(np.radians(46.5), np.radians(7.5), 600.0)  # invented site
#: Broadcast sets kept per satellite. The scenario hands the estimator ±4 h of ephemerides up
#: front (as ``ionwarden process`` does with a navigation file, and with as large a store); with
#: the live default of 3, Galileo's newest three sets (10-min updates) lie in the future and a
#: third of the satellites would have no orbit for most of the run (a degraded, cheaper path:
#: the figures before 2026-12-02 measured that case).
KEEP = 100


def make_scenario(n_epochs: int) -> tuple[list[object], list[ObsEpoch], bytes]:
    t0 = T0.total_s
    cons = build_constellation("GEC", 7, t0 - 3600.0, t0 + n_epochs + 3600.0)
    ephs = [e for s in cons.series.values() for group in s.ephemerides for e in group]
    store = EphemerisStore(keep_per_sat=100)
    for e in ephs:
        store.add(e)
    geo0 = satellite_geometry(t0, RX, cons.sats, store)
    sats = np.sort(cons.sats[np.argsort(-np.nan_to_num(geo0.el_rad, nan=-9.0))[:40]])
    rng = np.random.default_rng(1)
    cell_sat = np.repeat(sats, 3).astype(np.int16)
    letters = ["GRECJSI"[s // 100] for s in sats]
    cell_sig = np.array([signal_code(c) for ltr in letters for c in SIGNALS[ltr]], np.uint16)
    freq = np.array([carrier_frequency_hz(ltr, int(c[0])) for ltr in letters for c in SIGNALS[ltr]])
    n_amb = rng.integers(-500, 500, cell_sat.shape[0])
    epochs: list[ObsEpoch] = []
    for k in range(n_epochs):
        t = t0 + k
        g = satellite_geometry(t, RX, sats, store)
        rho = np.repeat(np.nan_to_num(g.range_m, nan=2.2e7), 3)
        el = np.repeat(np.nan_to_num(g.el_rad), 3)
        stec = 25.0 / np.sqrt(1.0 - (0.948 * np.cos(el)) ** 2)
        iono = 40.3e16 * stec / freq**2
        m = cell_sat.shape[0]
        arrays = {
            "sat": cell_sat,
            "sig": cell_sig,
            "pseudorange_m": rho + iono + rng.normal(0.0, 0.3, m),
            "phase_cycles": (rho - iono + rng.normal(0.0, 0.002, m)) * freq / C + n_amb,
            "range_rate_mps": np.zeros(m),
            "cn0_dbhz": np.full(m, 45.0, np.float32),
            "lock_time_s": np.full(m, 600.0 + k, np.float32),
            "lock_indicator": np.full(m, 500, np.int16),
            "half_cycle": np.zeros(m, np.bool_),
            "lli": np.zeros(m, np.uint8),
            "freq_hz": freq,
        }
        assert all(arrays[n].dtype == d for n, d in EPOCH_DTYPES.items())
        epochs.append(ObsEpoch(time=GpsTime.from_total(t), **arrays))  # type: ignore[arg-type]
    stream = b"".join(b"".join(encode_msm(ep, level=7, station_id=1)) for ep in epochs)
    nav = [e for e in ephs if abs(e.week * 604800.0 + e.toe_s - t0) < 4 * 3600.0]
    return nav, epochs, stream


#: Epochs before the steady state: the 5-min ROTI window (the longest ring) fills.
WARMUP = 300


def epoch_offsets(stream: bytes, frames_per_epoch: int) -> list[int]:
    """Byte offset of each epoch's first frame (RTCM 10403.3 §4: 0xD3, 10-bit length, CRC-24Q)."""
    offsets: list[int] = []
    pos = k = 0
    while pos < len(stream):
        if k % frames_per_epoch == 0:
            offsets.append(pos)
        pos += 6 + (((stream[pos + 1] & 0x03) << 8) | stream[pos + 2])
        k += 1
    return offsets


def best_of(rounds: int, fn: object) -> float:
    best = float("inf")
    for _ in range(rounds):
        t = time.perf_counter()
        fn()  # type: ignore[operator]
        best = min(best, time.perf_counter() - t)
    return best


def best_timed(rounds: int, fn: Callable[[], float]) -> float:
    """The shortest of ``rounds`` runs of ``fn``, which returns the seconds it timed itself."""
    return min(fn() for _ in range(rounds))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=1800)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--profile", action="store_true", help="print the top cProfile entries")
    args = ap.parse_args()
    n = args.epochs
    print(f"python {platform.python_version()} numpy {np.__version__} on {platform.machine()}, "
          f"{os.cpu_count()} CPUs (shared with other developers: figures are under contention)")  # fmt: skip
    t = time.perf_counter()
    nav, epochs, stream = make_scenario(n)
    cells = sum(len(e) for e in epochs) / n
    print(f"scenario: {n} epochs, {cells:.0f} cells/epoch (40 sats × 3 signals), "
          f"{len(stream) / n:.0f} bytes/epoch MSM7, {len(nav)} ephemerides; built in {time.perf_counter() - t:.1f} s")  # fmt: skip
    offsets = epoch_offsets(stream, len(SIGNALS))  # one MSM7 per system and epoch
    assert len(offsets) == n, (len(offsets), n)
    warm = min(WARMUP, n // 2)
    split = offsets[warm]

    def new_estimator() -> StationEstimator:
        est = StationEstimator(station="BENCH", ephemerides_per_sat=KEEP)
        est.set_receiver_position(RX, "config")
        for e in nav:
            est.add_ephemeris(e)  # type: ignore[arg-type]
        return est

    def new_pipeline() -> StationPipeline:
        p = StationPipeline(
            "BENCH", position_ecef_m=RX, reference_time=T0, ephemerides_per_sat=KEEP
        )
        p.handle(nav)
        return p

    def timed_feed(feed: object, data: bytes, lo: int = 0) -> float:
        t = time.perf_counter()
        for i in range(lo, len(data), 4096):
            feed(data[i : i + 4096])  # type: ignore[operator]
        feed(b"")  # type: ignore[operator]
        return time.perf_counter() - t

    def estimate_only(steady: bool = False) -> float:
        est = new_estimator()
        first = warm if steady else 0
        for ep in epochs[:first]:
            est.update(ep)
        t = time.perf_counter()
        for ep in epochs[first:]:
            est.update(ep)
        return time.perf_counter() - t

    def decode_only(steady: bool = False) -> float:
        d = StreamDecoder(T0)
        if steady:
            d.feed(stream[:split])
            return timed_feed(d.feed, stream[split:])
        return timed_feed(d.feed, stream)

    def decode_estimate(steady: bool = False) -> float:
        p = new_pipeline()
        if steady:
            p.feed(stream[:split])
            return timed_feed(p.feed, stream[split:])
        return timed_feed(p.feed, stream)

    check = new_pipeline()
    count = sum(len(check.feed(stream[i : i + 4096])) for i in range(0, len(stream), 4096))
    assert count + len(check.feed(b"")) == n, "every epoch must come out"
    t = time.perf_counter()
    new_pipeline()
    print(f"station start (pipeline + {len(nav)} ephemerides loaded, untimed below): "
          f"{1e3 * (time.perf_counter() - t):.1f} ms")  # fmt: skip
    for label, fn in (("estimate only", estimate_only), ("decode only", decode_only),
                      ("decode + estimate", decode_estimate)):  # fmt: skip
        whole = best_timed(args.rounds, fn)
        steady = best_timed(args.rounds, functools.partial(fn, steady=True))
        print(f"{label:18s} {n / whole:8.0f} epochs/s ({1e6 * whole / n:4.0f} µs/epoch) over all {n}; "
              f"steady state (after {warm} s) {(n - warm) / steady:6.0f} epochs/s "
              f"({1e6 * steady / (n - warm):4.0f} µs/epoch)")  # fmt: skip

    est = StationEstimator(station="BENCH", ephemerides_per_sat=KEEP)
    est.set_receiver_position(RX, "config")
    for e in nav:
        est.add_ephemeris(e)  # type: ignore[arg-type]
    third = n // 3
    for ep in epochs[:third]:
        est.update(ep)  # warm-up: rings filled, arrays allocated
    tracemalloc.start()
    for ep in epochs[third : 2 * third]:
        est.update(ep)
    mid, _ = tracemalloc.get_traced_memory()
    for ep in epochs[2 * third :]:
        est.update(ep)
    end, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"memory (tracemalloc, after warm-up): {mid / 1024:.0f} KiB at 2/3, {end / 1024:.0f} KiB at the end "
          f"(growth {(end - mid) / max(n - 2 * third, 1):.1f} B/epoch), peak {peak / 1024:.0f} KiB")  # fmt: skip

    if args.profile:
        pr = cProfile.Profile()
        pr.enable()
        decode_estimate()
        pr.disable()
        out = io.StringIO()
        pstats.Stats(pr, stream=out).sort_stats("tottime").print_stats(15)
        print(out.getvalue())


if __name__ == "__main__":
    main()
