"""The alarms' steady-epoch paths (issue 8: the urgent step of every station) give bit-identical
results to the general path they skip.

Oracles (STYLE rule 23): for the elevation bounds of a bin, the general path's binning itself
(``min(⌊el / bin_deg⌋, last)`` by numpy's division and truncation, as ``Cn0Baseline.cells`` bins);
for the cells and the judged drops, the general path as it was before any shortcut
(``_ReferenceBaseline`` in tests/test_alarms_fastpaths.py), its finite drops taken as
``drop_db_bands`` does; for the quiet snapshot alarms, the same engine with that path refused
before every epoch. Inputs: invented cells and snapshots (tests/_outputs_support.py), elevations
put on bin edges and one ulp either side of them.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from ionwarden.daemon.alarms import Cn0Baseline, StationAlarms
from ionwarden.daemon.alarms._cn0 import N_BAND_KEYS, _bin_bounds
from ionwarden.daemon.config import AlarmSettings, Cn0BaselineSettings, ThresholdAlarm
from ionwarden.parsers import signal_code
from tests._outputs_support import T0, make_snapshot
from tests.test_alarms_fastpaths import _ReferenceBaseline


def _bits(a: np.ndarray) -> bytes:
    return np.ascontiguousarray(a).tobytes()


def _same_float(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or (
        a == b and math.copysign(1, a) == math.copysign(1, b)
    )


def _general_bins(el: np.ndarray, bin_deg: float, n_bins: int) -> np.ndarray:
    """The general path's bin of each elevation (Cn0Baseline.cells: usable ones, el ≥ 0 and
    finite), −1 for an unusable one."""
    out = np.full(el.shape, -1, np.intp)
    ok = (el >= 0.0) & (el < np.inf)
    b = np.divide(el[ok], np.full((), bin_deg)).astype(np.intp)
    out[ok] = np.minimum(b, n_bins - 1)
    return out


@pytest.mark.parametrize("bin_deg", [5.0, 0.1, 1.0 / 3.0, 7.3, 30.0, 2.5, 0.7, 13.0, 3.0])
def test_bin_bounds_equal_division_binning(bin_deg):
    """_bin_bounds gives, for every bin, the elevations the general path puts in it and no
    other, on and one to three ulps either side of every edge, at random and at the ends."""
    n_bins = math.ceil(90.0 / bin_deg)
    lo, hi = _bin_bounds(bin_deg, n_bins)
    rng = np.random.default_rng(int(bin_deg * 1000))
    edges = [b * bin_deg for b in range(n_bins + 1)] + lo.tolist()
    near = [x for e in edges for x in (e, *_ulps(e, 3))]
    odd = [0.0, -0.0, -1e-300, 90.0, 1e5, np.nan, np.inf, -np.inf, -5.0]
    el = np.array([*near, *rng.uniform(0.0, 95.0, 2000), *odd], np.float64)
    inside = (el[:, None] >= lo[None, :]) & (el[:, None] < hi[None, :])
    assert (inside.sum(axis=1) <= 1).all()  # the bins do not overlap
    got = np.where(inside.any(axis=1), inside.argmax(axis=1), -1)
    assert got.tolist() == _general_bins(el, bin_deg, n_bins).tolist()
    # Past 2⁶¹ bins' worth (absurd), no bin: the general path takes it.
    assert not ((lo <= 1e300) & (hi > 1e300)).any()


def _ulps(x: float, k: int) -> list[float]:
    out = []
    up = down = x
    for _ in range(k):
        up = math.nextafter(up, math.inf)
        down = math.nextafter(down, -math.inf)
        out += [up, down]
    return out


def _steady_epochs(rng: np.random.Generator, n_epochs: int, bin_deg: float):
    """Invented cells: a layout kept for 40–120 epochs (GPS, GLONASS, Galileo, BeiDou; four
    signals), elevations moving slowly across bin edges, now and then one put on an edge or an
    ulp either side of it; now and then an unusable cell (NaN, negative or infinite elevation,
    −0°, C/N0 ≤ 0, NaN or infinite), a time gap, frozen bands."""
    codes = np.array([signal_code(c) for c in ("1C", "2W", "5Q", "2L")], np.uint16)
    n_bins = math.ceil(90.0 / bin_deg)
    lo, _ = _bin_bounds(bin_deg, n_bins)
    t = 0.0
    left = 0
    for _ in range(n_epochs):
        if left == 0:
            left = int(rng.integers(40, 120))
            n = int(rng.integers(6, 40))
            sat = rng.choice(np.r_[1:33, 101:125, 201:237, 301:337], n).astype(np.int16)
            sig = rng.choice(codes, n).astype(np.uint16)
            el = rng.uniform(0.0, 89.0, n)
            rate = rng.uniform(-0.02, 0.02, n)
        left -= 1
        el = np.clip(el + rate, 0.0, 90.0)
        cn0 = (30.0 + 0.2 * el + rng.normal(0.0, 1.0, el.shape)).astype(np.float32)
        el_now = el.copy()
        if rng.random() < 0.1:
            j = int(rng.integers(0, n))
            edge = float(lo[int(rng.integers(1, n_bins))])
            el_now[j] = rng.choice([edge, math.nextafter(edge, -1.0), math.nextafter(edge, 99.0)])
        if rng.random() < 0.05:
            el_now[int(rng.integers(0, n))] = rng.choice([np.nan, -1.0, np.inf, -0.0, 0.0])
        if rng.random() < 0.05:
            cn0[int(rng.integers(0, n))] = rng.choice([0.0, -3.0, np.nan, np.inf])
        t += 1.0 if rng.random() < 0.95 else float(rng.integers(2, 30))
        frozen = rng.random(N_BAND_KEYS) < 0.3 if rng.random() < 0.1 else None
        yield sat, sig, el_now, cn0, t, frozen


@pytest.mark.parametrize(
    ("seed", "bin_deg", "min_samples"), [(1, 5.0, 6), (2, 2.5, 1), (3, 7.3, 30)]
)
def test_cn0_steady_bins_equal_general_path(seed, bin_deg, min_samples):
    """Cn0Baseline.cells (its steady-bins path: no binning when every elevation stays within
    its bin and every cell is usable) and judged_drops / drop_db_bands (with the baseline
    gathered ahead by prepare(), sometimes not called; cold cells summed apart) give the general
    path's cells and finite drops bit for bit, epoch by epoch, and the same baseline arrays."""
    rng = np.random.default_rng(seed)
    kw = {"bin_deg": bin_deg, "time_constant_s": 300.0, "min_samples": min_samples}
    fast = Cn0Baseline(**kw)
    ref = _ReferenceBaseline(**kw)
    taken = {"steady": 0, "general": 0, "prepared": 0, "partly warm": 0}
    for i, (sat, sig, el, cn0, t, frozen) in enumerate(_steady_epochs(rng, 1500, bin_deg)):
        lay = fast._layout
        full = None if lay is None else lay.full
        a = fast.cells(sat, sig, el, cn0)
        steady = full is not None and a.bins is full and a.flat is full.flat_cells
        taken["steady" if steady else "general"] += 1
        b = ref.cells(sat, sig, el, cn0)
        assert _bits(a.key) == _bits(b[0]), i
        assert _bits(a.flat) == _bits(b[1]), i
        assert _bits(a.cn0) == _bits(b[2]), i
        min_cells = 3 if i % 7 else int(rng.integers(1, 5))
        taken["prepared"] += a.bins.base is not None and a.bins.base_learned == fast._n_learned
        drop = ref.drop_db_cells(b, min_cells=min_cells)
        finite = np.isfinite(drop).nonzero()[0]
        keys, values = fast.judged_drops(a, min_cells)
        taken["partly warm"] += not a.bins.all_warm and bool(keys)
        assert list(keys) == finite.tolist(), i
        assert _bits(np.array(values, np.float64)) == _bits(drop[finite]), i
        assert fast.drop_db_bands(a, min_cells=min_cells) == (list(keys), values)
        fast.learn_cells(a, t, frozen=frozen)
        ref.learn_cells(b, t, frozen=frozen)
        if rng.random() < 0.8:  # as the engine's settle(); sometimes the next epoch comes first
            fast.prepare(a)
        assert _bits(fast._mean) == _bits(ref.mean), i
        assert _bits(fast._count) == _bits(ref.count), i
    # Both paths were taken, often; the prepared baseline and (with cold bins) the partly
    # warm path too.
    assert taken["steady"] > 500
    assert taken["general"] > 100
    assert taken["prepared"] > 500
    if min_samples > 1:
        assert taken["partly warm"] > 50


