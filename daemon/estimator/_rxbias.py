"""Receiver differential code bias, estimated from the data with a smooth local VTEC model.

Model per epoch (common practice for single-station bias estimation; SCIENCE.md §4):

    y_i = STEC_raw,i − B_sat,i = M_i·(a0 + a1·x_i + a2·y_i) + B_g(i) + noise

with M the thin-shell mapping factor, (x, y) the pierce-point offsets east/north (1000 km units),
and B_g one bias per *group*: g = (system, pair) for satellites whose satellite part is known
(each signal pair has its own receiver delay), or g = (satellite, pair) for the others (GLONASS
FDMA: the satellite's and the receiver's inter-frequency biases differ per channel and are only
known together). The per-satellite groups are added on first use (:meth:`group_index`); they are
anchored by the system groups through the shared VTEC plane (no extra constraint needed as long
as satellites with a known satellite part are in view). The VTEC parameters a change every epoch, the biases do not: each epoch's normal equations
are reduced onto the biases (a eliminated) and accumulated with exponential forgetting (time
constant ``memory_s``), each epoch's weight scaled down when the ionosphere is disturbed
(``quiet_weight``), so the estimate is dominated by quiet periods. A weak prior (σ = 100 TECU)
keeps the system solvable while geometry has not yet separated B from a0.

Axes: ``m`` satellites of the epoch, ``G`` group slots (``N_SYSTEMS × pair-table width``).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = ["ReceiverBias"]

F64 = npt.NDArray[np.float64]
_PRIOR_SIGMA_TECU = 100.0


class ReceiverBias:
    """Accumulated, reduced normal equations for the receiver bias of each group."""

    def __init__(self, group_labels: list[str], memory_s: float) -> None:
        self.labels = list(group_labels)
        self._pos = {label: i for i, label in enumerate(self.labels) if label}
        g = len(self.labels)
        self.memory_s = float(memory_s)
        self.normal = np.zeros((g, g))
        self.rhs = np.zeros(g)
        self.sq_res = 0.0  # forgetting-weighted Σ w·residual²
        self.dof = 0.0  # forgetting-weighted degrees of freedom
        self.last_t = math.nan
        self.bias = np.zeros(g)
        self.sigma = np.full(g, np.nan)
        self.vtec_coef = np.full(3, np.nan)

    def group_index(self, label: str) -> int:
        """The group of ``label``, appended (normal equations grown, rarely) if new."""
        i = self._pos.get(label)
        if i is not None:
            return i
        g = len(self.labels)
        self.labels.append(label)
        self._pos[label] = g
        normal = np.zeros((g + 1, g + 1))
        normal[:g, :g] = self.normal
        self.normal = normal
        self.rhs = np.append(self.rhs, 0.0)
        self.bias = np.append(self.bias, 0.0)
        self.sigma = np.append(self.sigma, np.nan)
        return g

    @staticmethod
    def _design(mapping: F64, x_km: F64, y_km: F64) -> F64:
        """Columns M·(1, x, y), x/y in 1000 km: a plane of VTEC. (A quadratic surface removes
        ~0.5 TECU of curvature leak with exact data on our simulator's quiet day, but with real
        levelling noise it decorrelates worse from the biases: tried, plane kept.)"""
        x = x_km / 1000.0
        y = y_km / 1000.0
        return np.stack((mapping, mapping * x, mapping * y), axis=1)

    def vtec_model(self, mapping: F64, x_km: F64, y_km: F64) -> F64:
        """Slant TEC of the last fitted epoch's VTEC surface at these pierce points (TECU)."""
        return np.asarray(self._design(mapping, x_km, y_km) @ self.vtec_coef, dtype=np.float64)

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
    ) -> bool:
        """Accumulate one epoch; returns False (nothing learnt) with fewer than 5 satellites.

        Afterwards ``vtec_coef`` holds this epoch's fitted surface (a0 … a5) with the current biases
        (``vtec_model`` evaluates it for other satellites). ``n_epoch_groups``: the groups that cost
        this epoch a degree of freedom (default all; per-satellite groups live across epochs)."""
        m = y.shape[0]
        assert mapping.shape == x_km.shape == y_km.shape == group.shape == weight.shape == (m,)
        if m < 5:
            return False
        if math.isfinite(self.last_t):
            lam = math.exp(-max(t - self.last_t, 0.0) / self.memory_s)
            self.normal *= lam
            self.rhs *= lam
            self.sq_res *= lam
            self.dof *= lam
        self.last_t = t
        a = self._design(mapping, x_km, y_km)
        npar = a.shape[1]
        groups, gi = np.unique(group, return_inverse=True)
        gmat = np.zeros((m, groups.shape[0]))
        gmat[np.arange(m), gi] = 1.0
        aw = a * weight[:, None]
        gw = gmat * weight[:, None]
        n_aa = a.T @ aw
        n_ab = aw.T @ gmat
        n_bb = gmat.T @ gw
        r_a = aw.T @ y
        r_b = gw.T @ y
        try:
            inv = np.linalg.inv(n_aa + 1e-9 * np.eye(npar))
        except np.linalg.LinAlgError:
            return False
        red = n_bb - n_ab.T @ inv @ n_ab
        rr = r_b - n_ab.T @ inv @ r_a
        ix = np.ix_(groups, groups)
        self.normal[ix] += red
        self.rhs[groups] += rr
        self._solve()
        # Post-fit scatter of this epoch with the current biases (for the σ scale).
        yc = y - self.bias[group]
        coef = inv @ (aw.T @ yc)
        res = yc - a @ coef
        self.sq_res += float(np.sum(weight * res * res))
        n_g = groups.shape[0] if n_epoch_groups is None else n_epoch_groups
        self.dof += max(m - npar - n_g, 0)
        self.vtec_coef = coef
        return True

    def _solve(self) -> None:
        g = self.normal.shape[0]
        used = np.diag(self.normal) > 0
        if not used.any():
            return
        n = self.normal[np.ix_(used, used)] + np.eye(int(used.sum())) / _PRIOR_SIGMA_TECU**2
        try:
            cov = np.linalg.inv(n)
        except np.linalg.LinAlgError:
            return
        self.bias = np.zeros(g)
        self.bias[used] = cov @ self.rhs[used]
        s0 = math.sqrt(self.sq_res / self.dof) if self.dof > 1.0 else 1.0
        self.sigma = np.full(g, np.nan)
        self.sigma[used] = s0 * np.sqrt(np.diag(cov))

    def state_dict(self) -> dict[str, Any]:
        """State for checkpointing: numbers, strings and lists only (JSON- and npz-friendly);
        groups go by label, so a changed pair list is harmless."""
        return {
            "version": 1,
            "labels": list(self.labels),
            "normal": self.normal.tolist(),
            "rhs": self.rhs.tolist(),
            "sq_res": self.sq_res,
            "dof": self.dof,
            "last_t": self.last_t,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore from :meth:`state_dict`; groups unknown to this config are dropped."""
        if int(state.get("version", -1)) != 1:
            raise ValueError(f"unknown receiver-bias state version {state.get('version')!r}")
        labels = [str(x) for x in state["labels"]]
        normal = np.asarray(state["normal"], dtype=np.float64)
        rhs = np.asarray(state["rhs"], dtype=np.float64)
        if normal.shape != (len(labels), len(labels)) or rhs.shape != (len(labels),):
            raise ValueError("receiver-bias state: normal/rhs shapes do not match labels")
        pos = self._pos
        src = [i for i, label in enumerate(labels) if label in pos]
        dst = [pos[labels[i]] for i in src]
        self.normal[:] = 0.0
        self.rhs[:] = 0.0
        self.normal[np.ix_(dst, dst)] = normal[np.ix_(src, src)]
        self.rhs[dst] = rhs[src]
        self.sq_res = float(state["sq_res"])
        self.dof = float(state["dof"])
        self.last_t = float(state.get("last_t", math.nan))
        self._solve()
