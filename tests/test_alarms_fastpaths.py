"""The alarms' per-epoch shortcuts give bit-identical results to the general path they skip.

Oracles (STYLE rule 23): for the C/N0 baseline, the general path as it was before the shortcuts
(kept verbatim below as ``_ReferenceBaseline``: every cell gathered, band keys recomputed, the
warm test made, the bins counted each epoch); for the engine, the same engine with its caches
dropped and the quiet-band shortcut refused before every epoch. Inputs: invented cells (random
layouts, unusable cells, unknown bands) and invented snapshots (tests/_outputs_support.py).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from ionwarden.daemon.alarms import Cn0Baseline, StationAlarms, band_key
from ionwarden.daemon.alarms._cn0 import N_BAND_KEYS
from ionwarden.daemon.config import AlarmSettings, Cn0BaselineSettings, ThresholdAlarm
from ionwarden.parsers import signal_code
from tests._outputs_support import T0, make_snapshot


class _ReferenceBaseline:
    """Cn0Baseline's general path, without any shortcut (the code before them)."""

    def __init__(self, *, bin_deg: float, time_constant_s: float, min_samples: int) -> None:
        self.bin_deg = bin_deg
        self.time_constant_s = time_constant_s
        self.min_samples = min_samples
        n_bins = math.ceil(90.0 / bin_deg)
        self.mean = np.zeros((N_BAND_KEYS, n_bins))
        self.count = np.zeros((N_BAND_KEYS, n_bins), np.int64)
        self.last_t_s: float | None = None

    def cells(self, sat, sig, el_deg, cn0_dbhz):
        key = band_key(sat, sig)
        ok = (
            (el_deg >= 0.0)
            & (el_deg < np.inf)
            & (cn0_dbhz > 0.0)
            & (cn0_dbhz < np.inf)
            & (key >= 0)
            & (key < N_BAND_KEYS)
        )
        key = key[ok]
        n_bins = self.mean.shape[1]
        b = (el_deg[ok] / self.bin_deg).astype(np.intp)
        np.minimum(b, n_bins - 1, out=b)
        flat = key * n_bins
        flat += b
        return key, flat, cn0_dbhz[ok].astype(np.float64)

    def drop_db_cells(self, cells, *, min_cells: int):
        key_all, flat, cn0 = cells
        out = np.full(N_BAND_KEYS, np.nan)
        warm = self.count.reshape(-1)[flat] >= self.min_samples
        if not warm.any():
            return out
        key = key_all[warm]
        dev = self.mean.reshape(-1)[flat[warm]] - cn0[warm]
        total = np.bincount(key, weights=dev, minlength=N_BAND_KEYS)
        n = np.bincount(key, minlength=N_BAND_KEYS)
        np.divide(total, n, out=out, where=n >= min_cells)
        return out

    def learn_cells(self, cells, t_s: float, *, frozen=None) -> None:
        key, flat, cn0 = cells
        if frozen is not None:
            keep = ~frozen[key]
            flat, cn0 = flat[keep], cn0[keep]
        dt = 1.0 if self.last_t_s is None else min(max(t_s - self.last_t_s, 0.0), 3600.0)
        self.last_t_s = t_s
        size = self.mean.size
        n = np.bincount(flat, minlength=size)
        s = np.bincount(flat, weights=cn0, minlength=size)
        seen = n.nonzero()[0]
        epoch_mean = s[seen] / n[seen]
        mean = self.mean.reshape(-1)
        count = self.count.reshape(-1)
        c = count[seen]
        alpha = np.maximum(1.0 / (c + 1.0), min(dt / self.time_constant_s, 1.0))
        prev = mean[seen]
        mean[seen] = prev + alpha * (epoch_mean - prev)
        count[seen] = c + 1


def _bits(a: np.ndarray) -> bytes:
    return np.ascontiguousarray(a).tobytes()


def _epochs(rng: np.random.Generator, n_epochs: int):
    """Invented cell sets: a layout kept for a while then changed, slowly moving elevations,
    now and then unusable cells (NaN, negative or infinite elevation, C/N0 ≤ 0 or NaN, a
    satellite id outside GRECJSI) and gaps in time."""
    codes = np.array([signal_code(c) for c in ("1C", "2W", "5Q", "2L")], np.uint16)
    t = 0.0
    for i in range(n_epochs):
        if i % 23 == 0:  # a new layout
            n = int(rng.integers(6, 40))
            sat = rng.choice(np.r_[1:33, 101:125, 201:237, 301:337], n).astype(np.int16)
            if rng.random() < 0.3:
                sat[0] = 905  # system index 9: outside the band keys
            sig = rng.choice(codes, n).astype(np.uint16)
            el0 = rng.uniform(-2.0, 95.0, n)
            rate = rng.uniform(-0.3, 0.3, n)
        el = el0 + rate * (i % 23)
        cn0 = (30.0 + 0.2 * np.clip(el, 0.0, 90.0) + rng.normal(0.0, 1.0, el.shape)).astype(
            np.float32
        )
        if rng.random() < 0.25:
            j = int(rng.integers(0, el.shape[0]))
            el = el.copy()
            el[j] = rng.choice([np.nan, -1.0, np.inf, -0.0, 0.0])
        if rng.random() < 0.15:
            cn0[int(rng.integers(0, cn0.shape[0]))] = rng.choice([0.0, -3.0, np.nan, np.inf])
        t += 1.0 if rng.random() < 0.9 else float(rng.integers(2, 40))
        yield sat, sig, el, cn0, t


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_cn0_baseline_shortcuts_equal_general_path(seed):
    """Cn0Baseline (kept layout, all-usable epochs without gathers, kept bins, skipped warm test)
    gives bit-identical drops and baseline arrays to the general path, epoch by epoch, with
    unusable cells, layout changes, time gaps and frozen bands."""
    rng = np.random.default_rng(seed)
    kw = {"bin_deg": 5.0, "time_constant_s": 300.0, "min_samples": 4}
    fast = Cn0Baseline(**kw)
    ref = _ReferenceBaseline(**kw)
    n_all_warm = 0
    for sat, sig, el, cn0, t in _epochs(rng, 600):
        a = fast.cells(sat, sig, el, cn0)
        b = ref.cells(sat, sig, el, cn0)
        assert _bits(a.flat) == _bits(b[1])
        assert _bits(a.cn0) == _bits(b[2])
        min_cells = int(rng.integers(1, 4))
        assert _bits(fast.drop_db_cells(a, min_cells=min_cells)) == _bits(
            ref.drop_db_cells(b, min_cells=min_cells)
        )
        n_all_warm += a.bins.all_warm
        frozen = None
        if rng.random() < 0.2:
            frozen = rng.random(N_BAND_KEYS) < 0.2
        fast.learn_cells(a, t, frozen=frozen)
        ref.learn_cells(b, t, frozen=frozen)
        assert _bits(fast._mean) == _bits(ref.mean)
        assert _bits(fast._count) == _bits(ref.count)
    assert n_all_warm > 50  # the all-warm shortcut was taken


