"""The slip detector's general path, the arc-reason counters and the station figures' all-NaN
shortcuts give what the previous code gave, bit for bit.

Oracles: verbatim copies of the previous implementation kept here (equal to the previous
implementation (oracle copy)): ``ArcState._general`` before it updated its rows in place, the
per-bit reason tally of ``StationEstimator._dual``, and ``_max_median`` / ``_max_abs`` of
``_station``. Inputs: invented arcs (smooth GF/MW with noise, jumps, gaps, lock drops, half-cycle
flips, RINEX loss of lock, young arcs), driven through ``ArcState.detect``.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
import pytest

from ionwarden.daemon.estimator import _station
from ionwarden.daemon.estimator._arcs import (
    REASON_FIRST,
    REASON_GAP,
    REASON_GF,
    REASON_LLI,
    REASON_LOCK,
    REASON_MW,
    REASON_NAMES,
    REASON_PAIR,
    ArcBlock,
    ArcState,
    SlipThresholds,
)
from ionwarden.daemon.estimator._biases import BiasModel
from ionwarden.daemon.estimator._estimator import _tally_reasons
from ionwarden.daemon.estimator._state import (
    ARC,
    GF_FLOOR,
    GF_LEVEL,
    GF_LOW,
    GF_PRED,
    GF_RATE,
    GF_VAR,
    HALF1,
    HALF2,
    LAST_T,
    LOCK1,
    LOCK2,
    LT1,
    LT2,
    LWL,
    MW_MEAN,
    MW_VAR,
    NROW,
    NSTATE,
    RANK,
    N,
    new_state,
)
from ionwarden.daemon.estimator._windows import SlotStd

from .test_estimator_lean_golden import digest

F64 = npt.NDArray[np.float64]
Bool = npt.NDArray[np.bool_]


def _sel(all_true: bool, mask: Bool, a: F64, b: F64 | float) -> F64:
    """``np.where(mask, a, b)``, skipped when the caller knows the mask is all True (the
    previous ``_arcs._sel``, oracle copy)."""
    return a if all_true else np.where(mask, a, b)


class _OldArcState(ArcState):
    """``ArcState`` with the previous ``_general`` (oracle copy, verbatim but for its
    parameters: the block, of which it read ``g``, and ``tracked``, which it recomputed)."""

    def _general(
        self, b: ArcBlock, *, t: F64, dt: F64, gf_mw: F64, res: F64, jump: Bool, cur: F64,
        lli_lost: Bool | None, gap_s: float, screen: bool, all_tracked: bool,
        tracked: Bool | None,
    ) -> tuple[Bool, npt.NDArray[np.int64] | None]:  # fmt: skip
        g = b.g
        d = g.shape[1]
        th = self.th
        gf_m, mw_m = gf_mw[0], gf_mw[1]
        gf_res, mw_res = res
        gf_jump, mw_jump = jump
        n = g[N]
        tracked = n >= 2
        new = gf_jump | mw_jump
        if screen:
            prev_rank = g[RANK]
            lock = cur[3:5]
            lock_drop = (
                ((lock < g[LOCK1 : LOCK2 + 1]) & (lock >= 0)) | (cur[5:7] < g[LT1 : LT2 + 1])
            ).any(axis=0)
            first = np.isnan(dt)
            gap = dt > gap_s
            pair = (prev_rank >= 0) & (prev_rank != cur[0])
            lli = (cur[1:3] != g[HALF1 : HALF2 + 1]).any(axis=0)
            if lli_lost is not None:
                lli |= lli_lost
            hard = first | gap | pair | lli | lock_drop
            new |= hard
        all_ok = np.count_nonzero(new) == 0
        reason: npt.NDArray[np.int64] | None = None
        if not all_ok:
            if not screen:
                first = gap = pair = lli = lock_drop = hard = np.zeros(d, np.bool_)
            cont = ~hard
            reason = (
                first * REASON_FIRST | gap * REASON_GAP | pair * REASON_PAIR | lli * REASON_LLI
                | lock_drop * REASON_LOCK | (cont & mw_jump) * REASON_MW
                | (cont & gf_jump) * REASON_GF
            )  # fmt: skip
        w = th.ema_weight
        ok = ~new
        pred = g[GF_PRED]
        mw_var = g[MW_VAR]
        g[MW_VAR] = _sel(all_ok, ok, (1.0 - w) * mw_var + w * mw_res * mw_res, mw_var)
        gf_var = g[GF_VAR]
        learn = ok & tracked
        g[GF_VAR] = _sel(
            all_ok and all_tracked, learn, (1.0 - w) * gf_var + w * gf_res * gf_res, gf_var
        )
        rate = g[GF_RATE] + th.rate_weight * gf_res / dt
        level = pred + th.level_weight * gf_res
        if not all_tracked:
            second = n == 1
            rate = np.where(second, (gf_m - g[GF_LEVEL]) / dt, rate)
            level = np.where(second, gf_m, level)
        g[GF_RATE] = _sel(all_ok, ok, rate, 0.0)
        g[GF_LEVEL] = _sel(all_ok, ok, level, gf_m)
        n_new = _sel(all_ok, ok, n + 1.0, 1.0)
        g[MW_MEAN] = _sel(all_ok, ok, g[MW_MEAN] + mw_res / n_new, mw_m)
        g[N] = n_new
        if not all_ok:
            k = int(np.count_nonzero(new))
            g[ARC, new] = self.next_arc + np.arange(k)
            self.next_arc += k
        g[LAST_T] = t
        g[RANK : LT2 + 1] = cur
        return new, reason


def _old_tally(counters: dict[str, int], reason: npt.NDArray[np.int64]) -> None:
    """The previous per-bit tally of ``StationEstimator._dual`` (oracle copy)."""
    for bit, name in REASON_NAMES.items():
        counters[f"arcs_{name}"] += int(np.count_nonzero(reason & bit))


def _old_max_median(roti: F64, idx: npt.NDArray[np.intp] | None) -> tuple[float, float]:
    """The previous ``_station._max_median`` (oracle copy)."""
    if idx is None:
        r = np.sort(roti)
    else:
        r = roti.take(idx)
        r.sort()
    n = r.size
    if n and not (math.isfinite(r.item(0)) and math.isfinite(r.item(n - 1))):
        n = int(np.searchsorted(r, np.array(np.nan)))
        r = r[:n]
        if n and not (r.item(0) > 0.0 and math.isfinite(r.item(n - 1))):
            r = roti if idx is None else roti.take(idx)
            r = r[np.isfinite(r)]
            r.sort()
            n = r.size
    if not n:
        return math.nan, math.nan
    return r.item(n - 1), 0.5 * (r.item((n - 1) // 2) + r.item(n // 2))


def _old_max_abs(rot: F64, idx: npt.NDArray[np.intp] | None) -> float:
    """The previous ``_station._max_abs`` (oracle copy)."""
    r = np.sort(rot) if idx is None else rot.take(idx)
    if idx is not None:
        r.sort()
    n = r.size
    if not n:
        return math.nan
    top = r.item(n - 1)
    if math.isnan(top):
        n = int(np.searchsorted(r, np.array(np.nan)))
        if not n:
            return math.nan
        top = r.item(n - 1)
    return max(abs(r.item(0)), abs(top))


def _block(d: int, th: SlipThresholds, rng: np.random.Generator) -> F64:
    """A fresh block of ``d`` satellites as ``StationEstimator._block`` gathers it (invented
    wide-lane wavelengths)."""
    g = np.full((NROW, d), np.nan)
    g[:NSTATE] = new_state(d, th.mw_prior_sigma_m**2, th.gf_prior_sigma_m**2)
    g[LWL] = rng.uniform(0.75, 1.0, d)
    g[GF_FLOOR] = 0.0
    g[GF_LOW] = th.gf_floor_m
    g[MW_VAR + 1 :] = np.where(np.isnan(g[MW_VAR + 1 :]), 0.0, g[MW_VAR + 1 :])
    return g


def _epochs(seed: int, d: int, n_epochs: int):
    """Invented epochs: (t, gf_mw (2, d), cur (7, d), lli_lost, el (d,)) with smooth GF and MW
    plus noise, and now and then a GF or MW jump, a gap, a lock drop, a half-cycle flip, a pair
    change or a RINEX loss of lock; a quiet stretch in the middle runs the common path."""
    rng = np.random.default_rng(seed)
    gf0 = rng.uniform(-5.0, 5.0, d)
    mw0 = rng.uniform(-20.0, 20.0, d)
    rank = np.zeros(d)
    half = np.zeros((2, d))
    lock = np.full((2, d), 5.0)
    lock_t = np.zeros((2, d))
    t = 1000.0
    for k in range(n_epochs):
        quiet = 40 <= k < 70
        t += 1.0 if quiet or rng.random() > 0.05 else float(rng.choice([0.5, 20.0, 400.0]))
        gf = gf0 + 1e-4 * (t - 1000.0) + rng.normal(0.0, 2e-3, d)
        mw = mw0 + rng.normal(0.0, 0.05, d)
        if not quiet:
            for row, size in ((gf, 0.5), (mw, 5.0)):
                hit = rng.random(d) < 0.04
                row[hit] += size
            if rng.random() < 0.1:
                rank[int(rng.integers(d))] = float(rng.integers(2))
            if rng.random() < 0.1:
                half[int(rng.integers(2)), int(rng.integers(d))] = float(rng.integers(2))
            if rng.random() < 0.1:
                lock[int(rng.integers(2)), int(rng.integers(d))] = float(rng.integers(-1, 9))
        lock_t += 1.0
        if not quiet and rng.random() < 0.1:
            lock_t[int(rng.integers(2)), int(rng.integers(d))] = 0.0
        cur = np.vstack([rank[None], half, lock, lock_t])
        lli = None
        if not quiet and rng.random() < 0.1:
            lli = rng.random(d) < 0.2
        el = rng.uniform(0.05, 1.5, d)
        if rng.random() < 0.1:
            el[int(rng.integers(d))] = np.nan
        yield t, np.vstack([gf, mw]), cur.copy(), lli, el


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_slip_general_path_equals_previous_general_path(seed: int) -> None:
    """ArcState.detect updates its block, starts the same arcs with the same reasons and ids as
    with the previous general path, epoch after epoch (equal to the previous implementation
    (oracle copy))."""
    d = 9
    th = SlipThresholds()
    rng = np.random.default_rng(100 + seed)
    g_new = _block(d, th, rng)
    g_old = g_new.copy()
    new_st, old_st = ArcState(th), _OldArcState(th)
    b_new, b_old = ArcBlock(g_new), ArcBlock(g_old)
    no_new = np.zeros(d, np.bool_)
    no_new.setflags(write=False)
    starts = commons = 0
    for t, gf_mw, cur, lli, el in _epochs(seed, d, 160):
        kw = {"t": np.array(t), "gf_mw": gf_mw, "el_rad": el, "el_known": False,
              "lli_lost": lli, "gap_s": 30.0, "no_new": no_new}  # fmt: skip
        tracked = bool(np.all(g_new[N] >= 2.0))
        got = new_st.detect(b_new, cur=cur, all_tracked=tracked, **kw)
        want = old_st.detect(b_old, cur=cur.copy(), all_tracked=tracked, **kw)
        np.testing.assert_array_equal(got[0], want[0])
        if want[1] is None:
            assert got[1] is None
            commons += 1
        else:
            assert got[1] is not None
            assert got[1].dtype == want[1].dtype
            np.testing.assert_array_equal(got[1], want[1])
            starts += 1
        assert g_new.tobytes() == g_old.tobytes()  # every row, bit for bit (NaN included)
        assert new_st.next_arc == old_st.next_arc
    assert starts >= 40
    assert commons >= 20


@pytest.mark.parametrize("seed", [1, 2])
def test_slip_single_dt_shortcut_equals_per_row_dt(seed: int) -> None:
    """ArcState.detect taking one dt for all rows (every last_t the previous epoch's time) updates its block and starts the same arcs as computing dt row by row, through gaps and arc starts (source: the general path (oracle), ``ArcBlock.t_all`` forgotten before each call)."""
    d = 9
    th = SlipThresholds()
    rng = np.random.default_rng(200 + seed)
    g_fast = _block(d, th, rng)
    g_slow = g_fast.copy()
    fast_st, slow_st = ArcState(th), ArcState(th)
    b_fast, b_slow = ArcBlock(g_fast), ArcBlock(g_slow)
    no_new = np.zeros(d, np.bool_)
    no_new.setflags(write=False)
    shortcuts = starts = 0
    for t, gf_mw, cur, lli, el in _epochs(seed, d, 160):
        kw = {"t": np.array(t), "gf_mw": gf_mw, "el_rad": el, "el_known": False,
              "lli_lost": lli, "gap_s": 30.0, "no_new": no_new}  # fmt: skip
        tracked = bool(np.all(g_fast[N] >= 2.0))
        shortcuts += b_fast.t_all is not None
        b_slow.t_all = None  # the oracle: dt row by row from last_t
        got = fast_st.detect(b_fast, cur=cur, all_tracked=tracked, **kw)
        want = slow_st.detect(b_slow, cur=cur.copy(), all_tracked=tracked, **kw)
        np.testing.assert_array_equal(got[0], want[0])
        assert (got[1] is None) == (want[1] is None)
        if want[1] is not None:
            np.testing.assert_array_equal(got[1], want[1])
            starts += 1
        assert g_fast.tobytes() == g_slow.tobytes()  # every row, bit for bit (NaN included)
    assert shortcuts == 159  # all but the first epoch
    assert starts >= 40  # arc starts (gaps among them) as well as the common path


@pytest.mark.parametrize("seed", [5, 6])
def test_reason_tally_equals_previous_tally(seed: int) -> None:
    """The arc-reason counters count each reason bit of each satellite as the previous per-bit
    tally did, in the same dict order, and tell whether a pair switch is among them (equal to
    the previous implementation (oracle copy))."""
    rng = np.random.default_rng(seed)
    for _ in range(200):
        d = int(rng.integers(0, 12))
        reason = np.zeros(d, np.int64)
        for bit in REASON_NAMES:
            reason |= (rng.random(d) < 0.2) * bit
        got = {f"arcs_{n}": 3 for n in REASON_NAMES.values()}
        want = dict(got)
        pair = _tally_reasons(got, reason)
        _old_tally(want, reason)
        assert list(got.items()) == list(want.items())
        assert pair == bool(np.count_nonzero((reason & REASON_PAIR) != 0))


def _station_rows(rng: np.random.Generator) -> F64:
    m = int(rng.integers(0, 8))
    r = rng.normal(0.0, 1.0, m)
    kind = rng.integers(4)
    if kind == 0:
        r[:] = np.nan
    elif kind == 1:
        r[rng.random(m) < 0.4] = np.nan
    elif kind == 2:
        r[rng.random(m) < 0.3] = rng.choice([0.0, -0.0, np.inf, -np.inf])
    return r


def test_station_max_median_and_max_abs_equal_previous() -> None:
    """_max_median and _max_abs give the previous values, NaN where none (all-NaN rows
    included), over all satellites and over a selection (equal to the previous implementation
    (oracle copy))."""
    rng = np.random.default_rng(9)
    for _ in range(600):
        r = _station_rows(rng)
        m = r.shape[0]
        for idx in (None, np.flatnonzero(rng.random(m) < 0.6)):
            got = (*_station._max_median(r, idx), _station._max_abs(r, idx))
            want = (*_old_max_median(r, idx), _old_max_abs(r, idx))
            assert np.array(got).tobytes() == np.array(want).tobytes()


@pytest.mark.parametrize("min_count", [0, 1, 3])
def test_slot_std_empty_ring_shortcut_equals_std(min_count: int) -> None:
    """SlotStd.push_std gives what std() of the same satellites gives (NaN below min_count),
    bit for bit, while the ring holds no value (long all-NaN runs, skipped slots, values
    between), and after load_entries (equal to the general path: SlotStd.std)."""
    rng = np.random.default_rng(min_count)
    sats_a = np.array([2, 4, 6, 8])
    sats_a.setflags(write=False)
    win = SlotStd(10, 12.0, 1.0)
    t = 0.0
    for step in range(500):
        t += float(rng.choice([1.0] * 10 + [0.5, 3.0, 20.0]))
        value = rng.normal(size=4)
        if (step // 40) % 2 == 0 or rng.random() < 0.1:
            value[:] = np.nan
        elif rng.random() < 0.2:
            value[int(rng.integers(4))] = np.nan
        got = win.push_std(t, sats_a, value, min_count)
        assert got.tobytes() == win.std(sats_a, min_count).tobytes()
        if step == 250:
            win.load_entries(win.entries)


def test_bias_correction_kept_across_arc_starts_without_levelling_corrections(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The receiver-bias correction reused at arc starts while no levelling correction is held
    gives every snapshot and the final state (the golden test's digests of the demo capture and
    the invented scenario) of recomputing it at each arc start, as the previous code did (equal
    to the previous implementation: the same runs with the previous condition)."""
    seen: list[bool] = []
    per_arc = vars(BiasModel)["per_arc"].fget  # the property's getter

    def watched(self: BiasModel) -> bool:
        seen.append(per_arc(self))
        return seen[-1]

    monkeypatch.setattr(BiasModel, "per_arc", property(watched))
    kept = [digest(source) for source in ("demo", "synthetic")]
    assert seen.count(False) >= 30  # arc starts that kept the correction
    monkeypatch.setattr(BiasModel, "per_arc", property(lambda _self: True))
    assert [digest(source) for source in ("demo", "synthetic")] == kept
