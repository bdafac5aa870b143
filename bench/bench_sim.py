"""Benchmark the simulator: 24 h at 1 Hz, one station, GPS + GLONASS + Galileo + BeiDou, one core.

Prints three figures:
1. engine: every observation and truth array of the day (blocks of epochs × satellites × signals);
2. epochs: the same plus one ObsEpoch per epoch (what RINEX writers and the estimator consume);
3. stream: RTCM 3 MSM + ephemerides + 1005 + NMEA bytes, timed over ``--stream-minutes`` of the
   day and extrapolated to 24 h (``--stream-minutes 1440`` runs the whole day);
4. encoder: ``encode_msm`` alone over the ObsEpochs of those minutes (messages/s, epochs/s), with
   the layout cache warm (as in a stream) and, as a worst case, cleared before every epoch.

    .venv/bin/python bench/bench_sim.py [--hours 24] [--stream-minutes 30] [--msm 7]

Run it on an otherwise idle core for figures to quote; note contention when there is some.
"""

from __future__ import annotations

import argparse
import os
import time

from ionwarden.daemon.sim import Simulator, StreamComposer, block_epochs, build_scenario
from ionwarden.parsers import _msm_layout, encode_msm


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--stream-minutes", type=float, default=30.0)
    ap.add_argument("--msm", type=int, default=7, choices=(4, 7))
    ap.add_argument("--scenario", default="quiet-day")
    args = ap.parse_args()
    duration = args.hours * 3600.0
    print(f"cpu count {os.cpu_count()}, load average {os.getloadavg()[0]:.2f} (1 min)")

    sc = build_scenario(args.scenario, duration_s=duration, rate_hz=1.0)
    t0, c0 = time.perf_counter(), time.process_time()
    sim = Simulator(sc)
    n_epochs = n_cells = 0
    for blocks in sim.run():
        b = blocks[0]
        n_epochs += b.present.shape[0]
        n_cells += int(b.present.sum())
    t_engine, c_engine = time.perf_counter() - t0, time.process_time() - c0
    print(
        f"engine: {args.hours:g} h at 1 Hz, {sim.sats.size} satellites, {n_epochs} epochs, "
        f"{n_cells} cells: {t_engine:.2f} s wall, {c_engine:.2f} s cpu (set-up included)"
    )

    t0, c0 = time.perf_counter(), time.process_time()
    sim = Simulator(sc)
    n = 0
    for blocks in sim.run():
        for _ in block_epochs(blocks[0], 41):
            n += 1
    t_epochs, c_epochs = time.perf_counter() - t0, time.process_time() - c0
    print(f"epochs: engine + {n} ObsEpoch objects: {t_epochs:.2f} s wall, {c_epochs:.2f} s cpu")

    stream_s = min(args.stream_minutes * 60.0, duration)
    sc_s = build_scenario(args.scenario, duration_s=stream_s, rate_hz=1.0)
    sim = Simulator(sc_s)
    comp = StreamComposer(sim, 0, msm_level=args.msm)
    total = 0
    t0, c0 = time.perf_counter(), time.process_time()
    for blocks in sim.run():
        b = blocks[0]
        for e in range(b.present.shape[0]):
            total += len(comp.epoch_bytes(b, e))
    t_stream, c_stream = time.perf_counter() - t0, time.process_time() - c0
    scale = 86_400.0 / stream_s
    print(
        f"stream: {stream_s / 60:g} min of MSM{args.msm} + eph + NMEA, {total} bytes "
        f"({total / stream_s:.0f} B/s): {t_stream:.2f} s wall, {c_stream:.2f} s cpu -> "
        f"{t_stream * scale:.0f} s wall, {c_stream * scale:.0f} s cpu per 24 h"
    )

    epochs = [ep for blocks in Simulator(sc_s).run() for ep in block_epochs(blocks[0], 41)]
    n_msgs = 0
    t0, c0 = time.perf_counter(), time.process_time()
    for ep in epochs:
        n_msgs += len(encode_msm(ep, level=args.msm))
    t_enc, c_enc = time.perf_counter() - t0, time.process_time() - c0
    print(
        f"encoder: encode_msm MSM{args.msm}, {len(epochs)} epochs, {n_msgs} messages: "
        f"{t_enc:.3f} s wall, {c_enc:.3f} s cpu -> {n_msgs / c_enc:.0f} messages/s, "
        f"{len(epochs) / c_enc:.0f} epochs/s cpu ({c_enc * 86_400.0 / len(epochs):.1f} s cpu per 24 h)"
    )
    # Worst case: a new set of cells every epoch, so every call lays its messages out afresh.
    t0, c0 = time.perf_counter(), time.process_time()
    for ep in epochs:
        _msm_layout._LAYOUTS.clear()
        encode_msm(ep, level=args.msm)
    t_cold, c_cold = time.perf_counter() - t0, time.process_time() - c0
    print(
        f"encoder, layout cache cleared before every epoch: {t_cold:.3f} s wall, {c_cold:.3f} s cpu "
        f"-> {n_msgs / c_cold:.0f} messages/s, {len(epochs) / c_cold:.0f} epochs/s cpu"
    )


if __name__ == "__main__":
    main()
