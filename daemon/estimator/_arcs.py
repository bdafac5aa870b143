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

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._state import (
    ARC,
    GF_LEVEL,
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
    NCOL,
    RANK,
    N,
)

__all__ = ["ArcState", "SlipThresholds"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]

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


def _sel(all_true: bool, mask: npt.NDArray[np.bool_], a: F64, b: F64 | float) -> F64:
    """``np.where(mask, a, b)``, skipped when the caller knows the mask is all True."""
    return a if all_true else np.where(mask, a, b)


class ArcState:
    """Slip detection over the gathered state block of one epoch (see ``_state``)."""

    def __init__(self, thresholds: SlipThresholds) -> None:
        self.th = thresholds
        self.next_arc = 0

    def detect(
        self,
        g: F64,
        *,
        t: float,
        rank: F64,
        mw_m: F64,
        gf_m: F64,
        el_rad: F64,
        lock: npt.NDArray[np.int16],
        locktime: npt.NDArray[np.float32],
        half: npt.NDArray[np.bool_],
        lli_lost: npt.NDArray[np.bool_],
        gap_s: float,
    ) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.int64]]:
        """Test this epoch's samples against the block ``g`` (m, NCOL), update it in place
        (arc ids, counts, MW/GF trackers, flags), return (new_arc, reason bits).

        ``lock``, ``locktime`` and ``half`` are (m, 2): band 1 and band 2 of the pair.
        """
        m = g.shape[0]
        assert g.shape == (m, NCOL), g.shape
        for a in (rank, mw_m, gf_m, el_rad, lli_lost):
            assert a.shape == (m,), (a.shape, m)
        assert lock.shape == locktime.shape == half.shape == (m, 2), lock.shape
        th = self.th
        dt = t - g[:, LAST_T]
        prev_rank = g[:, RANK]
        lock_drop = (
            ((lock < g[:, LOCK1 : LOCK2 + 1]) & (lock >= 0)) | (locktime < g[:, LT1 : LT2 + 1])
        ).any(axis=1)
        first = np.isnan(dt)
        gap = dt > gap_s
        pair = (prev_rank >= 0) & (prev_rank != rank)
        lli = lli_lost | (half != g[:, HALF1 : HALF2 + 1]).any(axis=1)
        hard = first | gap | pair | lli | lock_drop
        # Jump tests (they count only where the arc continues so far).
        mw_res = mw_m - g[:, MW_MEAN]
        mw_thr = np.maximum(
            th.mw_k_sigma * np.sqrt(g[:, MW_VAR]), th.mw_floor_wl_cycles * g[:, LWL]
        )
        el_factor = np.where(
            np.isnan(el_rad), 2.0, 1.0 + 2.0 * np.exp(el_rad * (-180.0 / np.pi / 15.0))
        )
        n = g[:, N]
        tracked = n >= 2
        all_tracked = bool(tracked.all())
        pred = g[:, GF_LEVEL] + _sel(all_tracked, tracked, g[:, GF_RATE], 0.0) * dt
        gf_res = gf_m - pred
        gf_thr = np.maximum(
            th.gf_k_sigma * np.sqrt(g[:, GF_VAR]),
            (th.gf_floor_m + th.gf_floor_m_per_s * dt) * el_factor,
        )
        mw_jump = np.abs(mw_res) > mw_thr
        gf_jump = np.abs(gf_res) > gf_thr
        new = hard | mw_jump | gf_jump
        all_ok = not new.any()  # the common case: nothing restarts this epoch
        if all_ok:
            reason = np.zeros(m, np.int64)
        else:
            cont = ~hard
            reason = (
                first * REASON_FIRST | gap * REASON_GAP | pair * REASON_PAIR | lli * REASON_LLI
                | lock_drop * REASON_LOCK | (cont & mw_jump) * REASON_MW
                | (cont & gf_jump) * REASON_GF
            )  # fmt: skip
        ok = ~new

        # Continuing arcs learn from their residuals; new arcs restart.
        w = th.ema_weight
        mw_var = g[:, MW_VAR]
        g[:, MW_VAR] = _sel(all_ok, ok, (1.0 - w) * mw_var + w * mw_res * mw_res, mw_var)
        # GF: the scatter learns only once the rate prediction is in use; α–β tracker: the
        # level absorbs part of the residual, the rate a smaller part (the second sample of an
        # arc sets the rate from a plain difference).
        gf_var = g[:, GF_VAR]
        learn = ok & tracked
        g[:, GF_VAR] = _sel(
            all_ok and all_tracked, learn, (1.0 - w) * gf_var + w * gf_res * gf_res, gf_var
        )
        rate = g[:, GF_RATE] + th.rate_weight * gf_res / dt
        level = pred + th.level_weight * gf_res
        if not all_tracked:
            second = n == 1
            rate = np.where(second, (gf_m - g[:, GF_LEVEL]) / dt, rate)
            level = np.where(second, gf_m, level)
        g[:, GF_RATE] = _sel(all_ok, ok, rate, 0.0)
        g[:, GF_LEVEL] = _sel(all_ok, ok, level, gf_m)
        n_new = _sel(all_ok, ok, n + 1.0, 1.0)
        g[:, N] = n_new
        g[:, MW_MEAN] = _sel(all_ok, ok, g[:, MW_MEAN] + mw_res / n_new, mw_m)
        if not all_ok:
            k = int(np.count_nonzero(new))
            g[new, ARC] = self.next_arc + np.arange(k)
            self.next_arc += k
        g[:, LAST_T] = t
        g[:, RANK] = rank
        g[:, LOCK1 : LOCK2 + 1] = lock
        g[:, LT1 : LT2 + 1] = locktime
        g[:, HALF1 : HALF2 + 1] = half
        return new, reason
