"""Continuous-phase arcs and cycle-slip detection, vectorised over satellites (SCIENCE.md §4).

Axes: ``S`` satellite slots (``MAX_SAT_ID``) for the state, ``m`` satellites of this epoch for the
inputs (``idx`` maps them into the slots). Symbols: MW Melbourne–Wübbena combination (m), GF
geometry-free phase L1 − L2 (m), dt time since the satellite's previous sample (s), el elevation.

A new arc starts where any of these holds (common practice, SCIENCE.md §4):

* first sample, or a data gap longer than ``gap_s``;
* the frequency pair changed (band lost or back);
* RINEX LLI bit 0 (loss of lock) on either signal, or the half-cycle flag changed;
* the MSM lock-time indicator (DF402/DF407) or decoded lock time decreased on either signal;
* MW jumped: |MW − mean of the arc| > max(k_mw·σ_MW, floor·λ_WL); it sees every slip that changes
  the wide-lane ambiguity N1 − N2;
* GF jumped: |GF − (level + rate·dt)| (an α–β tracker of GF) > max(k_gf·σ_GF, (a + b·dt)·e(el)); it sees slips with
  N1 = N2 ≠ 0 that MW cannot (a 1/1 slip moves GF by λ2 − λ1 ≈ 5.4 cm on GPS L1/L2).

e(el) = 1 + 2·exp(−el/15°) widens the floor at low elevation, where noise and multipath grow
(1.0 in the zenith, ≈ 2.4 at 5°); without elevation e = 2. σ's are exponentially weighted running
scatters of the test residuals, kept across arcs (they describe the signal's noise, not the arc).
"""

# size: ~400 lines keep the slip tests' cheap screen, exact path and block views together (one per-epoch path).
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._npfast import count_nonzero as _count_nonzero
from ._state import (
    ARC,
    DT,
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
    MW_FLOOR,
    MW_MEAN,
    MW_THR,
    MW_VAR,
    NROW,
    RANK,
    N,
)

