"""The estimator's per-epoch shortcuts give bit-identical results to the general path they skip.

Oracles (STYLE rule 23): the same computation without the shortcut — a freshly gathered working
block, uncached geometry, the separate ring-buffer calls — and, for the in-place helpers, the
library functions whose operations they repeat (``geo.mapping_factor``, SCIENCE.md §6). Inputs:
the demo capture (our simulator) and our invented scenarios (tests/_estimator_synth.py).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.estimator import (
    SatelliteFigures,
    StationEstimator,
    StationPipeline,
    StationSnapshot,
)
from ionwarden.daemon.estimator._snapshot import new_satellite_figures, new_snapshot
from ionwarden.daemon.estimator._station import SkyTerms, pierce_offsets_km
from ionwarden.daemon.estimator._windows import LagRing, SlotStd
from ionwarden.daemon.geo import mapping_factor
from ionwarden.parsers import GpsTime, StreamDecoder

from ._estimator_synth import RX_ECEF, Scenario, generate

DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"


def _fields(snap: StationSnapshot) -> dict[str, object]:
    out = {f.name: getattr(snap, f.name) for f in dataclasses.fields(snap)}
    sats = out.pop("satellites")
    out.update({f"sat.{f.name}": getattr(sats, f.name) for f in dataclasses.fields(sats)})
    out.pop("counters")
    return out


def _assert_same(a: StationSnapshot, b: StationSnapshot) -> None:
    fa, fb = _fields(a), _fields(b)
    for name, va in fa.items():
        vb = fb[name]
        if isinstance(va, np.ndarray):
            np.testing.assert_array_equal(va, vb, err_msg=name)
        elif isinstance(va, float) and np.isnan(va):
            assert isinstance(vb, float), name
            assert np.isnan(vb), name
        else:
            assert va == vb, name


def _forget_shortcuts(est: StationEstimator) -> None:
    """Make the next epoch take the general path everywhere (state itself unchanged)."""
    est.state_rows()  # writes the working block back: the next epoch gathers it again
    est.geometry._same = None
    est.rot_ring.loaded()
    est.roti_window.load_entries(list(est.roti_window.entries))


def test_demo_capture_fast_paths_equal_general_path():
    """StationPipeline on the demo capture gives bit-identical snapshots with every per-epoch shortcut disabled (kept block, cached geometry, ring memos)."""
    msgs = StreamDecoder().feed(DEMO.read_bytes()[:400_000]) + StreamDecoder().feed(b"")
    fast = StationPipeline("demo", ephemerides_per_sat=50)
    slow = StationPipeline("demo", ephemerides_per_sat=50)
    n = 0
    for msg in msgs:
        a = fast.handle_one(msg)
        _forget_shortcuts(slow.estimator)
        b = slow.handle_one(msg)
        if isinstance(a, StationSnapshot):
            assert isinstance(b, StationSnapshot)
            _assert_same(a, b)
            n += 1
    assert n >= 100
    assert fast.estimator.geometry._same is not None  # the cached geometry was in use


def test_synthetic_slips_and_outages_fast_paths_equal_general_path():
    """StationEstimator with slips, outages and GSV geometry gives bit-identical snapshots with every per-epoch shortcut disabled."""
    sc = Scenario(
        n_sats=6, duration_s=400.0, slips=[(1, 150, 1, 0), (2, 300, 0, 1)],
        outages=[(0, "2W", 200, 260), (3, "5Q", 100, 400)], seed=4,
    )  # fmt: skip
    tr = generate(sc)
    fast, slow = StationEstimator(), StationEstimator()
    for est in (fast, slow):
        est.set_receiver_position(RX_ECEF, "config")
    for ti, ep in enumerate(tr.epochs):
        for est in (fast, slow):
            est.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
        _forget_shortcuts(slow)
        _assert_same(fast.update(ep), slow.update(ep))


def test_sky_terms_repeat_mapping_factor_and_pierce_offsets_bit_for_bit():
    """SkyTerms.mapping/offsets equal geo.mapping_factor and pierce_offsets_km bit for bit (SCIENCE.md §6)."""
    rng = np.random.default_rng(7)
    el = rng.uniform(-0.2, np.pi / 2, 64)
    lat = rng.uniform(0.5, 1.0, 64)
    lon = rng.uniform(-np.pi, np.pi, 64)
    sky = SkyTerms(350e3)
    np.testing.assert_array_equal(sky.mapping(el.copy()), mapping_factor(el, 350e3))
    out = np.empty((2, 64))
    for lat0, lon0 in ((0.8, 0.13), (-0.3, 3.1)):
        sky.offsets(lat0, lon0, np.stack((lat, lon)), out)
        x, y = pierce_offsets_km(lat0, lon0, lat, lon, 350e3)
        np.testing.assert_array_equal(out[0], x)
        np.testing.assert_array_equal(out[1], y)


def test_fast_snapshot_constructors_equal_dataclass_constructors():
    """new_satellite_figures/new_snapshot build objects equal to the dataclass constructors and reject missing fields."""
    a = np.arange(3.0)
    sat_kw = {f.name: a for f in dataclasses.fields(SatelliteFigures)} | {"pair": ("", "", "")}
    assert new_satellite_figures(**sat_kw) == SatelliteFigures(**sat_kw)
    sats = SatelliteFigures(**sat_kw)
    snap_kw = {f.name: 1.0 for f in dataclasses.fields(StationSnapshot)} | {
        "station": "X", "time": GpsTime(2350, 1.0), "satellites": sats, "counters": {"a": 1},
    }  # fmt: skip
    built = new_snapshot(**snap_kw)
    assert built == StationSnapshot(**snap_kw)
    with pytest.raises(TypeError):
        new_snapshot(**{k: v for k, v in snap_kw.items() if k != "counters"})
    with pytest.raises(dataclasses.FrozenInstanceError):
        built.n_sats = 3  # type: ignore[misc]


def test_combined_ring_calls_equal_separate_calls():
    """LagRing.lag_push and SlotStd.push_std equal lagged+push and push+std bit for bit, through NaNs, arc changes, gaps and satellite changes."""
    rng = np.random.default_rng(11)
    ring_a, ring_b = LagRing(16, 5.0), LagRing(16, 5.0)
    win_a, win_b = SlotStd(16, 12.0, 1.0), SlotStd(16, 12.0, 1.0)
    layouts = [np.array([1, 3, 5, 7]), np.array([1, 3, 5, 7, 9]), np.array([2, 3])]
    for lay in layouts:
        lay.setflags(write=False)
    arcs = dict.fromkeys(range(16), 0)
    t = 0.0
    sats = layouts[0]
    arc = np.array([arcs[s] for s in sats.tolist()], np.int32)
    arc.setflags(write=False)
    for step in range(300):
        t += float(rng.choice([1.0, 1.0, 1.0, 1.0, 2.0, 0.5]))
        if step % 37 == 0 or rng.random() < 0.03:
            sats = layouts[int(rng.integers(len(layouts)))]
            if rng.random() < 0.5:
                arcs[int(rng.choice(sats))] += 1
            arc = np.array([arcs[s] for s in sats.tolist()], np.int32)
            arc.setflags(write=False)
        value = rng.normal(size=sats.shape[0])
        value[rng.random(sats.shape[0]) < 0.05] = np.nan
        got = ring_a.lag_push(t, sats, value, arc, 1.0)
        expect = ring_b.lagged(t, sats, arc, 1.0)
        ring_b.push(t, sats, value, arc)
        np.testing.assert_array_equal(got[0], expect[0])
        assert got[1] == expect[1] or (np.isnan(got[1]) and np.isnan(expect[1]))
        np.testing.assert_array_equal(ring_a.value, ring_b.value)
        std_a = win_a.push_std(t, sats, value, 3)
        win_b.push(t, sats, value)
        np.testing.assert_array_equal(std_a, win_b.std(sats, 3))
        np.testing.assert_array_equal(win_a.acc, win_b.acc)
