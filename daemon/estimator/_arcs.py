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


class ArcState:
    """Per-satellite arc bookkeeping for one station (all arrays indexed by satellite slot)."""

    def __init__(self, n_slots: int, thresholds: SlipThresholds) -> None:
        self.th = thresholds
        self.next_arc = 0
        self.arc_id = np.full(n_slots, -1, np.int32)
        self.n = np.zeros(n_slots, np.int64)  # samples in the current arc
        self.last_t = np.full(n_slots, np.nan)
        self.rank = np.full(n_slots, -1, np.int16)
        self.lock1 = np.full(n_slots, -1, np.int16)
        self.lock2 = np.full(n_slots, -1, np.int16)
        self.locktime1 = np.full(n_slots, np.nan, np.float32)
        self.locktime2 = np.full(n_slots, np.nan, np.float32)
        self.half1 = np.zeros(n_slots, np.bool_)
        self.half2 = np.zeros(n_slots, np.bool_)
        self.mw_mean = np.zeros(n_slots)
        self.mw_var = np.full(n_slots, thresholds.mw_prior_sigma_m**2)
        self.gf_prev = np.zeros(n_slots)
        self.gf_rate = np.zeros(n_slots)
        self.gf_var = np.full(n_slots, thresholds.gf_prior_sigma_m**2)

    def detect(
        self,
        *,
        t: float,
        idx: Idx,
        rank: npt.NDArray[np.int16],
        mw_m: F64,
        gf_m: F64,
        lambda_wl_m: F64,
        el_rad: F64,
        lock1: npt.NDArray[np.int16],
        lock2: npt.NDArray[np.int16],
        locktime1: npt.NDArray[np.float32],
        locktime2: npt.NDArray[np.float32],
        half1: npt.NDArray[np.bool_],
        half2: npt.NDArray[np.bool_],
        lli_lost: npt.NDArray[np.bool_],
        gap_s: float,
    ) -> tuple[npt.NDArray[np.int32], npt.NDArray[np.bool_], npt.NDArray[np.int64]]:
        """Test this epoch's samples, update the state, return (arc_id, new_arc, reason bits)."""
        m = idx.shape[0]
        for a in (rank, mw_m, gf_m, lambda_wl_m, el_rad, lock1, lock2, half1, half2, lli_lost):
            assert a.shape == (m,), (a.shape, m)
        th = self.th
        dt = t - self.last_t[idx]
        reason = np.zeros(m, np.int64)
        first = ~np.isfinite(dt)
        reason[first] |= REASON_FIRST
        reason[dt > gap_s] |= REASON_GAP
        prev_rank = self.rank[idx]
        reason[(prev_rank >= 0) & (prev_rank != rank)] |= REASON_PAIR
        half_changed = (self.half1[idx] != half1) | (self.half2[idx] != half2)
        reason[lli_lost | half_changed] |= REASON_LLI
        p1, p2 = self.lock1[idx], self.lock2[idx]
        lock_drop = ((lock1 >= 0) & (p1 >= 0) & (lock1 < p1)) | (
            (lock2 >= 0) & (p2 >= 0) & (lock2 < p2)
        )
        lock_drop |= (locktime1 < self.locktime1[idx]) | (locktime2 < self.locktime2[idx])
        reason[lock_drop] |= REASON_LOCK

        # Jump tests only where the arc continues so far.
        cont = reason == 0
        mw_res = mw_m - self.mw_mean[idx]
        mw_thr = np.maximum(th.mw_k_sigma * np.sqrt(self.mw_var[idx]), th.mw_floor_wl_cycles * lambda_wl_m)
        reason[cont & (np.abs(mw_res) > mw_thr)] |= REASON_MW
        el_factor = np.where(np.isfinite(el_rad), 1.0 + 2.0 * np.exp(-np.degrees(el_rad) / 15.0), 2.0)
        pred = self.gf_prev[idx] + np.where(self.n[idx] >= 2, self.gf_rate[idx], 0.0) * dt
        gf_res = gf_m - pred
        gf_thr = np.maximum(
            th.gf_k_sigma * np.sqrt(self.gf_var[idx]),
            (th.gf_floor_m + th.gf_floor_m_per_s * dt) * el_factor,
        )
        reason[cont & (np.abs(gf_res) > gf_thr)] |= REASON_GF
        new = reason != 0

        # Update: continuing arcs learn from their residuals, new arcs restart.
        ok = ~new
        io, inew = idx[ok], idx[new]
        w = th.ema_weight
        self.mw_var[io] = (1.0 - w) * self.mw_var[io] + w * mw_res[ok] ** 2
        # GF: the running scatter learns only once the rate prediction is in use.
        learn = ok & (self.n[idx] >= 2)
        il = idx[learn]
        self.gf_var[il] = (1.0 - w) * self.gf_var[il] + w * gf_res[learn] ** 2
        # α–β tracker on GF: the level absorbs part of the residual, the rate a smaller part
        # (the second sample of an arc sets the rate from a plain difference).
        second = self.n[io] == 1
        res_ok = gf_res[ok]
        self.gf_rate[io] = np.where(
            second, (gf_m[ok] - self.gf_prev[io]) / dt[ok], self.gf_rate[io] + th.rate_weight * res_ok / dt[ok]
        )
        self.gf_prev[io] = np.where(second, gf_m[ok], pred[ok] + th.level_weight * res_ok)
        self.n[io] += 1
        self.mw_mean[io] += (mw_m[ok] - self.mw_mean[io]) / self.n[io]
        k = inew.shape[0]
        self.arc_id[inew] = self.next_arc + np.arange(k, dtype=np.int32)
        self.next_arc += k
        self.n[inew] = 1
        self.mw_mean[inew] = mw_m[new]
        self.gf_rate[inew] = 0.0
        self.gf_prev[inew] = gf_m[new]
        self.last_t[idx] = t
        self.rank[idx] = rank
        self.lock1[idx], self.lock2[idx] = lock1, lock2
        self.locktime1[idx], self.locktime2[idx] = locktime1, locktime2
        self.half1[idx], self.half2[idx] = half1, half2
        return self.arc_id[idx], new, reason
