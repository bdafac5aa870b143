"""Per-satellite state of the estimator as ONE float64 matrix (STYLE rule 21).

Axes: ``NSTATE`` named rows × ``S`` satellite slots (``MAX_SAT_ID``). Each epoch works on a block
of the ``d`` satellites of its layout, shape (``NROW``, d): the state rows of those satellites
(gathered once when the layout changes, kept while it repeats, scattered back when it changes or
the state is read), then the work row ``DT``, the pair coefficients ``F1 … NOISE`` of the layout
and the slip tests' floors and thresholds. Rows are quantities, so every quantity of the block is
one contiguous row, and quantities that are processed together are neighbours or a fixed number
of rows apart (stacked (2, d), (3, d) or (7, d) views: one numpy call instead of one per
quantity).
Integer-valued rows (arc id, counts, ranks, lock indicators, flags) are exact in float64.
"Unknown" is NaN (or −1 for ids/indicators), as in a fresh state.

The checkpoint keeps the column order of ``COLUMNS`` (state format of version 2);
:func:`to_columns` and :func:`from_columns` convert.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["COLUMNS", "NROW", "NSTATE", "ROWS", "from_columns", "new_state", "to_columns"]

F64 = npt.NDArray[np.float64]

#: Checkpoint column names, in checkpoint order (see the module doc).
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
)  # fmt: skip
#: Row names of the state and of an epoch's block, in row order. The arc test's "previous sample"
#: rows (rank, half-cycle flags, lock indicators, lock times) follow the order of the epoch's
#: values they are compared with; the GF and MW rows pair up as (GF, MW) stacks (two rows at a
#: fixed distance form one (2, d) view: "gf_rate", "mw_mean" what the jump tests' residuals
#: update, "dt", "n" what divides those residuals). "gf_pred" … "gf0" are what the epoch's GF, MW,
#: levelling sample, raw MP1, MP2 and K·GF are differenced with (one (6, d) subtraction), and
#: "lev_mean", "mp1", "mp2" the running means updated as one (3, d) stack. "gf_pred" and "dt" are
#: work rows (the epoch's GF prediction, time since the previous sample).
ROWS = (
    "arc", "last_t",
    "rank", "half1", "half2", "lock1", "lock2", "locktime1", "locktime2",
    "gf_var", "mw_var",
    "gf_level", "gf_rate",
    "gf_pred", "mw_mean", "lev_mean", "mp1", "mp2", "gf0",
    "lev_sw", "hatch", "ifl_prev",
    "n",
    "dt",  # (s) first row past the state: written each epoch, never stored per slot
    "f1", "f2",  # frequencies the coefficients below belong to (Hz)
    "k", "alpha", "beta", "gamma", "lwl", "l1m", "noise",  # SCIENCE.md §3 coefficients
    "gf_floor", "mw_floor",  # the jump tests' floors (m): GF per epoch, MW per layout
    "gf_low", "mw_thr",  # GF threshold's lower bound (m, per layout), MW threshold (per epoch)
)  # fmt: skip
NROW = len(ROWS)
(ARC, LAST_T, RANK, HALF1, HALF2, LOCK1, LOCK2, LT1, LT2, GF_VAR, MW_VAR, GF_LEVEL, GF_RATE,
 GF_PRED, MW_MEAN, LEV_MEAN, MP1, MP2, GF0, LEV_SW, HATCH, IFL_PREV, N, DT, F1, F2, K, ALPHA,
 BETA, GAMMA, LWL, L1M, NOISE, GF_FLOOR, MW_FLOOR, GF_LOW, MW_THR) = range(NROW)  # fmt: skip
#: Rows stored per satellite slot (the rest of a block comes from the layout or is work space).
NSTATE = DT
_DIFFERENCED = (GF_PRED, MW_MEAN, LEV_MEAN, MP1, MP2, GF0)  # one (6, d) view, (3, d) inside
assert tuple(range(GF_PRED, GF_PRED + 6)) == _DIFFERENCED
assert GF_RATE < MW_MEAN  # (2, d) views in (GF, MW) order: (rate, mean) and (dt, n)
assert N < DT
#: State row of each checkpoint column.
_COLUMN_ROWS = np.array([ROWS.index(c) for c in COLUMNS], np.intp)
assert sorted({*_COLUMN_ROWS.tolist(), GF_PRED}) == list(range(NSTATE))


def new_state(n_slots: int, mw_var0: float, gf_var0: float) -> F64:
    """A fresh (NSTATE, n_slots) state: nothing seen yet."""
    st = np.zeros((NSTATE, n_slots))
    st[[ARC, RANK, LOCK1, LOCK2]] = -1.0
    st[[LAST_T, LT1, LT2, GF_PRED]] = np.nan
    st[MW_VAR] = mw_var0
    st[GF_VAR] = gf_var0
    return st


def to_columns(state: F64, slots: npt.NDArray[np.intp]) -> F64:
    """The (k, len(COLUMNS)) checkpoint rows of the satellite ``slots``."""
    out: F64 = state[_COLUMN_ROWS][:, slots].T.copy()
    return out


def from_columns(state: F64, slots: npt.NDArray[np.intp], rows: F64) -> None:
    """Write checkpoint rows (k, len(COLUMNS)) of the satellite ``slots`` into ``state``."""
    state[_COLUMN_ROWS[:, None], slots[None, :]] = rows.T
