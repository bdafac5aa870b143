"""Code biases in the geometry-free code: satellite part (broadcast or config) and receiver part.

Axes: ``S`` satellite slots × ``W`` pair ranks of the pair table; ``m`` satellites of an epoch.

* Satellite part, per (satellite, rank): c·(d₂ − d₁) metres from the broadcast group delays
  (:func:`band_delays_s`) or −c·DCB from ``[estimator] satellite_dcb_ns``; × K gives TECU.
* Receiver part, per group (system, pair): :class:`ReceiverBias` (least squares with a smooth
  quadratic VTEC surface, open arcs re-levelled), applied once its 1-σ is at most
  ``APPLY_SIGMA_TECU``.
* Satellites whose satellite part is unknown (GLONASS FDMA with Δτ_n = 0 "not known", GPS L5
  without CNAV ISC, …) enter the same least-squares fit with one combined satellite + receiver
  bias per (satellite, pair) (:class:`ReceiverBias` per-satellite groups): the system groups of
  the satellites with a known satellite part anchor the VTEC surface, so surface and biases
  separate, and the accumulated normal equations give each combined bias with its σ. Their
  observations are down-weighted while the arc is young (levelling error). A combined bias is
  applied after ``COMB_MIN_SAMPLES`` updates once its 1-σ is at most ``APPLY_SIGMA_TECU`` (until
  then their STEC is NaN). Without any known satellite part at all (no ephemerides), every
  satellite enters the fit with 0 in its system group and STEC carries the (unknown) satellite
  biases.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import SYSTEMS, sat_id, sat_name

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
#: Arc length (samples) at which an observation's levelling error halves its combined-bias weight.
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
        #: Configured satellite DCBs (ns) per satellite: its (rank) row, NaN where not given.
        self.override_ns: dict[int, F64] = {}
        self.sat_m = np.zeros((n_slots, w))
        self.sat_known = np.zeros((n_slots, w), np.bool_)
        #: Per-satellite group of each (satellite, rank) with unknown satellite part (−1 none).
        self.sat_group = np.full((n_slots, w), -1, np.int16)
        self._sg_sat: list[int] = []
        self._sg_rank: list[int] = []
        self.comb_count = np.zeros((n_slots, w))  # forgetting-weighted updates seen
        self.comb_applied = np.full((n_slots, w), np.nan)  # combined bias applied (TECU)
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
                row = self.override_ns.setdefault(sat, np.full(w, np.nan))
                row[have.index(label)] = ns
            self.set_delays(sat, np.full(10, np.nan))

    def set_delays(self, sat: int, delays_s: F64) -> None:
        """Fill the satellite's (rank) row from its band delays (s, NaN unknown) and overrides."""
        sysi = sat // 100
        row = C_MPS * (
            delays_s[self.pairs.sig2[sysi] // 32] - delays_s[self.pairs.sig1[sysi] // 32]
        )
        over = self.override_ns.get(sat)
        if over is not None:
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
        arc: npt.NDArray[np.int64] | None = None, level: F64 | None = None,
    ) -> None:  # fmt: skip
        """One epoch of the fit: ``y`` = STEC_raw − satellite part (TECU) of usable satellites;
        ``arc_samples``: samples so far in each satellite's arc (levelling maturity); ``arc``,
        ``level``: arc id and the levelling offset inside ``y`` (TECU), to re-level open arcs
        (:meth:`ReceiverBias.add_epoch`)."""
        m = y.shape[0]
        for a in (idx, rank, group, mapping, x_km, y_km, weight):
            assert a.shape == (m,), (a.shape, m)
        if m < _MIN_FIT:
            return
        self.last_t = t
        self.fitted = True
        fit = self.sat_known[idx, rank]
        self.fit_all = bool(np.count_nonzero(fit) < _MIN_FIT)
        other = np.zeros(m, np.bool_) if self.fit_all else ~fit
        n_sys = int(np.unique(group[~other]).shape[0])
        if other.any():
            group = group.copy()
            s_o, r_o = idx[other], rank[other]
            group[other] = self._sat_groups(s_o, r_o)
            weight = weight.copy()
            if arc_samples is not None:
                # the observation carries the arc's levelling error, shrinking as the arc grows
                n_o = arc_samples[other]
                weight[other] *= n_o / (n_o + _COMB_ARC_SAMPLES)
        ok = self.rx.add_epoch(
            t, y=y, mapping=mapping, x_km=x_km, y_km=y_km, group=group, weight=weight,
            n_epoch_groups=n_sys, arc=arc, level=level,
        )  # fmt: skip
        if ok and other.any():
            self.comb_count *= math.exp(-self.update_s / self.memory_s)
            self.comb_count[s_o, r_o] += 1.0
        self._refresh()

    def _sat_groups(self, sat: Idx, rank: Idx) -> Idx:
        """Per-satellite receiver-bias groups of these (satellite, rank)s, allocated if new."""
        grp = self.sat_group[sat, rank].astype(np.intp)
        for k in np.flatnonzero(grp < 0).tolist():
            s_k, r_k = int(sat[k]), int(rank[k])
            label = f"{sat_name(s_k)}:{self.pairs.labels[s_k // 100][r_k]}"
            grp[k] = self.sat_group[s_k, r_k] = self.rx.group_index(label)
            self._sg_sat.append(s_k)
            self._sg_rank.append(r_k)
        return grp

    def _refresh(self) -> None:
        sig = self.rx.sigma
        n_sys = len(self.applied)
        self.applied = np.where(sig[:n_sys] <= APPLY_SIGMA_TECU, self.rx.bias[:n_sys], 0.0)
        if self._sg_sat:
            s_g, r_g = self._sg_sat, self._sg_rank
            grp = self.sat_group[s_g, r_g]
            ready = (self.comb_count[s_g, r_g] >= COMB_MIN_SAMPLES) & (sig[grp] <= APPLY_SIGMA_TECU)
            self.comb_applied[s_g, r_g] = np.where(ready, self.rx.bias[grp], np.nan)
        self.version += 1
        sys_sig = sig[:n_sys]
        self.ref_group = int(np.nanargmin(sys_sig)) if np.isfinite(sys_sig).any() else -1

    def state_dict(self) -> dict[str, Any]:
        """The receiver-bias normal equations (per-satellite groups by label, e.g. "R05:1C-2C")
        plus the update counts of the combined biases."""
        out = self.rx.state_dict()
        s_g, r_g = self._sg_sat, self._sg_rank
        out["sat_groups"] = {
            "labels": [self.rx.labels[g] for g in self.sat_group[s_g, r_g].tolist()],
            "count": self.comb_count[s_g, r_g].tolist(),
        }
        return out

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore from :meth:`state_dict` (an older "combined" section is ignored: the combined
        biases are learnt again); groups of pairs no longer configured are dropped."""
        counts = dict(
            zip(
                [str(x) for x in state.get("sat_groups", {}).get("labels", [])],
                np.asarray(state.get("sat_groups", {}).get("count", []), np.float64).tolist(),
                strict=True,
            )
        )
        for label in [str(x) for x in state.get("labels", [])]:
            name, _, pair = label.partition(":")
            if len(name) != 3 or name[0] not in SYSTEMS or not name[1:].isdigit():
                continue  # a system group
            if not 0 < int(name[1:]) < 100:
                continue
            sat = sat_id(name[0], int(name[1:]))
            have = self.pairs.labels[sat // 100]
            if 0 <= sat < self.sat_group.shape[0] and pair in have:
                r = have.index(pair)
                self._sat_groups(np.array([sat]), np.array([r]))
                self.comb_count[sat, r] = counts.get(label, 0.0)
        self.rx.load_state(state)
        self._refresh()