__all__ = ["ArcBlock", "ArcState", "SlipThresholds"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
Bool = npt.NDArray[np.bool_]
# Ufuncs on the per-epoch paths take ``out`` positionally (a keyword costs ~250 instructions;
# not np.maximum: deprecated there).

#: Reasons, as bits of the per-satellite ``reason`` array (for counters and diagnostics).
REASON_FIRST = 1
REASON_GAP = 2
REASON_PAIR = 4
REASON_LLI = 8
REASON_LOCK = 16
REASON_MW = 32
REASON_GF = 64
REASON_NAMES = {
    REASON_FIRST: "first",
    REASON_GAP: "gap",
    REASON_PAIR: "pair_switch",
    REASON_LLI: "lli_or_half_cycle",
    REASON_LOCK: "lock_time",
    REASON_MW: "mw_jump",
    REASON_GF: "gf_jump",
}
#: e(el) = 1 + 2·exp(el·_EL_SCALE): exp(−el/15°) with el in radians.
_EL_SCALE = np.array(-180.0 / np.pi / 15.0)
_ZERO = np.array(0.0)
_ONE = np.array(1.0)
_TWO = np.array(2.0)


@dataclass(frozen=True, slots=True, kw_only=True)
class SlipThresholds:
    """Detector settings (defaults: common practice, tuned on our simulator and real RINEX)."""

    mw_k_sigma: float = 5.0
    mw_floor_wl_cycles: float = 0.6
    mw_prior_sigma_m: float = 0.5
    gf_k_sigma: float = 6.0
    gf_floor_m: float = 0.015
    gf_floor_m_per_s: float = 0.003
    gf_prior_sigma_m: float = 0.01
    #: Weight of the newest squared residual in the running scatters.
    ema_weight: float = 0.05
    #: α–β tracker gains of the GF prediction (level, rate).
    level_weight: float = 0.5
    rate_weight: float = 0.1


class ArcBlock:
    """The rows of a block ``g`` (NROW, d) the slip tests use, as views made once per block, and
    their work buffers (no allocation and no indexing per epoch on the common path). Copies and
    pickles rebuild the views of the copied ``g`` (the buffers are written before they are read).

    ``n_ref`` (≥ 2): rows of ``g`` from ``GF_PRED`` on that :meth:`ArcState.detect` subtracts
    from its samples in one call: the GF prediction and MW mean it tests against, then rows the
    caller wants differenced too (read back from ``diff[2:]``).
    """

    __slots__ = ("absres", "cur", "cur_id", "cur_lock", "d", "diff", "dt", "dt_s", "g", "jump", "keep",
                 "last_t", "level", "level_step", "low_thr", "mw_floor", "mw_mean", "mw_thr",
                 "mw_var", "n", "n_ref", "pred", "prev", "prev_id", "prev_lock", "rate", "ref",
                 "res", "res_gf", "res_mw", "scr", "scr_dt", "scr_flags", "scr_id", "scr_lock",
                 "sq", "t_all", "var", "x_mw", "x_rate")  # fmt: skip

    def __init__(self, g: F64, n_ref: int = 2) -> None:
        d = g.shape[1]
        assert g.shape == (NROW, d), g.shape
        assert 2 <= n_ref <= NROW - GF_PRED, n_ref
        self.g, self.d, self.n_ref = g, d, n_ref
        #: The time every row of ``last_t`` holds (s; None: not known): :meth:`ArcState.detect`
        #: writes this epoch's time into all of them (on both of its paths), so from its second
        #: call on one dt is all.
        self.t_all: float | None = None
        #: The value :meth:`ArcState.detect` last filled every row of ``dt`` with (None: not
        #: known; nothing else writes that row of a block).
        self.dt_s: float | None = None
        self.last_t, self.dt, self.n = g[LAST_T], g[DT], g[N]
        self.prev = g[RANK : LT2 + 1]  # rank, half-cycle flags, lock indicators, lock times
        self.prev_id = g[RANK : HALF2 + 1]
        self.prev_lock = g[LOCK1 : LT2 + 1]
        self.pred, self.rate, self.level = g[GF_PRED], g[GF_RATE], g[GF_LEVEL]
        self.ref = g[GF_PRED : GF_PRED + n_ref]  # GF prediction, MW mean, the caller's rows
        self.diff = np.empty((n_ref, d))
        self.res = self.diff[:2]  # residuals: GF − prediction, MW − mean of the arc
        self.res_gf, self.res_mw = self.diff[0], self.diff[1]
        self.mw_mean = g[MW_MEAN]
        self.var = g[GF_VAR : MW_VAR + 1]
        self.mw_var, self.mw_thr, self.mw_floor = g[MW_VAR], g[MW_THR], g[MW_FLOOR]
        self.low_thr = g[GF_LOW : MW_THR + 1]  # (GF bound, MW threshold)
        self.absres = np.empty((2, d))
        # The residuals times their weights: the scatters' (GF, MW), the GF rate and MW mean
        # updates', the GF level's.
        self.sq = np.empty((2, d))
        self.x_rate, self.x_mw, self.level_step = np.empty(d), np.empty(d), np.empty(d)
        #: The caller's ``cur`` (7, d) the views below were made of (None: not yet).
        self.cur: F64 | None = None
        self.cur_id = self.cur_lock = self.absres  # placeholders, set with ``cur``
        self.jump = np.empty((2, d), np.bool_)
        #: The general path's (GF, MW) rows of "the scatter learns from this residual".
        self.keep = np.empty((2, d), np.bool_)
        # Screen flags: pair rank or half-cycle flag changed, lock indicator or time went
        # down (7 rows), previous sample recent enough (1 row).
        self.scr = np.empty((8, d), np.bool_)
        self.scr_id, self.scr_lock = self.scr[0:3], self.scr[3:7]
        self.scr_flags, self.scr_dt = self.scr[0:7], self.scr[7]

    def __reduce__(self) -> tuple[type[ArcBlock], tuple[F64, int]]:
        return (ArcBlock, (self.g, self.n_ref))


class ArcState:
    """Slip detection over the block of one epoch (see ``_state``)."""

    def __init__(self, thresholds: SlipThresholds) -> None:
        self.th = th = thresholds
        self.next_arc = 0
        # Constants as 0-d arrays (a Python float operand costs a conversion per numpy call).
        self._gf_k = np.array(th.gf_k_sigma)
        self._mw_k = np.array(th.mw_k_sigma)
        self._keep_w = np.array(1.0 - th.ema_weight)
        #: Weights of the residuals: in the scatters, the GF rate update and the GF level.
        self._ema_w = np.array(th.ema_weight)
        self._rate_w = np.array(th.rate_weight)
        self._level_w = np.array(th.level_weight)
        self._floor_per_s = np.array(th.gf_floor_m_per_s)
        self._floor = np.array(th.gf_floor_m)
        #: The GF floor's lower bound holds (see :meth:`detect`).
        self._gf_bound = th.gf_floor_m >= 0.0 and th.gf_floor_m_per_s >= 0.0
        self._gap = (math.nan, np.array(math.nan))  # (gap_s, the same as a 0-d array)

    def prepare_block(self, g: F64) -> None:
        """Fill the layout-constant rows of a freshly gathered block (MW floor, GF bound)."""
        np.multiply(g[LWL], self.th.mw_floor_wl_cycles, out=g[MW_FLOOR])
        g[GF_LOW] = self.th.gf_floor_m

    def detect(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
        self,
        b: ArcBlock,
        t: float | F64,
        gf_mw: F64,
        el_rad: F64,
        el_known: bool,
        cur: F64,
        lli_lost: Bool | None,
        gap_s: float,
        all_tracked: bool | None,
        no_new: Bool,
    ) -> tuple[Bool, npt.NDArray[np.int64] | None]:
        """Test this epoch's samples against the block ``b.g`` (NROW, d), update it in place
        (arc ids, counts, MW/GF trackers, flags), return (new_arc, reason bits or None when no
        arc starts).

        ``t``: epoch time (s, a float or 0-d); ``gf_mw`` (``b.n_ref``, d): GF and MW (m), then the samples
        whose differences with the block rows after ``MW_MEAN`` go to ``b.diff[2:]``, computed
        before any update (``b.diff`` is valid until the next call); ``el_known``: no elevation
        is NaN; ``cur`` (7, d): this epoch's pair rank, half-cycle flags of band 1 and 2, MSM
        lock-time indicators of band 1 and 2 (−1 none) and decoded lock times of band 1 and 2
        (s, NaN none), in the order of the block rows ``RANK … LT2``; ``lli_lost``: RINEX loss of
        lock per satellite (None: none this epoch); ``all_tracked``: every arc has two samples or
        more (None: unknown); ``no_new``: all False, read-only (returned when no arc starts).
        """
        cont = self.try_continue(b, t, gf_mw, el_rad, el_known, cur, lli_lost, gap_s, all_tracked)
        if cont is None:
            return no_new, None
        dt, screen, all_tracked, tracked = cont
        out = self._general(b, t=t, dt=dt, gf_mw=gf_mw, res=b.res, jump=b.jump, cur=cur,
                            lli_lost=lli_lost, gap_s=gap_s, screen=screen,
                            all_tracked=all_tracked, tracked=tracked)  # fmt: skip
        b.t_all = float(t)  # (``_general`` writes t into every last_t too)
        return out

    def try_continue(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
        self,
        b: ArcBlock,
        t: float | F64,
        gf_mw: F64,
        el_rad: F64,
        el_known: bool,
        cur: F64,
        lli_lost: Bool | None,
        gap_s: float,
        all_tracked: bool | None,
    ) -> tuple[F64, bool, bool, Bool | None] | None:
        """:meth:`detect`'s common case: when no test fires and every arc has two samples or
        more, every arc continues and learns from its residuals (the block updated in place) and
        None is returned. Otherwise nothing of the block is changed but its work rows and
        buffers (``DT``, ``GF_PRED``, ``MW_THR``, ``GF_FLOOR``, ``b.diff``, ``b.jump``: what
        any later test writes again before it reads them) and (dt, screen, all_tracked,
        tracked) for the general path is returned: the batched tick screens several stations'
        blocks laid side by side this way and, when one of them needs the general path, runs
        every station alone (tests/test_estimator_tick.py)."""
        g, d = b.g, b.d
        assert gf_mw.shape == (b.n_ref, d), gf_mw.shape
        assert el_rad.shape == (d,), el_rad.shape
        assert cur.shape == (7, d), cur.shape
        t_all = b.t_all
        if t_all is None:
            dt = np.subtract(t, b.last_t, b.dt)
            b.dt_s = None
        else:  # every row's t − last_t, the same IEEE subtraction in Python
            dt_s = float(t) - t_all
            dt = b.dt
            if dt_s != b.dt_s or dt_s == 0.0:  # (the row holds the last one: the interval)
                dt.fill(dt_s)
                b.dt_s = dt_s
        # Cheap screen, a superset of the hard reasons below (computed exactly only if it fires):
        # no previous sample or a gap, another pair, a half-cycle flag that changed, a lock
        # indicator or lock time that went down, RINEX loss of lock.
        if cur is not b.cur:
            b.cur, b.cur_id, b.cur_lock = cur, cur[0:3], cur[3:7]
        np.not_equal(b.cur_id, b.prev_id, b.scr_id)
        np.less(b.cur_lock, b.prev_lock, b.scr_lock)
        if t_all is None:
            gap = self._gap
            if gap[0] != gap_s:
                self._gap = gap = (gap_s, np.array(gap_s))
            np.less_equal(dt, gap[1], b.scr_dt)
            late = _count_nonzero(b.scr_dt) != d
        else:
            late = not dt_s <= gap_s
        screen = (
            _count_nonzero(b.scr_flags)
            or late
            or (lli_lost is not None and _count_nonzero(lli_lost))
        )
        n = b.n
        tracked = None
        if all_tracked is None or not all_tracked:
            tracked = n >= 2
            all_tracked = _count_nonzero(tracked) == d
        # Jump tests (they count only where the arc continues so far), as (GF, MW) stacks.
        pred = b.pred
        if tracked is None or all_tracked:
            np.multiply(b.rate, dt, pred)
        else:
            np.multiply(np.where(tracked, b.rate, _ZERO), dt, pred)
        pred += b.level
        np.subtract(gf_mw, b.ref, b.diff)
        res = b.res  # GF − prediction, MW − mean of the arc
        abs_res = np.abs(res, b.absres)
        # Thresholds max(k·σ, floor): MW exactly; GF first by its lower bound a (the floor
        # (a + b·dt)·e(el) is at least a: dt > 0, b ≥ 0, e ≥ 1), exactly only where a residual
        # exceeds that bound (rare: GF residuals are millimetres, a is 15 mm).
        mw_thr = np.sqrt(b.mw_var, b.mw_thr)
        mw_thr *= self._mw_k
        np.maximum(mw_thr, b.mw_floor, out=mw_thr)
        jump = np.greater(abs_res, b.low_thr, b.jump)  # GF jump (bound only), MW jump
        any_jump = _count_nonzero(jump)
        if not self._gf_bound or (any_jump and _count_nonzero(jump[0])):
            gf_thr = np.sqrt(g[GF_VAR])
            gf_thr *= self._gf_k
            # GF floor (a + b·dt)·e(el), e(el) = 1 + 2·exp(−el/15°), 2 where el is unknown
            el_factor = np.multiply(el_rad, _EL_SCALE)
            np.exp(el_factor, out=el_factor)
            el_factor *= _TWO
            el_factor += _ONE
            if not el_known:
                el_factor[np.isnan(el_rad)] = 2.0
            floor = g[GF_FLOOR]
            np.multiply(dt, self._floor_per_s, out=floor)
            floor += self._floor
            floor *= el_factor
            np.maximum(gf_thr, floor, out=gf_thr)
            np.greater(abs_res[0], gf_thr, out=jump[0])
            any_jump = _count_nonzero(jump)
        if not screen and not any_jump and all_tracked:
            # The common case: every arc continues and learns from its residuals, in place:
            # scatters, then GF rate += rate_weight·res_GF/dt and MW mean += res_MW/(n + 1) as
            # 1-d rows, GF level = prediction + level_weight·res_GF. (One (2, d) operation on
            # broadcast or strided rows costs more than two on 1-d rows: NumPy's iterator.)
            sq = np.multiply(res, self._ema_w, b.sq)  # w·res
            var = b.var
            var *= self._keep_w
            sq *= res
            var += sq
            n += _ONE
            x = np.multiply(b.res_gf, self._rate_w, b.x_rate)
            x /= b.dt
            b.rate += x
            b.mw_mean += np.divide(b.res_mw, n, b.x_mw)  # (1·res_MW)/n: the same bits
            np.multiply(b.res_gf, self._level_w, b.level_step)
            np.add(pred, b.level_step, b.level)
            b.last_t.fill(t)
            b.t_all = float(t)
            b.prev[...] = cur
            return None
        return dt, bool(screen), bool(all_tracked), tracked

    def _general(
        self, b: ArcBlock, *, t: float | F64, dt: F64, gf_mw: F64, res: F64, jump: Bool, cur: F64,
        lli_lost: Bool | None, gap_s: float, screen: bool, all_tracked: bool,
        tracked: Bool | None,
    ) -> tuple[Bool, npt.NDArray[np.int64] | None]:  # fmt: skip
        """:meth:`detect` when an arc may start or a young arc has fewer than two samples
        (``tracked``: n ≥ 2 per arc, None when all are)."""
        g = b.g
        gf_m, mw_m = gf_mw[0], gf_mw[1]
        gf_jump, mw_jump = jump
        new = np.logical_or(gf_jump, mw_jump)
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
        k = _count_nonzero(new)
        reason: npt.NDArray[np.int64] | None = None
        if k:
            if screen:
                cont = ~hard
                reason = (
                    first * REASON_FIRST | gap * REASON_GAP | pair * REASON_PAIR
                    | lli * REASON_LLI | lock_drop * REASON_LOCK | (cont & mw_jump) * REASON_MW
                    | (cont & gf_jump) * REASON_GF
                )  # fmt: skip
            else:  # no hard reason: the same int64 bits as the expression above
                reason = mw_jump * REASON_MW | gf_jump * REASON_GF
        # Every column is updated as the common path of :meth:`detect` updates it (the same
        # operations, operands commuted at most: IEEE sums and products are commutative), then
        # the columns that do not continue so are overwritten: new arcs restart (rate 0, level
        # and MW mean at this sample, one sample), the second sample of an arc sets the GF rate
        # from a plain difference, and the scatters keep their values where they do not learn
        # (GF: the rate prediction is not in use yet; MW: new arc).
        n = b.n
        keep = b.keep  # (GF, MW) rows: the scatters learn here
        ok = np.logical_not(new, keep[1])
        if all_tracked:
            keep[0] = ok
        else:
            assert tracked is not None
            np.logical_and(tracked, ok, keep[0])
            second = np.equal(n, _ONE)
            if _count_nonzero(second):
                rate2 = np.subtract(gf_m, b.level)  # (GF − level)/dt, before the level moves
                rate2 /= dt
            else:
                second = None
        res = b.res
        sq = np.multiply(res, self._ema_w, b.sq)  # w·res
        sq *= res
        var = np.multiply(b.var, self._keep_w)
        var += sq
        np.copyto(b.var, var, where=keep)
        x = np.multiply(b.res_gf, self._rate_w, b.x_rate)
        x /= dt
        rate = b.rate
        rate += x
        np.multiply(b.res_gf, self._level_w, b.level_step)
        np.add(b.pred, b.level_step, b.level)
        n += _ONE
        b.mw_mean += np.divide(b.res_mw, n, b.x_mw)
        if not all_tracked and second is not None:
            np.copyto(rate, rate2, where=second)
            np.copyto(b.level, gf_m, where=second)
        if k:
            np.copyto(rate, _ZERO, where=new)
            np.copyto(b.level, gf_m, where=new)
            np.copyto(n, _ONE, where=new)
            np.copyto(b.mw_mean, mw_m, where=new)
            g[ARC, new] = self.next_arc + np.arange(k)
            self.next_arc += k
        b.last_t.fill(t)
        b.prev[...] = cur
        return new, reason
