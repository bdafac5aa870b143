"""The urgent step's estimator cuts (h5: cached selections of the station figures, the lean ROT
ring and ROTI window paths, the layout's usability check by reductions) leave every output bit
for bit what it was.

Oracles (STYLE rule 23):
- golden digests of our own previous code (566fd88, the estimator before these cuts, run on the
  same inputs on this floating-point platform; tests/_float_platform.py), over every snapshot
  field and array and the final ``state_dict`` (the digest of tests/test_estimator_lean_golden.py);
- the same estimator with every per-epoch shortcut forgotten before each epoch (the general
  path), on the same inputs, which holds on any platform.
Inputs: the simulator's invented scenarios (``daemon.sim``), their events moved early so that a
short run holds them: the storm front with slips of 7, 2500 and a silent 1 cycle and a loss of
lock; the band outage (L2 lost: single-frequency satellites; a receiver restart, a stream gap);
scintillation (ROTI up, a half-cycle slip); and the quiet day past the 5-min ROTI window.
"""

from __future__ import annotations

import dataclasses
from dataclasses import fields, replace
from typing import Any

import numpy as np
import pytest

from ionwarden.daemon.estimator import (
    SatelliteFigures,
    StationEstimator,
    StationPipeline,
    StationSnapshot,
)
from ionwarden.daemon.estimator._snapshot import satellite_figures_of, snapshot_of
from ionwarden.daemon.estimator._station import FitScratch, station_values
from ionwarden.daemon.sim import (
    BandOutage,
    LossOfLock,
    ReceiverRestart,
    ScintillationWindow,
    Simulator,
    SlipEvent,
    StreamGap,
    build_scenario,
    iter_stream,
)

from ._float_platform import fingerprint, golden_for
from .test_estimator_fastpaths import _assert_same
from .test_estimator_lean_golden import _digest_snapshots
from .test_estimator_station_shortcuts import _bits, _reference

#: The fields of StationFigures in the order station_values returns them.
_FIELDS_IN_ORDER = ("vtec_tecu", "roti_max", "roti_median", "rot_max_abs",
                    "gradient_tecu_per_km", "gradient_mm_per_km", "gradient_azimuth_deg")  # fmt: skip

#: Golden digests per floating-point platform, captured from 566fd88 (before these cuts).
GOLDEN_BY_PLATFORM: dict[str, dict[str, str]] = {
    # x86-64 AVX-512 (numpy 2.4), an Intel Xeon, captured 2026-12-03 from 566fd88; also an AMD
    # EPYC of family 25 (2026-12-04), where they passed
    "d82fbd5e3857987e": {
        "storm": "266b839ad43dca718bd1148e51395593641fc21764effbf15af36ee05f0abfe1",
        "band-outage": "aae0b99b95361781f6aaa2bf72cf1a77d2138b4de29285f53b95f0baf635f874",
        "scintillation": "1adec789d8ba92b9c97b0f610f20ffab7f680a696e4902d8797611c70a0774a1",
        "quiet-steady": "5ab01bea17844fac972acfba4d98027df20cb7c8896ee2884d286d91cd16b757",
    },
    # x86-64 AVX2 (numpy 2.4), an AMD EPYC of family 25 without AVX-512, captured 2026-12-04
    # from 566fd88 (its daemon and parsers, this module's digest)
    "5cbd07108fd657e2": {
        "storm": "fda63bb6e4b744fca1084a1887ab1fef59f73c2dcf8d0e107e7530c596406a7b",
        "band-outage": "8a0a63968b48cfa537a2c35c672faf127fa85baca9cebecd80f3a44ade49972a",
        "scintillation": "06f7d2ca048bf911ecc78fade0efe5086c6a92ed15a027d062a57d52fe303b71",
        "quiet-steady": "b7675850e68157c92d914851fed74452097598e0943afed028ecf42799f88213",
    },
    # x86-64 AVX-512 (numpy 2.4), AMD EPYC (family 26), captured 2026-12-03 from 566fd88
    "5ab1952dc3a158c0": {
        "storm": "89679b1db65287e416707fd2e1f8fda5d25cd0144ed37e3809148e339083dd8d",
        "band-outage": "242df4de9376ea842e974d16ed1cb8bcc63e969b24b2866814757169d6f776d8",
        "scintillation": "2e04c90fc8e880fdc37d083a9b023e72426435eac9767cdf4874dcee9c0b0d21",
        "quiet-steady": "668a6292fab675efcd94e4f8644bbc90621ac4fe9a669aeb9218dd04320f8a11",
    },
}
SOURCES = ("storm", "band-outage", "scintillation", "quiet-steady")
GOLDEN = golden_for(GOLDEN_BY_PLATFORM)


