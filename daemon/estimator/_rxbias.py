"""Receiver differential code bias, estimated from the data with a smooth local VTEC model.

Model per epoch (common practice for single-station bias estimation; SCIENCE.md §4):

    y_i = STEC_raw,i − B_sat,i = M_i·V(x_i, y_i) + B_g(i) + noise,
    V(x, y) = a0 + a1·x + a2·y + a3·x² + a4·x·y + a5·y²

with M the thin-shell mapping factor, (x, y) the pierce-point offsets east/north (1000 km units),
and B_g one bias per *group*: g = (system, pair) for satellites whose satellite part is known
(each signal pair has its own receiver delay), or g = (satellite, pair) for the others (GLONASS
FDMA without a broadcast Δτ_n: the satellite's and the receiver's inter-frequency biases differ
per channel and are only known together). The per-satellite groups are added on first use
(:meth:`group_index`); they are anchored by the system groups through the shared VTEC surface.

What keeps B and V apart (measured on our simulator's quiet day, 30 min, seeds 1–8):

* **A quadratic surface with a curvature prior.** A plane leaves the curvature of VTEC over
  ±1000 km of pierce points (≈1 TECU/(1000 km)² north–south there: a few tenths of a TECU
  vertical, × M ≈ 2–3 at low elevation) in the residuals, and that misfit grows with M just as
  a bias does against a0: with exact data it biased the receiver bias by 0.7 TECU at every
  seed (0.25 with the quadratic). Free curvature, though, also soaks up levelling errors
  (which grow at low elevation too), so a3…a5 get a zero-mean prior of σ = ``_CURVATURE_SIGMA``
  TECU/(1000 km)² (quiet mid-latitude curvature is of that order: common practice, our
  measurement): σ = 0.3 left 0.55 TECU of misfit, σ ≥ 2 let the noise through (worst seed 1.4
  TECU of STEC error instead of 1.0). With the arcs' levelling errors as random effects (below)
  the data weigh less early on and σ = 1.4 did best (worst seed of 1–12: 1.01 TECU with σ = 1,
  0.95 with 1.4, 0.95 with 2 but a higher mean).
* **Re-levelling of open arcs** (``arc`` / ``level`` in :meth:`add_epoch`): the levelling
  offset of an arc improves as the arc grows, and its early observations would otherwise stay
  in the normal equations with the early, poorer offset.
* **Each open arc's levelling error as a random effect** (``arc_var`` in :meth:`add_epoch`): the
  dominant error of y is not white: it is the arc's levelling error e_a (code noise and
  multipath averaged over the arc so far), one value shared by every sample of the arc. Fitted
  as white noise, an arc observed 60 times counts 60 times and a badly levelled arc drags the
  biases (measured: the receiver-bias error, not the levelling, dominated the STEC error on
  every seed). With e_a ~ N(0, σ_a²) in the model, y = M·V + B_g + e_a + noise, each arc weighs
  what its levelling is worth, and the estimate ê_a re-levels the arc's STEC (``arc_offset``,
  applied by the caller). The arcs' information block (``_arc_n``, ``_arc_r``: Σ w over each arc
  and its cross terms after the random walk, Σ w·y) is kept beside ``normal`` so that ``normal``
  and ``rhs`` stay the information of the data about (coefficients, biases); the arcs are
  eliminated (Schur complement with their prior 1/σ_a²) when solving, and folded into
  ``normal`` / ``rhs`` the same way when they close (from then on forgotten with the data, prior
  included: exact without forgetting, tests/test_receiver_bias.py). Without ``arc_var`` (σ_a = 0:
  the levelling taken as exact) the fit is the white-noise fit of before. Measured (quiet day,
  seeds 1–12, el > 15°, arc ≥ 5 min): worst seed 1.03 → 0.90 TECU RMS for GPS+Galileo, 1.32 →
  0.95 for GLONASS (without re-levelling the STEC by ê_a, GLONASS seed 6 stayed at 1.13).
* The coefficients follow a random walk between updates (variance rate ``_VTEC_RW`` per second)
  instead of being eliminated every epoch: a Kalman filter in information form. On our data
  its rate hardly matters (0.5 TECU/√h to unbounded gave the same figures); it is kept loose
  on a0 and the gradients (3 TECU/√h: a daytime rise of several TECU per hour is followed
  without lag) and tighter on the curvature, which then averages over time. An infinite rate
  is the per-epoch elimination of the previous model of this module.

The biases do not change: the information (normal equations) of all parameters is accumulated
with exponential forgetting (time constant ``memory_s``), each epoch's weight scaled down when
the ionosphere is disturbed (the caller's weights), so the estimate is dominated by quiet
periods. A weak prior (σ = 100 TECU on biases, 1000 on V) keeps the system solvable while
geometry has not yet separated B from a0. The random walk is applied in information form:
Λ ← Λ − Λ·,a (Q⁻¹ + Λaa)⁻¹ Λa,· (the standard prediction step with process noise Q on the
coefficients only).

Units: the weights are inverse variances with 1 TECU² at unit weight (sin²el = 1: the zenith),
so the priors (σ_a², the curvature σ) are in TECU. The σ reported is formal (post-fit scatter ×
√diag of the inverse normal matrix, see :meth:`_scale_sigma`); without the arcs' random effects
it treats the 30-s samples of an arc as independent and is optimistic (0.06 TECU where the error
was ~1 TECU on a bad seed).

What is left (measured): in the first ~10 minutes of a cold start every arc is young (levelling
errors of 1–1.5 TECU) and B is told from a0 only by the spread of M, which amplifies them: the
receiver-bias error is then 1–3 TECU on some seeds and dominates their 30-min STEC figure; the
surface's misfit of our simulator's ionosphere (its latitude profile is not a polynomial) biases
B by −0.1 to −0.25 TECU with exact data.

Retuning does not remove the cold-start error (2026-12-03, quiet day, seeds 1–24, GPS+Galileo
and GLONASS STEC RMS, el > 15°, arc ≥ 5 min: mean 0.53 / 0.56, worst 0.98 / 1.11 on seed 18). The
GPS group's bias error falls from 1.55 TECU RMS over the seeds at 3 min to 1.12 at 5, 0.42 at 10
and 0.30 at 30. Tried, none better on both the worst seed and the mean without making some seed
worse by > 0.05 TECU:
* the curvature σ at 1.0 or 2.0;
* ``_ARC_VAR_FACTOR`` at 1.5 or 3;
* σ_a as a function of arc length, fitted to the truth, or looser for young arcs;
* ``_ARC_PRIOR_N`` from 3 to 1000;
* per-epoch weights ×2 to ×16: this shifts every seed's bias by +0.3–0.5 TECU, which helps the
  negative seeds and hurts the positive ones.
Holding the bias back until its σ is small would leave the whole receiver bias (~13 TECU here) in
the STEC.

What it is made of:
* σ_a is calibrated: e_a/σ_a against the truth has a variance of 0.6–1.1 for arcs of 120–600
  samples. It is too loose (0.35–0.39) beyond 600 samples, but tightening it made results worse.
* With the true levelling put into the fit, the bias error is only −0.45 to −0.6 TECU at 3–5 min
  and −0.2 to −0.3 at 30 min. That part is the surface misfit, the same shift at every seed.
* The random part, ~1.1 TECU RMS at 5 min, is the young arcs' levelling error. On seed 18, two
  arcs with M ≈ 1.8 and 2.3 still carry +1.5 and +0.9 TECU of levelling error at 10 min
  (long-period multipath). The fit takes that for a VTEC slope, ≈ −1.3 TECU on B.
* The reported σ is pessimistic after the first minutes: ~2.1 TECU at 5 min, where the error
  was 1.1–1.5.

Next lead: new information, not retuning. For example, a levelling prior that knows multipath of
several minutes' period (its variance is now judged from 30-s increments).

Axes: ``m`` satellites of the epoch, ``p`` VTEC coefficients, ``G`` group slots (``N_SYSTEMS ×
pair-table width``, plus per-satellite groups), ``A`` open arcs (those of the last epoch, in its
order); ``normal`` / ``rhs`` are ordered (coefficients, groups), size ``p + G``; ``_arc_h`` is
(A, p + G), ``_arc_n`` (A, A).
"""

