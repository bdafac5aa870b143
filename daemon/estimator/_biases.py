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
* Levelling error of each arc: the fit takes it as a random effect (:class:`ReceiverBias`) with
  a prior variance from the arc's own levelling samples, and its estimate re-levels the arc's
  STEC (:meth:`BiasModel.arc_corrections`, per (satellite, rank) of the satellites in the last
  update, when that epoch had at least ``_ARC_CORR_MIN_DOF`` satellites more than parameters
  and the arc's group has its receiver bias applied, σ ≤ ``APPLY_SIGMA_TECU``; a satellite
  absent from it, e.g. an arc younger than ``receiver_bias_min_arc_s``, gets none). A
  correction belongs to its arc: an arc that starts between two updates gets none (the
  estimator passes the arc ids to :meth:`correction`).

Prior variance of an arc's levelling error (the variance of a running mean, common practice):
the levelling offset L of an arc is a running weighted mean of its levelling samples, so its
increments between two updates give the scatter of those samples: with Δn new samples after n,
u = ΔL·n/Δn is the new samples' mean minus the old offset and v = u²·Δn estimates the
per-sample variance (white noise: exactly; multipath much longer than an update interval: u²
is then its variance, and v/n the variance of its mean over the arc's time span, whatever the
sampling rate). Then

    σ_a² = ``_ARC_VAR_FACTOR`` · s²/n,   s² = (Σ v + k₁·c_g/w) / (count + k₁),
    c_g = (Σ_group v·w + k₀·``_LEVEL_NOISE_PRIOR``) / (count_group + k₀),