def _scenario(source: str) -> Any:
    """The scenario of ``source``, its events early (a few minutes of stream hold them)."""
    if source == "storm":
        sc = build_scenario("storm-front", duration_s=560.0)
        return replace(
            sc,
            storm=replace(sc.storm, onset_s=20.0, t_cross_s=300.0),
            slips=(
                SlipEvent(t_s=120.0, sat=-1, cycles=7),
                SlipEvent(t_s=200.0, sat=-1, cycles=2500, signals=("2W", "2C", "7Q", "7I")),
                SlipEvent(t_s=380.0, sat=-1, cycles=1, signals=("1C",), lock_reset=False),
            ),
            losses=(LossOfLock(t_s=260.0, sat=-1, duration_s=45.0),),
        )
    if source == "band-outage":
        sc = build_scenario("band-outage", duration_s=520.0)
        return replace(
            sc,
            outages=(
                BandOutage(start_s=60.0, end_s=120.0, drop_db=20.0),
                BandOutage(start_s=150.0, end_s=260.0),
            ),
            restarts=(ReceiverRestart(t_s=300.0, duration_s=20.0),),
            gaps=(StreamGap(start_s=400.0, end_s=415.0),),
        )
    if source == "scintillation":
        sc = build_scenario("scintillation", duration_s=420.0)
        return replace(
            sc,
            scintillation=(
                ScintillationWindow(start_s=60.0, end_s=200.0, rms_tecu=0.8),
                ScintillationWindow(start_s=260.0, end_s=380.0, rms_tecu=1.5, fade_db=10.0),
            ),
            slips=(SlipEvent(t_s=150.0, sat=-1, cycles=0, half_cycle=True, signals=("1C",)),),
        )
    assert source == "quiet-steady"
    return build_scenario("quiet-day", duration_s=400.0)


def _chunks(source: str) -> tuple[list[bytes], Any]:
    sc = _scenario(source)
    return [data for _, data in iter_stream(Simulator(sc), 0) if data], sc


def digest(source: str) -> str:
    """The digest of one input (also run under the previous code to capture ``GOLDEN``)."""
    chunks, sc = _chunks(source)
    p = StationPipeline(source, reference_time=sc.start, defer=True)
    snaps: list[object] = []
    for c in chunks:
        snaps.extend(p.feed(c))
        snaps.extend(p.settle())
    snaps.extend(p.feed(b""))
    return _digest_snapshots(snaps, p.estimator)


@pytest.mark.skipif(
    GOLDEN is None,
    reason=f"no golden digests for floating-point platform {fingerprint()} "
    "(capture them from 566fd88: see tests/_float_platform.py)",
)
@pytest.mark.parametrize("source", SOURCES)
def test_outputs_equal_previous_code(source: str) -> None:
    """Every snapshot field, array, counter and the final state_dict equal those of the code
    before the cuts, bit for bit (golden digest of our own previous code)."""
    assert GOLDEN is not None
    assert digest(source) == GOLDEN[source]


def _forget_shortcuts(est: StationEstimator) -> None:
    """Make the next epoch take the general path everywhere (state itself unchanged)."""
    est.state_rows()  # writes the working block back: the next epoch gathers it again
    est.geometry._same = None
    est.rot_ring.loaded()
    est.roti_window.load_entries(list(est.roti_window.entries))
    est._sky.scratch.forget()
    est.cells._last = None