# size: ~570 lines: one model on one set of normal equations (prediction, re-levelling of open
# arcs, solving, sigma scaling, state round trip), with the measurements behind its choices.
from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = ["N_VTEC", "ReceiverBias", "match_ids", "same_ids"]

F64 = npt.NDArray[np.float64]
_PRIOR_SIGMA_TECU = 100.0
_PRIOR_VTEC_SIGMA = 1000.0
#: Number of VTEC surface coefficients (a0 … a5 above).
N_VTEC = 6
#: Random-walk variance rate of each coefficient per second: (TECU)², (TECU per 1000 km)² and
#: (TECU per (1000 km)²)² per s (3 TECU/√h on a0 and the gradients, 0.25 on the curvature).
_VTEC_RW = np.array([3.0, 3.0, 3.0, 0.25, 0.25, 0.25]) ** 2 / 3600.0
#: Prior σ of the curvature coefficients a3…a5, TECU per (1000 km)² (see the module doc).
_CURVATURE_SIGMA = 1.4
_VTEC_COLS = np.arange(N_VTEC)
#: Version of :meth:`ReceiverBias.state_dict` (1: reduced bias normal equations, plane model;
#: 2: full normal equations of (coefficients, biases)).
STATE_VERSION = 2


def same_ids(known: npt.NDArray[np.int64], ids: npt.NDArray[np.int64]) -> bool:
    """Whether ``ids`` are ``known``, in the same order: the usual case between two updates (no
    arc opened or closed), where :func:`match_ids` would find every id at its own row."""
    return known.shape == ids.shape and bool(np.array_equal(known, ids))


