"""The per-epoch instruction cuts of the rings and the layout cache give the replaced code's
results bit for bit.

Oracles (STYLE rule 23): for ``SlotStd``, the general path as it was before the cuts (row-wise
sums, one gather per row: kept below as ``_OldSlotStd``, our own previous code) and a batch
numpy computation over the window's entries; for ``LagRing._lag_row``, the full nearest-time
search the shortcut skips; for ``CellRouter``, a fresh router building the layout. Inputs:
random values and times of our own, and our invented scenario (tests/_estimator_synth.py).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator

import numpy as np

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.estimator import StationEstimator
from ionwarden.daemon.estimator._cells import CellRouter
from ionwarden.daemon.estimator._pairs import PairTable
from ionwarden.daemon.estimator._windows import LagRing, SlotStd

from ._estimator_synth import Scenario, generate


class _OldSlotStd(SlotStd):
    """SlotStd with the general path of before the cuts (our own previous code): row-wise
    drops and adds, three gathers for the std, the same arithmetic for all-NaN epochs."""

    @staticmethod
    def _increments(vals: np.ndarray) -> np.ndarray:
        k = vals.shape[0]
        inc = np.empty(2 * k)
        inc[:k] = vals
        np.multiply(vals, vals, out=inc[k:])
        return inc

    def _drop(self, row: int) -> None:
        sats = self._sats[row]
        if sats.size:
            vals = self._vals[row, : sats.shape[0]]
            self.acc[:2, sats] -= self._increments(vals).reshape(2, -1)
            self.acc[2, sats] -= 1.0
            self._sats[row] = _NO

    def _push(self, t: float, sats: np.ndarray, value: np.ndarray) -> None:
        slot = math.floor(t / self.slot_s)
        if slot <= self.last_slot:
            return
        first = self.last_slot + 1 if self.last_slot >= 0 else slot
        start = max(first, slot - self.rows + 1)
        row = slot % self.rows
        self._since_exact += slot - first + 1
        self.last_slot = slot
        fin = ~np.isnan(value)
        s, v = sats[fin], value[fin]
        k = s.shape[0]
        if k > self._vals.shape[1]:
            grown = np.zeros((self.rows, k))
            grown[:, : self._vals.shape[1]] = self._vals
            self._vals = grown
        for n in range(start, slot + 1):
            self._drop(n % self.rows)
        inc = self._increments(v)
        self.acc[:2, s] += inc.reshape(2, -1)
        self._acc[2, s] += 1.0
        self._vals[row, :k] = v
        self._sats[row] = s if k else _NO
        if self._since_exact >= self.rows:
            self._blk = None
            self._recompute()
            self._since_exact = 0

    def std(self, sats: np.ndarray, min_count: int) -> np.ndarray:
        return self._std(self.total[sats], self.total_sq[sats], self.count[sats], min_count)


_NO = _OldSlotStd(1, 2.0, 1.0)._sats[0]  # the shared empty entry


def _pushes(seed: int, steps: int) -> Iterator[tuple[float, np.ndarray, np.ndarray]]:
    """Read-only satellite arrays of alternating layouts (as layouts that change and come
    back), skipped slots, gaps longer than the window, NaN and all-NaN epochs."""
    rng = np.random.default_rng(seed)
    layouts = [np.array(a) for a in ([1, 3, 5, 7], [1, 3, 5, 7, 9], [2, 3], [0, 3, 5, 6, 9])]
    for lay in layouts:
        lay.setflags(write=False)
    t, sats = 0.0, layouts[0]
    for step in range(steps):
        t += float(rng.choice([1.0] * 14 + [0.5, 2.0, 3.0, 45.0]))
        if step % 37 == 0 or rng.random() < 0.05:
            sats = layouts[int(rng.integers(len(layouts)))]
        value = rng.normal(size=sats.shape[0])
        r = rng.random()
        if r < 0.08:
            value[:] = np.nan  # no ROT yet (the lag filling, or a restart)
        elif r < 0.15:
            value[int(rng.integers(sats.shape[0]))] = np.nan
        yield t, sats, value


def test_slot_std_general_path_equals_previous_code() -> None:
    """SlotStd.push_std through layout changes, NaN and all-NaN epochs and skipped slots gives
    the std and sums of the previous code's general path bit for bit (source: our own previous
    code), and the sums equal a batch numpy computation over the entries (common practice)."""
    new, old = SlotStd(12, 20.0, 1.0), _OldSlotStd(12, 20.0, 1.0)
    all_nan = 0
    for k, (t, sats, value) in enumerate(_pushes(5, 1500)):
        all_nan += int(np.isnan(value).all())
        got = new.push_std(t, sats, value, 3)
        expect = old.push_std(t, sats, value, 3)
        np.testing.assert_array_equal(got, expect)
        if k % 29 == 0:
            np.testing.assert_array_equal(new.acc, old.acc)
            s = np.concatenate([e[0] for e in new.entries])
            v = np.concatenate([e[1] for e in new.entries])
            np.testing.assert_allclose(new.total, np.bincount(s, v, 12), atol=1e-9)
            np.testing.assert_array_equal(new.count, np.bincount(s, minlength=12))
    np.testing.assert_array_equal(new.acc, old.acc)
    assert all_nan > 50


def test_slot_std_all_nan_epochs_with_one_layout_equal_previous_code() -> None:
    """All-NaN epochs add nothing (the block of sums of the layout carries on past them): the
    std and sums equal the previous code's bit for bit (source: our own previous code)."""
    sats = np.arange(4)
    sats.setflags(write=False)
    new, old = SlotStd(8, 12.0, 1.0), _OldSlotStd(8, 12.0, 1.0)
    rng = np.random.default_rng(2)
    for t in range(1, 40):
        value = np.full(4, np.nan) if t % 6 == 0 else rng.normal(size=4)
        np.testing.assert_array_equal(
            new.push_std(float(t), sats, value, 2), old.push_std(float(t), sats, value, 2)
        )
    np.testing.assert_array_equal(new.acc, old.acc)


