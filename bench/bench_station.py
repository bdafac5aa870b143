"""Per-epoch cost of the station figures, the geometry lookup and the snapshot constructors.

    .venv/bin/python bench/bench_station.py [--epochs N] [--rounds R]

Same invented scenario as bench_estimator.py (40 satellites × 3 signals at 1 Hz; with the default
1800 epochs, 13 satellites have no usable ephemeris before epoch ~1640: NaN geometry). The estimator
runs once while the inputs of ``station_figures`` and ``Geometry.lookup`` are recorded; each part
is then replayed alone, best of R rounds, one thread:

* ``station_figures`` over the recorded arguments;
* ``Geometry.lookup`` over the recorded satellite lists and times (a fresh geometry fed the same
  ephemerides; its set-up and first lookup are not timed), refreshes included;
* ``SkyTerms.mapping`` + ``offsets`` over the looked-up geometry;
* ``new_satellite_figures`` + ``new_snapshot`` with the fields of the produced snapshots.

Figures depend on the machine and on other load (shared dev boxes: note contention).
"""

from __future__ import annotations

import argparse
import dataclasses
import time
from typing import Any

import numpy as np
from bench_estimator import RX, best_of, make_scenario

import ionwarden.daemon.estimator._estimator as est_mod
from ionwarden.daemon.estimator import StationEstimator
from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.estimator._snapshot import new_satellite_figures, new_snapshot
from ionwarden.daemon.estimator._station import SkyTerms, station_figures


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=1800)
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    n = args.epochs
    nav, epochs, _ = make_scenario(n)

    calls: list[dict[str, Any]] = []
    lookups: list[tuple[Any, float]] = []

    def recording_figures(**kw: Any) -> Any:
        calls.append({k: v.copy() if isinstance(v, np.ndarray) else v for k, v in kw.items()})
        return station_figures(**kw)

    plain_lookup = Geometry.lookup

    def recording_lookup(self: Geometry, sats: Any, t: float) -> Any:
        lookups.append((sats, t))
        return plain_lookup(self, sats, t)

    est_mod.station_figures = recording_figures  # type: ignore[assignment]
    Geometry.lookup = recording_lookup  # type: ignore[method-assign]
    est = StationEstimator(station="BENCH")
    est.set_receiver_position(RX, "config")
    for e in nav:
        est.add_ephemeris(e)  # type: ignore[arg-type]
    snaps = [est.update(ep) for ep in epochs]
    est_mod.station_figures = station_figures
    Geometry.lookup = plain_lookup  # type: ignore[method-assign]
    known = sum(bool(c["el_known"]) for c in calls)
    print(f"scenario: {n} epochs, {known} with every elevation known")

    def figures() -> None:
        for kw in calls:
            station_figures(**kw)

    geo = Geometry(est.geometry.geo.shape[1], est.settings.geometry_refresh_s,
                   shell_m=est._shell_m)  # fmt: skip

    def lookup() -> None:
        g = geo
        for sats, t in lookups[1:]:
            g.lookup(sats, t)

    def fresh_geometry() -> None:
        nonlocal geo
        geo = Geometry(est.geometry.geo.shape[1], est.settings.geometry_refresh_s,
                       shell_m=est._shell_m)  # fmt: skip
        geo.set_receiver_position(RX, "config")
        for e in nav:
            geo.add_ephemeris(e, None)  # type: ignore[arg-type]
        geo.lookup(*lookups[0])

    fresh_geometry()
    rows = [geo.lookup(sats, t)[0] for sats, t in lookups]
    sky = SkyTerms(est._shell_m)
    lat, lon = est.geometry.lat_rad, est.geometry.lon_rad
    pts = np.empty((2, rows[0].shape[1]))

    def sky_terms() -> None:
        for r in rows:
            sky.mapping(r[0])
            sky.offsets(lat, lon, r[2:4], pts[:, : r.shape[1]])

    fields = []
    for s in snaps:
        sat_kw = {f.name: getattr(s.satellites, f.name) for f in dataclasses.fields(s.satellites)}
        snap_kw = {f.name: getattr(s, f.name) for f in dataclasses.fields(s)}
        fields.append((sat_kw, snap_kw))

    def snapshots() -> None:
        for sat_kw, snap_kw in fields:
            snap_kw["satellites"] = new_satellite_figures(**sat_kw)
            new_snapshot(**snap_kw)

    def timed_lookup() -> None:
        fresh_geometry()
        t = time.perf_counter()
        lookup()
        timed.append(time.perf_counter() - t)

    for label, fn in (("station_figures", figures), ("SkyTerms mapping+offsets", sky_terms),
                      ("snapshot constructors", snapshots)):  # fmt: skip
        dt = best_of(args.rounds, fn)
        print(f"{label:26s} {1e6 * dt / n:7.2f} µs/epoch")
    timed: list[float] = []
    for _ in range(args.rounds):
        timed_lookup()
    print(
        f"{'Geometry.lookup':26s} {1e6 * min(timed) / (n - 1):7.2f} µs/epoch (refreshes included)"
    )


if __name__ == "__main__":
    main()