def match_ids(
    known: npt.NDArray[np.int64], ids: npt.NDArray[np.int64]
) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.intp]]:
    """For each of ``ids``: whether it is in ``known`` (non-empty, unique), and the rows of
    ``known`` holding the ones found, in the order of ``ids``."""
    order = np.argsort(known)
    sorted_ids = known[order]
    pos = np.minimum(np.searchsorted(sorted_ids, ids), sorted_ids.shape[0] - 1)
    found = sorted_ids[pos] == ids
    rows: npt.NDArray[np.intp] = order[pos[found]]
    return found, rows


class ReceiverBias:
    """Accumulated normal equations of the VTEC surface and the receiver bias of each group."""

    def __init__(self, group_labels: list[str], memory_s: float) -> None:
        self.labels = list(group_labels)
        self._pos = {label: i for i, label in enumerate(self.labels) if label}
        g = len(self.labels)
        p = N_VTEC
        self.memory_s = float(memory_s)
        self.normal = np.zeros((p + g, p + g))
        self.rhs = np.zeros(p + g)
        self.sq_res = 0.0  # forgetting-weighted Σ w·residual²
        self.dof = 0.0  # forgetting-weighted degrees of freedom
        self.last_t = math.nan
        self.bias = np.zeros(g)
        self.sigma = np.full(g, np.nan)
        self.vtec_coef = np.full(p, np.nan)
        self._x = np.zeros(p + g)  # last solution (coefficients, biases)
        self._sd_unit = np.full(g, np.nan)  # σ of each group for unit scatter
        self.last_n_groups = 0  # groups in the last epoch given to :meth:`add_epoch`
        self._prior = np.zeros(0)  # prior information of each parameter (see :meth:`_solve`)
        # Open arcs: id, Σ w·h of their observations so far (transformed like ``rhs``), the
        # levelling offset their y carried (see :meth:`add_epoch`), their own information block
        # (Σ w and cross terms, Σ w·y) and the prior variance of their levelling error (0: none).
        self._arc_id = np.zeros(0, np.int64)
        self._arc_h = np.zeros((0, p + g))
        self._arc_lev = np.zeros(0)
        self._arc_n = np.zeros((0, 0))
        self._arc_r = np.zeros(0)
        self._arc_var = np.zeros(0)
        #: Estimated levelling error ê_a (TECU) of each satellite of the last epoch's arcs, in the
        #: order of that epoch (0 where no ``arc_var`` was given): y − ê_a is the re-levelled y.
        self.arc_offset = np.zeros(0)

    def group_index(self, label: str) -> int:
        """The group of ``label``, appended (normal equations grown, rarely) if new."""
        i = self._pos.get(label)
        if i is not None:
            return i
        g = len(self.labels)
        n = self.normal.shape[0]
        self.labels.append(label)
        self._pos[label] = g
        normal = np.zeros((n + 1, n + 1))
        normal[:n, :n] = self.normal
        self.normal = normal
        self.rhs = np.append(self.rhs, 0.0)
        self.bias = np.append(self.bias, 0.0)
        self.sigma = np.append(self.sigma, np.nan)
        self._x = np.append(self._x, 0.0)
        self._sd_unit = np.append(self._sd_unit, np.nan)
        self._arc_h = np.concatenate((self._arc_h, np.zeros((self._arc_h.shape[0], 1))), axis=1)
        return g

    @staticmethod
    def _design(mapping: F64, x_km: F64, y_km: F64) -> F64:
        """Columns M·(1, x, y, x², x·y, y²), x/y in 1000 km: a quadratic surface of VTEC."""
        x = x_km / 1000.0
        y = y_km / 1000.0
        return np.stack(
            (mapping, mapping * x, mapping * y, mapping * x * x, mapping * x * y, mapping * y * y),
            axis=1,
        )

    @staticmethod
    def _design_into(h: F64, mapping: F64, x_km: F64, y_km: F64) -> None:
        """:meth:`_design` written into the first ``N_VTEC`` columns of ``h`` (same values)."""
        x = x_km / 1000.0
        y = y_km / 1000.0
        h[:, 0] = mapping
        np.multiply(mapping, x, out=h[:, 1])
        np.multiply(mapping, y, out=h[:, 2])
        np.multiply(h[:, 1], x, out=h[:, 3])
        np.multiply(h[:, 1], y, out=h[:, 4])
        np.multiply(h[:, 2], y, out=h[:, 5])

    def vtec_model(self, mapping: F64, x_km: F64, y_km: F64) -> F64:
        """Slant TEC of the last fitted epoch's VTEC surface at these pierce points (TECU)."""
        return np.asarray(self._design(mapping, x_km, y_km) @ self.vtec_coef, dtype=np.float64)

    def _predict(self, dt: float) -> None:
        """Forgetting of everything and the random walk of the VTEC coefficients over ``dt``
        (applied to the whole information matrix, the open arcs' block included)."""
        lam = math.exp(-dt / self.memory_s)
        self.normal *= lam
        self.rhs *= lam
        self._arc_h *= lam
        self._arc_n *= lam
        self._arc_r *= lam
        self.sq_res *= lam
        self.dof *= lam
        p = N_VTEC
        q = _VTEC_RW * max(dt, 1e-3)
        col = self.normal[:, :p]
        s = self.normal[:p, :p].copy()
        s.flat[:: p + 1] += 1.0 / q
        arc_p = self._arc_h[:, :p]
        try:
            k = np.linalg.solve(s, np.concatenate((col, arc_p)).T)  # (p, p+G+A)
        except np.linalg.LinAlgError:
            return
        n = col.shape[0]
        k_arc = k[:, n:]
        k = k[:, :n]
        self._arc_n -= arc_p @ k_arc
        self._arc_r -= k_arc.T @ self.rhs[:p]
        self.normal -= col @ k
        self.rhs -= k.T @ self.rhs[:p]
        self._arc_h -= arc_p @ k
        self.normal = 0.5 * (self.normal + self.normal.T)
        self._arc_n = 0.5 * (self._arc_n + self._arc_n.T)

    def add_epoch(
        self,
        t: float,
        *,
        y: F64,
        mapping: F64,
        x_km: F64,
        y_km: F64,
        group: npt.NDArray[np.intp],
        weight: F64,
        n_epoch_groups: int | None = None,
        arc: npt.NDArray[np.int64] | None = None,
        level: F64 | None = None,
        arc_var: F64 | None = None,
    ) -> bool:
        """Accumulate one epoch; returns False (nothing learnt) with fewer than 5 satellites.

        Afterwards ``vtec_coef`` holds the fitted surface (a0 … a5) at ``t`` with the current
        biases (``vtec_model`` evaluates it for other satellites). ``n_epoch_groups``: the groups
        that cost this epoch a degree of freedom (default all; per-satellite groups live across
        epochs).

        ``arc`` (arc id) and ``level`` (the arc's levelling offset contained in ``y``, TECU):
        the levelling offset of an arc improves as the arc grows, so the observations an arc
        contributed earlier are re-levelled with its current offset (their Σ w·h is kept per
        open arc; the right-hand side gains Σ w·h·Δoffset): each arc then enters the fit with
        its best levelling, not with the early, poorer one. Arcs absent from an epoch are
        closed (their contribution stays with their last offset).

        ``arc_var`` (TECU², with ``arc``): the prior variance of each arc's levelling error; the
        arcs then enter as random effects (module doc) and ``arc_offset`` holds their estimated
        levelling errors. A closed arc is eliminated with its last variance."""
        m = y.shape[0]
        assert mapping.shape == x_km.shape == y_km.shape == group.shape == weight.shape == (m,)
        if m < 5:
            return False
        if math.isfinite(self.last_t):
            self._predict(max(t - self.last_t, 0.0))
        self.last_t = t
        p = N_VTEC
        # the epoch's groups, sorted, and each satellite's rank among them (np.unique's, from a
        # table over the group slots: groups are small non-negative ints)
        mark = np.zeros(self.rhs.shape[0] - p, np.intp)
        mark[group] = 1
        rank = np.cumsum(mark)
        groups = np.flatnonzero(mark)
        n_grp = groups.shape[0]
        cols = np.empty(p + n_grp, np.intp)
        cols[:p] = _VTEC_COLS
        cols[p:] = groups
        cols[p:] += p
        h = np.zeros((m, p + n_grp))
        self._design_into(h, mapping, x_km, y_km)
        h[np.arange(m), p - 1 + rank[group]] = 1.0
        hw = h * weight[:, None]
        self.normal[cols[:, None], cols] += hw.T @ h
        self.rhs[cols] += hw.T @ y
        self.last_n_groups = n_grp
        if arc is not None and level is not None:
            var = np.zeros(m) if arc_var is None else np.asarray(arc_var, np.float64)
            assert arc.shape == level.shape == var.shape == (m,)
            self._relevel(arc, level, cols, hw)
            self._arc_n.flat[:: m + 1] += weight
            self._arc_r += weight * y
            self._arc_var = np.where(np.isfinite(var) & (var > 0.0), var, 0.0)
        if not self._solve():
            return False
        # Post-fit scatter of this epoch with the current estimate (for the σ scale).
        res = y - h @ self._x[cols]
        if arc is not None and level is not None:
            res -= self.arc_offset
            # the arcs' offsets against their priors count like residuals (pseudo-observations)
            re = self._arc_var > 0.0
            self.sq_res += float(np.sum(self.arc_offset[re] ** 2 / self._arc_var[re]))
        self.sq_res += float(np.sum(weight * res * res))
        n_g = n_grp if n_epoch_groups is None else n_epoch_groups
        self.dof += max(m - p - n_g, 0)
        self._scale_sigma()  # with this epoch's scatter, as a reload from a checkpoint gives
        self.vtec_coef = self._x[:p].copy()
        return True

    def _relevel(
        self, arc: npt.NDArray[np.int64], level: F64, cols: npt.NDArray[np.intp], hw: F64
    ) -> None:
        """Close the arcs absent from this epoch, re-level the open arcs' earlier observations
        and add this epoch's to their sums (rows re-ordered as ``arc``)."""
        m = arc.shape[0]
        if same_ids(self._arc_id, arc):
            # the same arcs in the same order (the usual case): no arc closes, rows unchanged
            d = level - self._arc_lev
            self.rhs += self._arc_h.T @ d
            self._arc_r = self._arc_r + self._arc_n @ d
            self._arc_h[:, cols] += hw
            self._arc_lev = np.asarray(level, np.float64).copy()
            return
        new_h = np.zeros((m, self.rhs.shape[0]))
        new_n = np.zeros((m, m))
        new_r = np.zeros(m)
        if self._arc_id.shape[0]:
            found, rows = match_ids(self._arc_id, arc)
            closed = np.ones(self._arc_id.shape[0], np.bool_)
            closed[rows] = False
            if closed.any():
                self._close(closed)
                rows = np.cumsum(~closed)[rows] - 1  # positions among the remaining arcs
            d = level[found] - self._arc_lev[rows]
            old_h = self._arc_h[rows]
            old_n = self._arc_n[np.ix_(rows, rows)]
            self.rhs += old_h.T @ d
            new_h[found] = old_h
            new_n[np.ix_(found, found)] = old_n
            new_r[found] = self._arc_r[rows] + old_n @ d
        new_h[:, cols] += hw
        self._arc_id = np.asarray(arc, np.int64).copy()
        self._arc_h = new_h
        self._arc_n = new_n
        self._arc_r = new_r
        self._arc_lev = np.asarray(level, np.float64).copy()

    def _close(self, closed: npt.NDArray[np.bool_]) -> None:
        """Drop the ``closed`` arcs; those with a levelling variance are eliminated first (their
        information folded into ``normal`` / ``rhs`` and the other arcs' block with the prior)."""
        keep = ~closed
        c = np.flatnonzero(closed & (self._arc_var > 0.0))
        if c.shape[0]:
            k = np.flatnonzero(keep)
            mcc = self._arc_n[np.ix_(c, c)] + np.diag(1.0 / self._arc_var[c])
            rhs_c = np.column_stack((self._arc_h[c], self._arc_n[np.ix_(c, k)], self._arc_r[c]))
            try:
                sol = np.linalg.solve(mcc, rhs_c)
            except np.linalg.LinAlgError:
                sol = np.zeros_like(rhs_c)
            n = self.rhs.shape[0]
            h_c = self._arc_h[c]
            self.normal -= h_c.T @ sol[:, :n]
            self.normal = 0.5 * (self.normal + self.normal.T)
            self.rhs -= h_c.T @ sol[:, -1]
            n_ck = self._arc_n[np.ix_(c, k)]
            self._arc_h[k] -= n_ck.T @ sol[:, :n]
            self._arc_n[np.ix_(k, k)] -= n_ck.T @ sol[:, n:-1]
            self._arc_r[k] -= n_ck.T @ sol[:, -1]
        self._arc_id = self._arc_id[keep]
        self._arc_h = self._arc_h[keep]
        self._arc_n = self._arc_n[np.ix_(keep, keep)]
        self._arc_r = self._arc_r[keep]
        self._arc_lev = self._arc_lev[keep]
        self._arc_var = self._arc_var[keep]

    def _solve(self) -> bool:
        p = N_VTEC
        n_all = self.normal.shape[0]
        used = self.normal.diagonal() > 0
        used[:p] = True
        prior = self._prior
        if prior.shape[0] != n_all:
            prior = np.full(n_all, 1.0 / _PRIOR_SIGMA_TECU**2)
            prior[:p] = 1.0 / _PRIOR_VTEC_SIGMA**2
            prior[3:p] = 1.0 / _CURVATURE_SIGMA**2
            self._prior = prior
        sel = np.flatnonzero(used)
        n_sel = sel.shape[0]
        normal, rhs = self.normal, self.rhs
        arc_var = self._arc_var
        n_arc = arc_var.shape[0]
        re = np.flatnonzero(arc_var > 0.0)
        n_re = re.shape[0]
        # Only the used parameters (``sel``) are solved for: the others are 0 with NaN variance.
        n = normal[sel[:, None], sel]
        if n_re:  # eliminate the arcs' levelling errors (random effects)
            # M_a⁻¹ (h_a, r_a) for the used columns of h_a only (the solve is column by column)
            if n_re == n_arc:  # all of them (the usual case): no row gather
                h_a = self._arc_h
                r_a = self._arc_r
                m_a = self._arc_n.copy()
                m_a.flat[:: n_re + 1] += 1.0 / arc_var
            else:
                h_a = self._arc_h[re]
                r_a = self._arc_r[re]
                m_a = self._arc_n[re[:, None], re]
                m_a.flat[:: n_re + 1] += 1.0 / arc_var[re]
            b = np.empty((n_re, n_sel + 1))
            b[:, :n_sel] = h_a[:, sel]
            b[:, n_sel] = r_a
            try:
                sol = np.linalg.solve(m_a, b)
            except np.linalg.LinAlgError:
                return False
            # Schur complement: the used block only; the two matrix-vector products (here and
            # for arc_offset) keep all columns, as the general path's rounding depends on them
            n -= b[:, :n_sel].T @ sol[:, :n_sel]
            rhs = rhs - h_a.T @ sol[:, -1]
        n.flat[:: n_sel + 1] += prior[sel]
        try:
            cov = np.linalg.inv(n)
        except np.linalg.LinAlgError:
            return False
        x = np.zeros(n_all)
        x[sel] = cov @ rhs[sel]
        self.arc_offset = np.zeros(n_arc)
        if n_re:
            sol_x = np.zeros((n_re, n_all))  # M_a⁻¹ h_a, 0 in the unused columns (x is 0 there)
            sol_x[:, sel] = sol[:, :n_sel]
            self.arc_offset[re] = sol[:, -1] - sol_x @ x
        self._x = x
        var = np.full(n_all, np.nan)
        var[sel] = cov.diagonal()
        self.bias = x[p:].copy()
        self.bias[~used[p:]] = 0.0
        self._sd_unit = np.sqrt(var[p:])  # NaN for unused groups
        self._scale_sigma()
        return True

    def _scale_sigma(self) -> None:
        """σ of each group: the post-fit scatter (unit weight) × √diag of the inverse normals.

        With the arcs' levelling errors as random effects the covariance is absolute (their
        priors are TECU², the weights 1 TECU² at unit weight); the scatter (residuals and the
        arcs' offsets against their priors, as pseudo-observations) then only inflates it.
        Measured on our simulator's quiet day (seeds 1, 7): σ ≈ 2 TECU at the first updates,
        where the error was up to 2.7, and ~1 TECU after 20 min, where it was 0.3–0.6 (scaled
        down by the scatter, 0.4, it was 0.8 and 0.3–0.45: optimistic). On 17 min of real GPS data
        (P433, /work/shared/data/real) the arcs' offsets exceed their priors and σ stays above
        ``APPLY_SIGMA_TECU`` (12.9 TECU)."""
        s0 = math.sqrt(self.sq_res / self.dof) if self.dof > 1.0 else 1.0
        if (self._arc_var > 0.0).any():
            s0 = max(s0, 1.0)
        self.sigma = s0 * self._sd_unit

    def state_dict(self) -> dict[str, Any]:
        """State for checkpointing: numbers, strings and lists only (JSON- and npz-friendly);
        groups go by label, so a changed pair list is harmless."""
        return {
            "version": STATE_VERSION,
            "labels": list(self.labels),
            "n_vtec": N_VTEC,
            "normal": self.normal.tolist(),
            "rhs": self.rhs.tolist(),
            "sq_res": self.sq_res,
            "dof": self.dof,
            "last_t": self.last_t,
            # open arcs (re-levelling, random effects): resumed arcs continue exactly after a
            # restart (arc_n/arc_r/arc_var are absent from states written before they existed)
            "arc_id": self._arc_id.tolist(),
            "arc_h": self._arc_h.tolist(),
            "arc_lev": self._arc_lev.tolist(),
            "arc_n": self._arc_n.tolist(),
            "arc_r": self._arc_r.tolist(),
            "arc_var": self._arc_var.tolist(),
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore from :meth:`state_dict`; groups unknown to this config are dropped.

        Version 1 (bias-only normal equations, the VTEC plane eliminated every epoch) loads as
        the bias block with nothing known about the surface, which is what it meant; a surface
        of another size is eliminated the same way. Open arcs are resumed only from a state that
        carries their own information block (``arc_n``); from an older one they count as closed
        (their observations stay with their last levelling offset)."""
        version = int(state.get("version", -1))
        if version not in (1, STATE_VERSION):
            raise ValueError(f"unknown receiver-bias state version {state.get('version')!r}")
        labels = [str(x) for x in state["labels"]]
        normal = np.asarray(state["normal"], dtype=np.float64)
        rhs = np.asarray(state["rhs"], dtype=np.float64)
        q = int(state.get("n_vtec", 0)) if version >= 2 else 0
        n = q + len(labels)
        if normal.shape != (n, n) or rhs.shape != (n,):
            raise ValueError("receiver-bias state: normal/rhs shapes do not match labels")
        p = N_VTEC
        if q != p and q > 0:  # another surface: keep only what it says about the biases
            n_aa = normal[:q, :q] + np.eye(q) / _PRIOR_VTEC_SIGMA**2
            k = np.linalg.solve(n_aa, normal[:q, q:])
            rhs = rhs[q:] - k.T @ rhs[:q]
            normal = normal[q:, q:] - normal[q:, :q] @ k
            q = 0
        pos = self._pos
        src = [i for i, label in enumerate(labels) if label in pos]
        dst = [p + pos[labels[i]] for i in src]
        src_all = [*range(q), *(q + i for i in src)]
        dst_all = [*range(q), *dst]
        self.normal[:] = 0.0
        self.rhs[:] = 0.0
        self.normal[np.ix_(dst_all, dst_all)] = normal[np.ix_(src_all, src_all)]
        self.rhs[dst_all] = rhs[src_all]
        self._arc_id = np.zeros(0, np.int64)
        self._arc_h = np.zeros((0, self.rhs.shape[0]))
        self._arc_lev = np.zeros(0)
        self._arc_n = np.zeros((0, 0))
        self._arc_r = np.zeros(0)
        self._arc_var = np.zeros(0)
        self.arc_offset = np.zeros(0)
        arc_h = np.asarray(state.get("arc_h", []), dtype=np.float64)
        a = arc_h.shape[0]
        arc_n = np.asarray(state.get("arc_n", []), dtype=np.float64)
        if q == p and a and arc_n.shape == (a, a):  # open arcs, columns mapped like the normals
            self._arc_id = np.asarray(state["arc_id"], dtype=np.int64)
            self._arc_lev = np.asarray(state["arc_lev"], dtype=np.float64)
            self._arc_h = np.zeros((a, self.rhs.shape[0]))
            self._arc_h[:, dst_all] = arc_h[:, src_all]
            self._arc_n = arc_n
            self._arc_r = np.asarray(state["arc_r"], dtype=np.float64)
            self._arc_var = np.asarray(state["arc_var"], dtype=np.float64)
        self.sq_res = float(state["sq_res"])
        self.dof = float(state["dof"])
        self.last_t = float(state.get("last_t", math.nan))
        self._solve()