def _searched(ring: LagRing, t: float, interval_s: float) -> tuple[int, float]:
    """``_lag_row`` with the lower-bound shortcut off: the full search decides."""
    low, ring._t_low = ring._t_low, -math.inf
    try:
        return ring._lag_row(t, interval_s)
    finally:
        ring._t_low = low


def test_lag_row_shortcut_equals_search() -> None:
    """LagRing._lag_row gives the row and time of the full nearest-time search while the ring
    fills, after gaps, after growing and after a restore (source: the search it skips)."""
    ring = LagRing(8, 10.0)
    sats = np.arange(3)
    rng = np.random.default_rng(9)
    t = 100.0
    hits = misses = 0
    for step in range(400):
        t += float(rng.choice([1.0] * 10 + [0.5, 0.999, 1.001, 4.0, 30.0]))
        interval = 0.5 if step > 300 else 1.0
        if step == 300:
            ring.ensure_interval(0.5)
        if step == 350:
            ring.loaded()  # as a checkpoint restore ends
        got = ring._lag_row(t, interval)
        assert got == _searched(ring, t, interval) or (
            got[0] == -1 and _searched(ring, t, interval)[0] == -1
        )
        hits += got[0] >= 0
        misses += got[0] < 0
        ring.push(t, sats, rng.normal(size=3), np.zeros(3, np.int32))
    assert hits > 100
    assert misses > 20


def _router_epochs() -> list:
    sc = Scenario(n_sats=6, duration_s=40.0, outages=[(2, "2W", 10, 10), (4, "5Q", 20, 21)])
    return generate(sc).epochs


def test_layout_that_comes_back_is_the_same_object() -> None:
    """A layout that comes back after a blip (a signal missing for an epoch or two) is the
    same EpochLayout object as before, with the fields of a freshly built one (source: a new
    router building it)."""
    pairs = PairTable.from_config(EstimatorSettings().pairs)
    router = CellRouter(pairs)
    epochs = _router_epochs()
    lays = [router.layout(ep) for ep in epochs]
    assert lays[12] is lays[0]  # after the blip at 10
    assert lays[10] is not lays[0]
    assert lays[25] is lays[0]  # after the blip at 20–21
    assert router.built == 3  # the first layout and the two blips'
    assert router.rebuilds == 5  # layout changes: the blips and the returns
    for i in (0, 10, 20, 25):
        fresh = CellRouter(pairs).layout(epochs[i])
        for f in dataclasses.fields(fresh):
            a, b = getattr(lays[i], f.name), getattr(fresh, f.name)
            if isinstance(a, np.ndarray):
                assert a.dtype == b.dtype
                np.testing.assert_array_equal(a, b)
            else:
                assert a == b, f.name


def test_layout_blips_keep_results_of_fresh_layouts() -> None:
    """An estimator whose layouts come back as the same objects gives the snapshots of one
    whose router forgets them (every layout built afresh), bit for bit (source: the code
    without the layout memory)."""
    sc = Scenario(
        n_sats=7, duration_s=420.0, outages=[(2, "2W", 100, 100), (4, "5Q", 200, 201),
                                             (1, "2W", 330, 331), (5, "5Q", 350, 350)],
    )  # fmt: skip
    tr = generate(sc)
    keep, forget = StationEstimator(), StationEstimator()
    for ti, ep in enumerate(tr.epochs):
        forget.cells._last = None  # forget the layouts: every epoch builds its layout
        for est in (keep, forget):
            est.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
        a, b = keep.update(ep), forget.update(ep)
        for f in dataclasses.fields(a.satellites):
            va, vb = getattr(a.satellites, f.name), getattr(b.satellites, f.name)
            if isinstance(va, np.ndarray):
                np.testing.assert_array_equal(va, vb, err_msg=f.name)
        assert a.roti_max_tecu_per_min == b.roti_max_tecu_per_min or (
            math.isnan(a.roti_max_tecu_per_min) and math.isnan(b.roti_max_tecu_per_min)
        )
    assert keep.cells.built < keep.cells.rebuilds  # layouts came back after the blips
    assert forget.cells.built == len(tr.epochs)