def test_cn0_baseline_public_calls_equal_general_path():
    """drop_db / learn (which index the cells on each call) give what the general path gives."""
    rng = np.random.default_rng(11)
    kw = {"bin_deg": 10.0, "time_constant_s": 60.0, "min_samples": 2}
    fast = Cn0Baseline(**kw)
    ref = _ReferenceBaseline(**kw)
    for sat, sig, el, cn0, t in _epochs(rng, 200):
        drop = fast.drop_db(sat, sig, el, cn0, min_cells=2)
        assert _bits(drop) == _bits(ref.drop_db_cells(ref.cells(sat, sig, el, cn0), min_cells=2))
        fast.learn(sat, sig, el, cn0, t)
        ref.learn_cells(ref.cells(sat, sig, el, cn0), t)
        assert _bits(fast._mean) == _bits(ref.mean)


def _interference_run(n_epochs: int, *, seed: int = 5, roti_storm: bool = True):
    """Invented snapshots: 8 GPS satellites, L2 C/N0 down 12 dB from epoch 60 to 120, one
    satellite's elevation unknown now and then, the satellite set changing every 50 epochs, ROTI
    (median 0.64 TECU/min) above its raise level from epoch 30 to 150 (``roti_storm``)."""
    rng = np.random.default_rng(seed)
    for i in range(n_epochs):
        n = 8 if (i // 50) % 2 == 0 else 7
        snap = make_snapshot(
            t=T0 + float(i),
            n=n,
            cn0_l2_offset_db=12.0 if 60 <= i < 120 else 0.0,
            roti=0.8 if roti_storm and 30 <= i < 150 else 0.1,
        )
        cn0 = snap.cell_cn0_dbhz + rng.normal(0.0, 0.3, snap.cell_cn0_dbhz.shape).astype(np.float32)
        el = snap.cell_el_deg + 0.01 * i
        if i % 17 == 0:
            el = el.copy()
            el[0] = np.nan
        yield dataclasses.replace(snap, cell_cn0_dbhz=cn0, cell_el_deg=el)


def _same_float(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or (
        a == b and math.copysign(1, a) == math.copysign(1, b)
    )


def test_station_alarms_shortcuts_equal_general_path():
    """StationAlarms with its shortcuts (quiet CN0 bands, kept layout and bins) gives the same
    transitions at the same epochs and the same statuses as with them refused every epoch."""
    settings = AlarmSettings(
        cn0_baseline=Cn0BaselineSettings(bin_deg=5.0, time_constant_s=120.0, min_samples=10),
        cn0_drop=ThresholdAlarm(raise_at=6.0, clear_at=3.0, raise_after_s=5.0, clear_after_s=10.0),
    )
    fast = StationAlarms("ALPHA", settings)
    slow = StationAlarms("ALPHA", settings)
    kinds = []
    for snap in _interference_run(200):
        slow._cn0_quiet = False
        slow._cn0._layout = None
        slow._cn0._bins = None
        a = fast.observe_snapshot(snap)
        b = slow.observe_snapshot(snap)
        assert [dataclasses.astuple(x)[:9] for x in a] == [dataclasses.astuple(x)[:9] for x in b]
        assert all(_same_float(x.value, y.value) for x, y in zip(a, b, strict=True))
        kinds += [(x.alarm, x.state.value) for x in a]
        sa, sb = fast.statuses(), slow.statuses()
        assert [s.alarm for s in sa] == [s.alarm for s in sb]
        for x, y in zip(sa, sb, strict=True):
            assert (x.state, x.pending, x.since) == (y.state, y.pending, y.since)
            assert _same_float(x.value, y.value)
        assert _bits(fast._cn0._mean) == _bits(slow._cn0._mean)
    # The run exercised both paths: the L2 alarm raised and cleared, ROTI too.
    assert ("cn0-drop-g2", "active") in kinds
    assert ("cn0-drop-g2", "normal") in kinds
    assert ("roti", "active") in kinds
