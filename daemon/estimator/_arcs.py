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
    HALF2,
    LAST_T,
    LOCK1,
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
        flags: F64,
        lli_lost: npt.NDArray[np.bool_],
        gap_s: float,
    ) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.int64] | None]:
        """Test this epoch's samples against the block ``g`` (m, NCOL), update it in place
        (arc ids, counts, MW/GF trackers, flags), return (new_arc, reason bits or None when no
        arc starts).

        ``flags`` is (m, 6) in state-column order: MSM lock-time indicator of band 1 and 2 (−1
        none), decoded lock time of band 1 and 2 (s, NaN none), half-cycle flag of band 1 and 2.
        """
        m = g.shape[0]
        assert g.shape == (m, NCOL), g.shape
        for a in (rank, mw_m, gf_m, el_rad, lli_lost):
            assert a.shape == (m,), (a.shape, m)
        assert flags.shape == (m, 6), flags.shape
        th = self.th
        dt = t - g[:, LAST_T]
        prev = g[:, LOCK1 : HALF2 + 1]
        # Cheap screen, a superset of the hard reasons below (computed exactly only if it fires):
        # no previous sample or a gap, another pair, a lock indicator or lock time that went down,
        # a half-cycle flag that changed, RINEX loss of lock.
        screen = (
            np.count_nonzero(~(dt <= gap_s))
            or np.count_nonzero(g[:, RANK] != rank)
            or np.count_nonzero(flags[:, :4] < prev[:, :4])
            or np.count_nonzero(flags[:, 4:] != prev[:, 4:])
            or np.count_nonzero(lli_lost)
        )
        if screen:
            prev_rank = g[:, RANK]
            lock = flags[:, 0:2]
            lock_drop = (
                ((lock < prev[:, 0:2]) & (lock >= 0)) | (flags[:, 2:4] < prev[:, 2:4])
            ).any(axis=1)
            first = np.isnan(dt)
            gap = dt > gap_s
            pair = (prev_rank >= 0) & (prev_rank != rank)
            lli = lli_lost | (flags[:, 4:] != prev[:, 4:]).any(axis=1)
            hard = first | gap | pair | lli | lock_drop
        # Jump tests (they count only where the arc continues so far).
        mw_res = mw_m - g[:, MW_MEAN]
        mw_thr = np.sqrt(g[:, MW_VAR])
        mw_thr *= th.mw_k_sigma
        np.maximum(mw_thr, th.mw_floor_wl_cycles * g[:, LWL], out=mw_thr)
        # e(el) = 1 + 2·exp(−el/15°), 2 where the elevation is unknown
        el_factor = np.exp(el_rad * (-180.0 / np.pi / 15.0))
        el_factor *= 2.0
        el_factor += 1.0
        el_nan = np.isnan(el_rad)
        if np.count_nonzero(el_nan):
            el_factor[el_nan] = 2.0
        n = g[:, N]
        tracked = n >= 2
        all_tracked = np.count_nonzero(tracked) == m
        pred = _sel(all_tracked, tracked, g[:, GF_RATE], 0.0) * dt
        pred += g[:, GF_LEVEL]
        gf_res = gf_m - pred
        gf_thr = np.sqrt(g[:, GF_VAR])
        gf_thr *= th.gf_k_sigma
        floor = th.gf_floor_m_per_s * dt
        floor += th.gf_floor_m
        floor *= el_factor
        np.maximum(gf_thr, floor, out=gf_thr)
        mw_jump = np.abs(mw_res) > mw_thr
        gf_jump = np.abs(gf_res) > gf_thr
        new = mw_jump | gf_jump
        if screen:
            new |= hard
        all_ok = np.count_nonzero(new) == 0  # the common case: nothing restarts this epoch
        reason: npt.NDArray[np.int64] | None = None
        if not all_ok:
            if not screen:
                first = gap = pair = lli = lock_drop = hard = np.zeros(m, np.bool_)
            cont = ~hard
            reason = (
                first * REASON_FIRST | gap * REASON_GAP | pair * REASON_PAIR | lli * REASON_LLI
                | lock_drop * REASON_LOCK | (cont & mw_jump) * REASON_MW
                | (cont & gf_jump) * REASON_GF
            )  # fmt: skip
        w = th.ema_weight
        if all_ok and all_tracked:
            # Continuing arcs learn from their residuals, in place on the block's columns.
            mw_var = g[:, MW_VAR]
            mw_var *= 1.0 - w
            mw_var += w * mw_res * mw_res
            gf_var = g[:, GF_VAR]
            gf_var *= 1.0 - w
            gf_var += w * gf_res * gf_res
            step = th.rate_weight * gf_res
            step /= dt
            g[:, GF_RATE] += step
            pred += th.level_weight * gf_res
            g[:, GF_LEVEL] = pred
            n += 1.0
            g[:, MW_MEAN] += mw_res / n
        else:
            ok = ~new
            # Continuing arcs learn from their residuals; new arcs restart.
            mw_var = g[:, MW_VAR]
            g[:, MW_VAR] = _sel(all_ok, ok, (1.0 - w) * mw_var + w * mw_res * mw_res, mw_var)
            # GF: the scatter learns only once the rate prediction is in use; α–β tracker: the
            # level absorbs part of the residual, the rate a smaller part (the second sample of
            # an arc sets the rate from a plain difference).
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
        prev[...] = flags
        return new, reason