@pytest.mark.parametrize("source", ["storm", "band-outage"])
def test_scenarios_fast_paths_equal_general_path(source: str) -> None:
    """The pipeline gives bit-identical snapshots with every per-epoch shortcut forgotten before
    each epoch (kept block, cached geometry and selections, ring memos, layout)."""
    chunks, sc = _chunks(source)
    fast = StationPipeline(source, reference_time=sc.start)
    slow = StationPipeline(source, reference_time=sc.start)
    n = 0
    for c in chunks:
        a = fast.feed(c)
        _forget_shortcuts(slow.estimator)
        b = slow.feed(c)
        assert len(a) == len(b)
        for x, y in zip(a, b, strict=True):
            if isinstance(x, StationSnapshot):
                assert isinstance(y, StationSnapshot)
                _assert_same(x, y)
                n += 1
    assert n >= 300
    assert fast.estimator._sky.scratch.selection is not None  # the cached selection was used


def test_positional_snapshot_constructors_equal_dataclass_constructors() -> None:
    """satellite_figures_of/snapshot_of (fields in field order) build objects equal to the
    dataclass constructors given the same values by name, of the dataclass type, frozen."""
    a = np.arange(3.0)
    sat_kw: dict[str, Any] = {f.name: a + i for i, f in enumerate(fields(SatelliteFigures))}
    sat_kw["pair"] = ("", "1C-2W", "")
    sats = satellite_figures_of(*sat_kw.values())
    want = SatelliteFigures(**sat_kw)
    assert type(sats) is SatelliteFigures
    for name, v in sat_kw.items():
        assert getattr(sats, name) is v
    assert sats == want
    snap_kw: dict[str, Any] = {f.name: float(i) for i, f in enumerate(fields(StationSnapshot))}
    snap_kw |= {"station": "X", "satellites": sats, "geometry_source": "gsv", "counters": {}}
    snap = snapshot_of(*snap_kw.values())
    assert type(snap) is StationSnapshot
    assert snap == StationSnapshot(**snap_kw)
    with pytest.raises(dataclasses.FrozenInstanceError):
        snap.n_sats = 3  # type: ignore[misc]
    with pytest.raises(TypeError):
        snapshot_of(*list(snap_kw.values())[:-1])  # a field missing


def test_station_values_with_kept_selection_equal_the_general_path() -> None:
    """station_values with one FitScratch over epochs whose flags (above the mask, VTEC finite)
    repeat and then change gives the general path's figures bit for bit (``_reference`` of
    tests/test_estimator_station_shortcuts.py) and a fresh scratch's; the selection is the same
    object while the flags repeat."""
    rng = np.random.default_rng(8)
    scratch = FitScratch()
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for _ in range(300):
            m = int(rng.choice([0, 1, 4, 6, 20, 40]))
            el = rng.uniform(-0.2, 1.5, m)
            nan_at = rng.random(m) < rng.choice([0.0, 0.15])
            mask_rad = float(rng.choice([0.0, 0.2]))
            last = None
            for _ in range(int(rng.integers(1, 5))):  # flags repeating, values changing
                el += rng.normal(size=m) * 1e-4
                pts = rng.normal(size=(3, m)) * 300.0
                pts[2] = np.abs(pts[2]) / 10.0
                pts[2, nan_at] = np.nan
                kw = {"el_rad": el.copy(), "sin_el": np.sin(el), "el_known": True,
                      "pts": pts, "rot": rng.normal(size=m),
                      "roti": np.abs(rng.normal(size=m)), "mask_rad": mask_rad}  # fmt: skip
                expect = _reference(**kw)  # type: ignore[arg-type]
                fresh = station_values(**kw, scratch=FitScratch())  # type: ignore[arg-type]
                got = station_values(**kw, scratch=scratch)  # type: ignore[arg-type]
                assert [_bits(x) for x in got] == [_bits(x) for x in fresh]
                for name, x in zip(_FIELDS_IN_ORDER, got, strict=True):
                    assert _bits(x) == _bits(getattr(expect, name)), name
                sel = scratch.selection
                key = np.stack((el >= mask_rad, np.isfinite(pts[2]))).tobytes()
                if last is not None and last.key == key:
                    assert sel is last
                last = sel