the arc's own increments shrunk towards its group's level c_g (pooled over the group's arcs
with the forgetting of the normal equations; w = the arc's weight sin²el: low arcs are noisier,
and the signals of some systems quieter), k₁ = ``_ARC_PRIOR_N``, k₀ = ``_GROUP_PRIOR_N``.
Measured on our simulator's quiet day (30 min, seeds 1–12, el > 15°, arc ≥ 5 min, simulator
truth): as a predictor of the arcs' levelling errors (Gaussian log-likelihood per sample) the
increments scored 0.48, a model in arc length and elevation alone 0.46, a per-system fit to the
truth 0.52; the learnt group levels came out ~3× lower for Galileo E1/E5a than for GPS L1/L2
and GLONASS, as the truth has it. The factor 2 (the mean of correlated multipath converges
slower than s²/n) gave the lowest worst-seed STEC error: 1.03 TECU with factor 1, 0.95 with 2,
0.97 with 3.
"""

# size: ~470 lines: satellite and receiver code-bias tables over the same pair-rank
# axes, with their config and broadcast sources.
from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import SYSTEMS, sat_id, sat_name

from ._pairs import C_MPS
from ._rxbias import N_VTEC, ReceiverBias, match_ids, same_ids

if TYPE_CHECKING:
    from ionwarden.daemon.config import EstimatorSettings

    from ._pairs import PairTable

__all__ = ["APPLY_SIGMA_TECU", "COMB_MIN_SAMPLES", "MIN_FIT", "BiasModel"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
#: A receiver-bias estimate is applied to STEC once its 1-σ is at most this (TECU).
APPLY_SIGMA_TECU = 3.0
#: Samples (one per receiver-bias update) before a satellite's combined bias is applied.
COMB_MIN_SAMPLES = 8.0
#: Satellites an update needs to fit anything (fewer: :meth:`BiasModel.no_fit`).
MIN_FIT = 5
#: Arc length (samples) at which an observation's levelling error halves its combined-bias weight.
_COMB_ARC_SAMPLES = 300.0
#: Prior per-sample variance of the levelling samples at unit weight (TECU², zenith): about 10 TECU
#: of K·(P2 − P1) per sample, code noise plus multipath of a geodetic receiver (common practice).
_LEVEL_NOISE_PRIOR = 100.0
#: Pseudo-increments of ``_LEVEL_NOISE_PRIOR`` in a group's pooled level, and of the group's level
#: in an arc's own (module doc).
_GROUP_PRIOR_N = 3.0
_ARC_PRIOR_N = 1.0
#: σ_a² = factor · s²/n (module doc; measured).
_ARC_VAR_FACTOR = 2.0
#: Floor of the weight sin²el in the arc noise scaling (sin 13°)².
_W_FLOOR = 0.05
#: Satellites beyond the epoch's parameters (surface and groups) before the fit's levelling
#: estimates are applied to STEC: with fewer, the surface cannot tell one arc from the others
#: and ê_a is mostly its prior's shrinkage.
_ARC_CORR_MIN_DOF = 4
_NO_IDX = np.zeros(0, np.intp)
_NO_VAL = np.zeros(0)
_NO_ARC = np.zeros(0, np.int64)


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
        #: Levelling corrections ê_a (TECU) of the (satellite, rank)s in the last update, sparse
        #: (a few dozen of the S·W slots) and sorted by flat index sat·W + rank, with the arc
        #: each was estimated for (see :meth:`set_arc_corrections`).
        self._corr_flat = np.zeros(0, np.intp)
        self._corr_val = np.zeros(0)
        self._corr_arc = np.zeros(0, np.int64)
        # Levelling increments of the open arcs (aligned with the last update) and their groups'
        # pooled level (Σ v·w, count), by group index (module doc).
        self._nz_id = np.zeros(0, np.int64)
        self._nz_n = np.zeros(0)
        self._nz_lev = np.zeros(0)
        self._nz_sum = np.zeros(0)
        self._nz_cnt = np.zeros(0)
        self._pool = np.zeros((2, len(labels)))
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

    def correction(
        self, flat: Idx, group: Idx, k: F64, arc: npt.NDArray[np.integer[Any]] | None = None
    ) -> tuple[F64, F64, F64]:
        """(satellite part in TECU, total to subtract from STEC_raw, the levelling correction
        inside that total) per satellite, for the satellites/ranks at ``flat = sat·W + rank`` in
        receiver groups ``group``; the total is NaN for a satellite whose satellite part is
        unknown and whose combined bias is not learnt yet (its STEC would be off by tens of
        TECU: better unknown than wrong). With ``arc`` (the satellites' arc ids) an arc's
        levelling correction applies to that arc only, not to a new arc started since the last
        update."""
        b_sat = k * self.sat_m.ravel().take(flat)
        rx = self.applied.take(group)
        if not self.fit_all:
            known = self.sat_known.ravel().take(flat)
            rx = np.where(known, rx, self.comb_applied.ravel().take(flat))
        if self._corr_flat.shape[0]:
            corr, corr_arc = self.arc_corrections(flat)
            if arc is not None:
                corr = np.where(corr_arc == arc, corr, 0.0)
            rx += corr
        else:
            corr = np.zeros(flat.shape)
        return b_sat, b_sat + rx, corr

    @property
    def per_arc(self) -> bool:
        """:meth:`correction` depends on ``arc`` (some levelling correction is held)."""
        return self._corr_flat.shape[0] != 0

    def set_arc_corrections(self, flat: Idx, value: F64, arc: npt.NDArray[np.int64]) -> None:
        """Replace the levelling corrections: ê_a (TECU) of the (satellite, rank)s at ``flat =
        sat·W + rank`` (unique), each for arc ``arc``."""
        order = np.argsort(flat)
        self._corr_flat = np.asarray(flat, np.intp)[order]
        self._corr_val = np.asarray(value, np.float64)[order]
        self._corr_arc = np.asarray(arc, np.int64)[order]
        self.version += 1

    def arc_corrections(self, flat: Idx) -> tuple[F64, npt.NDArray[np.int64]]:
        """(ê_a in TECU, arc id) of the (satellite, rank)s at ``flat``; 0 and −1 where none."""
        n = self._corr_flat.shape[0]
        if not n:
            return np.zeros(flat.shape), np.full(flat.shape, -1, np.int64)
        pos = np.minimum(np.searchsorted(self._corr_flat, flat), n - 1)
        hit = self._corr_flat[pos] == flat
        value: F64 = np.where(hit, self._corr_val[pos], 0.0)
        arc: npt.NDArray[np.int64] = np.where(hit, self._corr_arc[pos], -1)
        return value, arc

    def reference(self) -> tuple[float, float]:
        """(applied bias, σ) of the best-determined receiver group, NaN before any estimate."""
        g = self.ref_group
        if g < 0:
            return math.nan, math.nan
        applied: float = self.applied.item(g)  # (item: the same Python float, no scalar)
        return applied, self.rx.sigma.item(g)

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
        if m < MIN_FIT:
            self.no_fit()
            return
        dt = t - self.last_t if math.isfinite(self.last_t) else 0.0
        self.last_t = t
        self.fitted = True
        fit = self.sat_known[idx, rank]
        self.fit_all = bool(np.count_nonzero(fit) < MIN_FIT)
        other = np.zeros(m, np.bool_) if self.fit_all else ~fit
        n_sys = int(np.count_nonzero(np.bincount(group[~other])))  # distinct system groups
        if other.any():
            group = group.copy()
            s_o, r_o = idx[other], rank[other]
            group[other] = self._sat_groups(s_o, r_o)
            weight = weight.copy()
            if arc_samples is not None:
                # the observation carries the arc's levelling error, shrinking as the arc grows
                n_o = arc_samples[other]
                weight[other] *= n_o / (n_o + _COMB_ARC_SAMPLES)
        arc_var = None
        if arc is not None and level is not None and arc_samples is not None:
            arc_var = self._arc_var(
                dt, arc=arc, level=level, n=arc_samples, group=group, weight=weight
            )
        ok = self.rx.add_epoch(
            t, y=y, mapping=mapping, x_km=x_km, y_km=y_km, group=group, weight=weight,
            n_epoch_groups=n_sys, arc=arc, level=level, arc_var=arc_var,
        )  # fmt: skip
        if ok and other.any():
            self.comb_count *= math.exp(-self.update_s / self.memory_s)
            self.comb_count[s_o, r_o] += 1.0
        redundant = m - N_VTEC - self.rx.last_n_groups >= _ARC_CORR_MIN_DOF  # groups of `group`
        if ok and arc is not None and arc_var is not None and redundant:
            # Only where the fit is good enough to apply the group's receiver bias: an arc's
            # offset is relative to the surface and bias it was fitted with.
            use = self.rx.sigma[group] <= APPLY_SIGMA_TECU
            self.set_arc_corrections(
                (idx * self.pairs.width + rank)[use], self.rx.arc_offset[use], arc[use]
            )
        elif self._corr_flat.shape[0]:
            self.set_arc_corrections(_NO_IDX, _NO_VAL, _NO_ARC)
        self._refresh()

    def no_fit(self) -> None:
        """:meth:`update` with fewer than ``MIN_FIT`` satellites (nothing to fit; the update stays
        due): no arc in the fit, so no levelling correction."""
        if self._corr_flat.shape[0]:
            self.set_arc_corrections(_NO_IDX, _NO_VAL, _NO_ARC)

    def _arc_var(
        self, dt: float, *, arc: npt.NDArray[np.int64], level: F64, n: F64, group: Idx,
        weight: F64,
    ) -> F64:  # fmt: skip
        """Prior variance (TECU²) of each arc's levelling error from its levelling increments
        (module doc); updates the arcs' and groups' increment sums."""
        m = arc.shape[0]
        w = np.maximum(weight, _W_FLOOR)
        g_n = len(self.rx.labels)
        if self._pool.shape[1] < g_n:
            self._pool = np.pad(self._pool, ((0, 0), (0, g_n - self._pool.shape[1])))
        self._pool *= math.exp(-max(dt, 0.0) / self.memory_s)
        sums = np.zeros(m)
        cnt = np.zeros(m)
        found: npt.NDArray[np.bool_] | slice | None = None
        rows: Idx | slice | None = None
        if same_ids(self._nz_id, arc):
            found = rows = slice(None)  # the same arcs in the same order (the usual case): views
        elif self._nz_id.shape[0]:
            found, rows = match_ids(self._nz_id, arc)
        if found is not None and rows is not None:
            sums[found] = self._nz_sum[rows]
            cnt[found] = self._nz_cnt[rows]
            dn = n[found] - self._nz_n[rows]
            step = dn > 0.0
            dn = np.where(step, dn, 1.0)
            u = (level[found] - self._nz_lev[rows]) * n[found] / dn
            v = np.where(step, u * u * dn, 0.0)
            sums[found] += v
            cnt[found] += step
            np.add.at(self._pool[0], group[found], v * w[found])
            np.add.at(self._pool[1], group[found], step.astype(np.float64))
        self._nz_id = np.asarray(arc, np.int64).copy()
        self._nz_n = np.asarray(n, np.float64).copy()
        self._nz_lev = np.asarray(level, np.float64).copy()
        self._nz_sum = sums
        self._nz_cnt = cnt
        level_g = (self._pool[0, group] + _GROUP_PRIOR_N * _LEVEL_NOISE_PRIOR) / (
            self._pool[1, group] + _GROUP_PRIOR_N
        )
        s2 = (sums + _ARC_PRIOR_N * level_g / w) / (cnt + _ARC_PRIOR_N)
        out: F64 = _ARC_VAR_FACTOR * s2 / np.maximum(n, 1.0)
        return out

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
        finite = np.isfinite(sys_sig)
        # np.nanargmin's pick (the first smallest σ; NaN means unknown)
        self.ref_group = int(np.where(finite, sys_sig, np.inf).argmin()) if finite.any() else -1

    def state_dict(self) -> dict[str, Any]:
        """The receiver-bias normal equations (per-satellite groups by label, e.g. "R05:1C-2C")
        plus the update counts of the combined biases, the levelling increments of the open
        arcs and their groups (by label) and the arcs' levelling corrections in use (by
        satellite and pair label)."""
        out = self.rx.state_dict()
        s_g, r_g = self._sg_sat, self._sg_rank
        out["sat_groups"] = {
            "labels": [self.rx.labels[g] for g in self.sat_group[s_g, r_g].tolist()],
            "count": self.comb_count[s_g, r_g].tolist(),
        }
        out["arc_noise"] = {
            "arc_id": self._nz_id.tolist(),
            "n": self._nz_n.tolist(),
            "lev": self._nz_lev.tolist(),
            "sum": self._nz_sum.tolist(),
            "count": self._nz_cnt.tolist(),
            "group_labels": self.rx.labels[: self._pool.shape[1]],
            "group_sum": self._pool[0].tolist(),
            "group_count": self._pool[1].tolist(),
        }
        nz = self._corr_val != 0.0
        sat, rank = np.divmod(self._corr_flat[nz], self.pairs.width)
        out["arc_corr"] = {
            "labels": [
                f"{sat_name(s_k)}:{self.pairs.labels[s_k // 100][r_k]}"
                for s_k, r_k in zip(sat.tolist(), rank.tolist(), strict=True)
            ],
            "value": self._corr_val[nz].tolist(),
            "arc_id": self._corr_arc[nz].tolist(),
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
            slot = self._slot(label)
            if slot is not None:
                sat, r = slot
                self._sat_groups(np.array([sat]), np.array([r]))
                self.comb_count[sat, r] = counts.get(label, 0.0)
        self.rx.load_state(state)
        self._load_arc_noise(state.get("arc_noise"), state.get("arc_corr"))
        self._refresh()

    def _slot(self, label: str) -> tuple[int, int] | None:
        """(satellite, rank) of a per-satellite label such as "R05:1C-2C" (None: not one, or its
        pair is not configured)."""
        name, _, pair = label.partition(":")
        if len(name) != 3 or name[0] not in SYSTEMS or not name[1:].isdigit():
            return None  # a system group
        if not 0 < int(name[1:]) < 100:
            return None
        sat = sat_id(name[0], int(name[1:]))
        have = self.pairs.labels[sat // 100]
        if 0 <= sat < self.sat_group.shape[0] and pair in have:
            return sat, have.index(pair)
        return None

    def _load_arc_noise(self, noise: dict[str, Any] | None, corr: dict[str, Any] | None) -> None:
        """Restore the levelling increments and corrections (absent from older states: they
        start again, as after a long gap)."""
        self.set_arc_corrections(_NO_IDX, _NO_VAL, _NO_ARC)
        self._nz_id = np.zeros(0, np.int64)
        self._nz_n = self._nz_lev = self._nz_sum = self._nz_cnt = np.zeros(0)
        self._pool = np.zeros((2, len(self.rx.labels)))
        if noise is not None:
            self._nz_id = np.asarray(noise["arc_id"], np.int64)
            self._nz_n = np.asarray(noise["n"], np.float64)
            self._nz_lev = np.asarray(noise["lev"], np.float64)
            self._nz_sum = np.asarray(noise["sum"], np.float64)
            self._nz_cnt = np.asarray(noise["count"], np.float64)
            pos = self.rx._pos
            for label, v, c in zip(
                [str(x) for x in noise["group_labels"]],
                np.asarray(noise["group_sum"], np.float64).tolist(),
                np.asarray(noise["group_count"], np.float64).tolist(),
                strict=True,
            ):
                g = pos.get(label)
                if g is not None:
                    self._pool[:, g] = (v, c)
        if corr is not None:
            flat: list[int] = []
            values: list[float] = []
            arcs: list[int] = []
            for label, v, a in zip(
                [str(x) for x in corr["labels"]],
                np.asarray(corr["value"], np.float64).tolist(),
                np.asarray(corr["arc_id"], np.int64).tolist(),
                strict=True,
            ):
                slot = self._slot(label)
                at = -1 if slot is None else slot[0] * self.pairs.width + slot[1]
                if at >= 0 and at not in flat:
                    flat.append(at)
                    values.append(v)
                    arcs.append(a)
            self.set_arc_corrections(
                np.array(flat, np.intp), np.array(values), np.array(arcs, np.int64)
            )
