"""Code biases in the geometry-free code: satellite part (broadcast or config) and receiver part.

Axes: ``S`` satellite slots × ``W`` pair ranks of the pair table; ``m`` satellites of an epoch.

* Satellite part, per (satellite, rank): c·(d₂ − d₁) metres from the broadcast group delays
  (:func:`band_delays_s`) or −c·DCB from ``[estimator] satellite_dcb_ns``; × K gives TECU.
* Receiver part, per group (system, pair): :class:`ReceiverBias` (reduced least squares with a
  plane of VTEC), applied once its 1-σ is at most ``APPLY_SIGMA_TECU``.
* Satellites whose satellite part is unknown (GLONASS FDMA, GPS L5 without CNAV ISC, …) stay out
  of that fit: their combined satellite + receiver bias is the forgetting-weighted mean of their
  residual from each fitted VTEC plane, applied after ``COMB_MIN_SAMPLES`` samples (until then
  their STEC is NaN). Without any known satellite part at all (no ephemerides), every satellite
  enters the fit with 0 and STEC carries the (unknown) satellite biases.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import SYSTEMS, sat_id

from ._pairs import C_MPS
from ._rxbias import ReceiverBias

if TYPE_CHECKING:
    from ionwarden.daemon.config import EstimatorSettings

    from ._pairs import PairTable

__all__ = ["APPLY_SIGMA_TECU", "COMB_MIN_SAMPLES", "BiasModel"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
#: A receiver-bias estimate is applied to STEC once its 1-σ is at most this (TECU).
APPLY_SIGMA_TECU = 3.0
#: Samples (one per receiver-bias update) before a satellite's combined bias is applied.
COMB_MIN_SAMPLES = 8.0
_MIN_FIT = 5
#: Floor of the per-epoch σ in the combined-bias weights (TECU): residual scatter per epoch.
_COMB_SIGMA0_TECU = 0.3
#: Arc length (samples) at which a residual's levelling error counts half in the combined bias.
_COMB_ARC_SAMPLES = 300.0


class BiasModel:
    """Satellite and receiver code biases of one station (see module doc)."""

    def __init__(self, pairs: PairTable, cfg: EstimatorSettings, n_slots: int) -> None:
        self.pairs = pairs
        w = pairs.width
        self.update_s = cfg.receiver_bias_update_s
        self.memory_s = cfg.receiver_bias_memory_s
        labels = [f"{SYSTEMS[s]}:{lab}" if lab else "" for s in range(len(SYSTEMS)) for lab in
                  (*pairs.labels[s], *([""] * (w - len(pairs.labels[s]))))]  # fmt: skip
        self.rx = ReceiverBias(labels, cfg.receiver_bias_memory_s)
        self.override_ns = np.full((n_slots, w), np.nan)
        self.sat_m = np.zeros((n_slots, w))
        self.sat_known = np.zeros((n_slots, w), np.bool_)
        self.comb_sum = np.zeros((n_slots, w))
        self.comb_weight = np.zeros((n_slots, w))
        self.comb_count = np.zeros((n_slots, w))
        self.comb_applied = np.full((n_slots, w), np.nan)
        self.fit_all = True
        self.fitted = False
        self.applied = np.zeros(len(labels))
        #: Bumped whenever anything :meth:`correction` reads changes (lets callers cache it).
        self.version = 0
        self.ref_group = -1
        self.last_t = -math.inf
        for name, per_pair in cfg.satellite_dcb_ns.items():
            sat = sat_id(name[0], int(name[1:]))
            have = pairs.labels[sat // 100]
            for label, ns in per_pair.items():
                if label not in have:
                    raise ValueError(f"satellite_dcb_ns.{name}: pair {label!r} not configured")
                self.override_ns[sat, have.index(label)] = ns
            self.set_delays(sat, np.full(10, np.nan))

    def set_delays(self, sat: int, delays_s: F64) -> None:
        """Fill the satellite's (rank) row from its band delays (s, NaN unknown) and overrides."""
        sysi = sat // 100
        row = C_MPS * (
            delays_s[self.pairs.sig2[sysi] // 32] - delays_s[self.pairs.sig1[sysi] // 32]
        )
        over = self.override_ns[sat]
        row = np.where(np.isnan(over), row, -C_MPS * over * 1e-9)
        self.sat_known[sat] = ~np.isnan(row)
        if not self.fitted:  # before the first fit: "no satellite part known at all" mode?
            self.fit_all = not bool(self.sat_known.any())
        self.sat_m[sat] = np.where(np.isnan(row), 0.0, row)
        self.version += 1

    def correction(self, flat: Idx, group: Idx, k: F64) -> tuple[F64, F64]:
        """(satellite part in TECU, total to subtract from STEC_raw) per satellite, for the
        satellites/ranks at ``flat = sat·W + rank`` in receiver groups ``group``; the total is
        NaN for a satellite whose satellite part is unknown and whose combined bias is not
        learnt yet (its STEC would be off by tens of TECU: better unknown than wrong)."""
        b_sat = k * self.sat_m.ravel().take(flat)
        rx = self.applied.take(group)
        if not self.fit_all:
            known = self.sat_known.ravel().take(flat)
            rx = np.where(known, rx, self.comb_applied.ravel().take(flat))
        return b_sat, b_sat + rx

    def reference(self) -> tuple[float, float]:
        """(applied bias, σ) of the best-determined receiver group, NaN before any estimate."""
        g = self.ref_group
        if g < 0:
            return math.nan, math.nan
        return float(self.applied[g]), float(self.rx.sigma[g])

    def due(self, t: float) -> bool:
        return t - self.last_t >= self.update_s

    def update(
        self, t: float, *, y: F64, idx: Idx, rank: Idx, group: Idx, mapping: F64, x_km: F64,
        y_km: F64, weight: F64, arc_samples: F64 | None = None,
    ) -> None:  # fmt: skip
        """One epoch of the fit: ``y`` = STEC_raw − satellite part (TECU) of usable satellites;
        ``arc_samples``: samples so far in each satellite's arc (levelling maturity)."""
        m = y.shape[0]
        for a in (idx, rank, group, mapping, x_km, y_km, weight):
            assert a.shape == (m,), (a.shape, m)
        if m < _MIN_FIT:
            return
        self.last_t = t
        self.fitted = True
        fit = self.sat_known[idx, rank]
        self.fit_all = bool(np.count_nonzero(fit) < _MIN_FIT)
        if self.fit_all:
            fit = np.ones(m, np.bool_)
        ok = self.rx.add_epoch(
            t, y=y[fit], mapping=mapping[fit], x_km=x_km[fit], y_km=y_km[fit],
            group=group[fit], weight=weight[fit],
        )  # fmt: skip
        other = ~fit
        if ok and other.any():
            lam = math.exp(-self.update_s / self.memory_s)
            self.comb_sum *= lam
            self.comb_weight *= lam
            self.comb_count *= lam
            res = y[other] - self.rx.vtec_model(mapping[other], x_km[other], y_km[other])
            s_o, r_o, w_o = idx[other], rank[other], weight[other]
            # Early fits (receiver bias still converging, large σ) carry plane errors into every
            # residual: weight each epoch by 1/(σ² + σ₀²) of the fitted groups' receiver bias.
            sig = self.rx.sigma[group[fit]]
            sig = sig[np.isfinite(sig)]
            s2 = float(np.mean(sig * sig)) if sig.size else 100.0**2
            w_o = w_o / (s2 + _COMB_SIGMA0_TECU**2)
            if arc_samples is not None:
                # the residual carries the arc's levelling error, shrinking as the arc grows
                n_o = arc_samples[other]
                w_o = w_o * (n_o / (n_o + _COMB_ARC_SAMPLES))
            self.comb_sum[s_o, r_o] += w_o * res
            self.comb_weight[s_o, r_o] += w_o
            self.comb_count[s_o, r_o] += 1.0
            ready = self.comb_count >= COMB_MIN_SAMPLES
            self.comb_applied = np.where(
                ready, self.comb_sum / np.maximum(self.comb_weight, 1e-12), np.nan
            )
        self._refresh()

    def _refresh(self) -> None:
        sig = self.rx.sigma
        self.applied = np.where(sig <= APPLY_SIGMA_TECU, self.rx.bias, 0.0)
        self.version += 1
        self.ref_group = int(np.nanargmin(sig)) if np.isfinite(sig).any() else -1

    def state_dict(self) -> dict[str, Any]:
        """The receiver-bias normal equations plus the learnt combined biases (sparse lists)."""
        out = self.rx.state_dict()
        sat, rank = np.nonzero(self.comb_count > 0)
        out["combined"] = {
            "labels": [
                self.pairs.labels[s // 100][r]
                for s, r in zip(sat.tolist(), rank.tolist(), strict=True)
            ],
            "sat": sat.tolist(),
            "sum": self.comb_sum[sat, rank].tolist(),
            "weight": self.comb_weight[sat, rank].tolist(),
            "count": self.comb_count[sat, rank].tolist(),
        }
        return out

    def load_state(self, state: dict[str, Any]) -> None:
        self.rx.load_state(state)
        comb = state.get("combined")
        if comb is not None and len(comb["sat"]):
            for sat, label, cs, cw, cc in zip(
                np.asarray(comb["sat"]).tolist(), [str(x) for x in comb["labels"]],
                np.asarray(comb["sum"], dtype=np.float64).tolist(),
                np.asarray(comb["weight"], dtype=np.float64).tolist(),
                np.asarray(comb["count"], dtype=np.float64).tolist(), strict=True,
            ):  # fmt: skip
                have = self.pairs.labels[int(sat) // 100]
                if label in have:  # pairs no longer configured are dropped
                    r = have.index(label)
                    self.comb_sum[sat, r], self.comb_weight[sat, r], self.comb_count[sat, r] = (
                        cs,
                        cw,
                        cc,
                    )
            ready = self.comb_count >= COMB_MIN_SAMPLES
            self.comb_applied = np.where(
                ready, self.comb_sum / np.maximum(self.comb_weight, 1e-12), np.nan
            )
        self._refresh()