def test_station_alarms_quiet_snapshot_path_equals_general_path():
    """StationAlarms with its quiet path for the snapshot alarms (every alarm normal without a
    hold, no value at its raise level: only the values are kept) gives the transitions and
    statuses it gives with that path refused every epoch; values at, above and below the raise
    levels, NaN and ∞, two alarms disabled, the max ROTI statistic."""
    level = ThresholdAlarm(raise_at=1.0, clear_at=0.5, raise_after_s=3.0, clear_after_s=5.0)
    settings = AlarmSettings(
        roti=level,
        rot=level,
        vtec=ThresholdAlarm(raise_at=1.0, clear_at=0.5, enabled=False),
        gradient=level,
        dual_frequency_loss=ThresholdAlarm(raise_at=1.0, clear_at=0.5, enabled=False),
        roti_statistic="max",
        cn0_baseline=Cn0BaselineSettings(min_samples=5),
    )
    fast = StationAlarms("ALPHA", settings)
    slow = StationAlarms("ALPHA", settings)
    rng = np.random.default_rng(4)
    choices = [0.2, 0.7, 1.0, math.nextafter(1.0, 0.0), 1.5, math.nan, math.inf]
    n_transitions = 0
    for i in range(800):
        storm = (i // 60) % 2 == 1
        figures = [float(rng.choice(choices)) if storm else 0.2 for _ in range(5)]
        snap = dataclasses.replace(
            make_snapshot(t=T0 + float(i), n=4),
            roti_max_tecu_per_min=figures[0],
            roti_median_tecu_per_min=0.0,
            rot_max_abs_tecu_per_min=figures[1],
            vtec_tecu=figures[2],
            gradient_mm_per_km=-figures[3],
            dual_freq_fraction=1.0 - figures[4],
        )
        slow._snapshot_quiet = False
        a = fast.observe_snapshot(snap)
        b = slow.observe_snapshot(snap)
        n_transitions += len(a)
        assert [dataclasses.astuple(x)[:9] for x in a] == [dataclasses.astuple(x)[:9] for x in b]
        assert all(_same_float(x.value, y.value) for x, y in zip(a, b, strict=True))
        for x, y in zip(fast.statuses(), slow.statuses(), strict=True):
            assert (x.alarm, x.state, x.pending, x.since) == (y.alarm, y.state, y.pending, y.since)
            assert _same_float(x.value, y.value)
        if i % 2:
            fast.settle()
            slow.settle()
    assert n_transitions >= 10
