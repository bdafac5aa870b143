"""Per-satellite state of the estimator as ONE float64 matrix (STYLE rule 21).

Axes: ``S`` satellite slots (``MAX_SAT_ID``) × ``NCOL`` named columns. Each epoch gathers the rows
of its ``m`` satellites once (``block = state[idx]``), works on column views of that block, and
scatters it back once (``state[idx] = block``): two fancy-index operations per epoch instead of two
per quantity. Integer-valued columns (arc id, counts, ranks, lock indicators, flags) are exact in
float64. "Unknown" is NaN (or −1 for ids/indicators), as in a fresh state. Only the first
``NSTATE`` columns are kept between epochs; the pair coefficients ``F1 … NOISE`` depend only on
the epoch layout and are appended to the gathered block from it (``EpochLayout.coefs``).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["COLUMNS", "NCOL", "NSTATE", "new_state"]

#: Column names, in order; the module constants below are their indices.
COLUMNS = (
    "arc",  # arc id (−1 none)
    "n",  # samples in the current arc
    "last_t",  # time of the last dual-frequency sample (s, NaN never)
    "rank",  # pair rank in use (−1 none)
    "lock1", "lock2",  # MSM lock-time indicator of band 1 / 2 (−1 none)
    "locktime1", "locktime2",  # decoded lock time (s, NaN none)
    "half1", "half2",  # half-cycle flags (0/1)
    "mw_mean",  # running mean of MW over the arc (m)
    "mw_var",  # running scatter of MW residuals (m²)
    "gf_level", "gf_rate", "gf_var",  # α–β tracker of GF (m, m/s) and residual scatter (m²)
    "lev_mean", "lev_sw",  # levelling offset (TECU) and its weight sum
    "gf0",  # K·GF at the arc start (TECU): ROT values are stored relative to it
    "hatch", "ifl_prev",  # Hatch-smoothed IF code and the previous IF phase (m)
    "mp1", "mp2",  # running arc means of the raw MP1/MP2 (m)
    "f1", "f2",  # frequencies the coefficients below belong to (Hz)
    "k", "alpha", "beta", "gamma", "lwl", "l1m", "noise",  # SCIENCE.md §3 coefficients
)  # fmt: skip
NCOL = len(COLUMNS)
(ARC, N, LAST_T, RANK, LOCK1, LOCK2, LT1, LT2, HALF1, HALF2, MW_MEAN, MW_VAR, GF_LEVEL, GF_RATE,
 GF_VAR, LEV_MEAN, LEV_SW, GF0, HATCH, IFL_PREV, MP1, MP2, F1, F2, K, ALPHA, BETA, GAMMA, LWL, L1M,
 NOISE) = range(NCOL)  # fmt: skip
#: Columns stored per satellite slot (the rest of a gathered block comes from the layout).
NSTATE = F1


def new_state(n_slots: int, mw_var0: float, gf_var0: float) -> npt.NDArray[np.float64]:
    """A fresh (n_slots, NSTATE) state: nothing seen yet."""
    st = np.zeros((n_slots, NSTATE))
    st[:, [ARC, RANK, LOCK1, LOCK2]] = -1.0
    st[:, [LAST_T, LT1, LT2]] = np.nan
    st[:, MW_VAR] = mw_var0
    st[:, GF_VAR] = gf_var0
    return st
