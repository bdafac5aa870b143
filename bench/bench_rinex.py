"""RINEX observation reader throughput: ionwarden vs georinex on the same files, in one run.

Files: the real P433 RINEX 3.03 file (../shared/data/real/rinex, 70 epochs) and its Hatanaka
.crx.bz2, plus a synthetic RINEX 3.04 file written by our own writer (invented station "IWSIM",
random values, 32 satellites, G/R/E/C) so the comparison also runs on a longer file.

    .venv/bin/python bench/bench_rinex.py [--epochs 600] [--repeat 5]

Prints epochs/s for each reader and the ratio (target: ours ≥ 10× georinex). Figures depend on
the machine and on other load; the build machine's 2 cores are shared.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings
from pathlib import Path
from types import MappingProxyType

import numpy as np

from ionwarden.parsers import (
    GpsTime,
    ObsEpoch,
    RinexObsHeader,
    frequencies_hz,
    iter_rinex_obs,
    sat_id,
    signal_code,
    write_rinex_obs,
)

REPO = Path(__file__).resolve().parents[1]
REAL = REPO.parent / "shared" / "data" / "real" / "rinex"
P433 = REAL / "P43300USA_R_20190012056_17M_15S_MO.rnx"
P433_CRX = REAL / "P43300USA_R_20190012056_17M_15S_MO.crx.bz2"
C_MPS = 299_792_458.0

OBS_TYPES = {
    "G": ("C1C", "L1C", "D1C", "S1C", "C2W", "L2W", "S2W", "C5Q", "L5Q", "S5Q"),
    "R": ("C1C", "L1C", "D1C", "S1C", "C2C", "L2C", "S2C"),
    "E": ("C1C", "L1C", "S1C", "C5Q", "L5Q", "S5Q", "C7Q", "L7Q", "S7Q"),
    "C": ("C2I", "L2I", "S2I", "C6I", "L6I", "S6I", "C7I", "L7I", "S7I"),
}
SATS = {"G": range(1, 11), "R": range(1, 7), "E": range(1, 9), "C": range(19, 27)}


def synthetic_epochs(n: int) -> tuple[RinexObsHeader, list[ObsEpoch]]:
    """n epochs at 1 Hz of invented measurements (our own scenario, not a real station)."""
    rng = np.random.default_rng(2024)
    cells = [
        (sat_id(s, p), signal_code(code[1:3]))
        for s, prns in SATS.items()
        for p in prns
        for code in OBS_TYPES[s]
        if code[0] == "C"
    ]
    sat = np.array([c[0] for c in cells], np.int16)
    sig = np.array([c[1] for c in cells], np.uint16)
    glo_map = {sat_id("R", p): k for p, k in zip(range(1, 7), (1, -4, 5, 6, -2, 0), strict=True)}
    glo = np.array([glo_map.get(int(s), -128) for s in sat], np.int8)
    freq = frequencies_hz(sat, sig, glo)
    m = len(cells)
    rho0 = rng.uniform(20e6, 26e6, m)
    rate = rng.uniform(-800.0, 800.0, m)
    epochs = []
    for k in range(n):
        rho = np.round(rho0 + rate * k, 3)
        epochs.append(
            ObsEpoch(
                time=GpsTime(2300, 3600.0 + k),
                sat=sat,
                sig=sig,
                pseudorange_m=rho,
                phase_cycles=np.round(rho * freq / C_MPS + rng.normal(0, 0.01, m), 3),
                range_rate_mps=rate,
                cn0_dbhz=(np.round(rng.uniform(30, 50, m) * 4) / 4).astype(np.float32),
                lock_time_s=np.full(m, np.nan, np.float32),
                lock_indicator=np.full(m, -1, np.int16),
                half_cycle=np.zeros(m, np.bool_),
                lli=np.zeros(m, np.uint8),
                freq_hz=freq,
                sources=("RINEX",),
            )
        )
    header = RinexObsHeader(
        version=3.04,
        program="ionwarden-bench",
        marker_name="IWSIM",
        receiver_type="SIMULATED",
        antenna_type="SIMANT          NONE",
        approx_position_m=(4000000.0, 1000000.0, 4800000.0),
        obs_types=MappingProxyType(OBS_TYPES),
        interval_s=1.0,
        time_of_first_obs=epochs[0].time,
        glonass_channels=MappingProxyType(glo_map),
    )
    return header, epochs


def time_ours(path: Path, repeat: int) -> tuple[int, float]:
    best = float("inf")
    n = 0
    for _ in range(repeat):
        t0 = time.perf_counter()
        n = sum(1 for _ in iter_rinex_obs(path))
        best = min(best, time.perf_counter() - t0)
    return n, best


def time_georinex(path: Path) -> tuple[int, float]:
    import georinex

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # xarray FutureWarnings inside georinex
        t0 = time.perf_counter()
        ds = georinex.load(path)
        dt = time.perf_counter() - t0
    return int(ds.sizes["time"]), dt


def report(label: str, path: Path, repeat: int, *, with_georinex: bool = True) -> None:
    n, ours = time_ours(path, repeat)
    size_mb = path.stat().st_size / 1e6
    print(f"{label}: {path.name} ({size_mb:.2f} MB, {n} epochs)")
    print(f"  ionwarden : {n / ours:10.1f} epochs/s  ({ours * 1e3:8.1f} ms, best of {repeat})")
    if with_georinex:
        gn, gt = time_georinex(path)
        assert gn == n, (gn, n)
        print(f"  georinex  : {gn / gt:10.1f} epochs/s  ({gt * 1e3:8.1f} ms, one load)")
        print(f"  ratio     : {(n / ours) / (gn / gt):10.1f}x")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=600, help="synthetic file length (1 Hz epochs)")
    ap.add_argument("--repeat", type=int, default=5, help="best-of runs for our reader")
    args = ap.parse_args()
    print(
        "RINEX observation reader throughput (CPU shared with other jobs; figures are indicative)"
    )
    report("real", P433, args.repeat)
    report("real, Hatanaka+bzip2 (ours only)", P433_CRX, args.repeat, with_georinex=False)
    header, epochs = synthetic_epochs(args.epochs)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "IWSIM00XXX_R_20240010100_10M_01S_MO.rnx"
        t0 = time.perf_counter()
        with open(path, "w", encoding="ascii") as f:
            write_rinex_obs(f, header, epochs)
        wt = time.perf_counter() - t0
        print(
            f"writer: {len(epochs)} epochs in {wt * 1e3:.1f} ms ({len(epochs) / wt:.1f} epochs/s)"
        )
        report("synthetic", path, args.repeat)


if __name__ == "__main__":
    main()
