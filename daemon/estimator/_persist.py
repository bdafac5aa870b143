"""The rolling part of the estimator's checkpoint: arcs, ROT lag ring, ROTI window (version 2).

Axes: ``k`` satellite slots with live state (``last_t`` known), ``R`` ring rows of the ROT lag
ring, ``W`` slots of the ROTI window, ``n`` values held in that window. Only the ``k`` live rows
of each per-satellite array are kept, as numpy arrays (the runtime's checkpoint is ``.npz``), so a
station with 40 satellites at 1 Hz checkpoints ~160 KiB (mostly the 300 ROTI slots: satellite
slots as int16, values float64 so that a resumed window equals an uninterrupted one). Taken every
``checkpoint_interval_s`` and at stop by the runtime, never per epoch.

Validity (common practice for carrier-phase arcs: an arc survives only a data gap shorter than the
slip detector's gap limit): the rolling part is applied at the first ``update`` after loading, and
only when that epoch follows the checkpoint's last epoch by at most the detector's gap limit
``max(max_gap_s, gap_samples · interval)``; otherwise the estimator starts new arcs and empty
windows and keeps only the receiver biases (whose age rule is the runtime's).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from ._state import COLUMNS, LAST_T, from_columns, to_columns

if TYPE_CHECKING:
    from ._estimator import StationEstimator

__all__ = ["apply_rolling", "checked_rolling", "resume_allowed", "rolling_state"]


def rolling_state(est: StationEstimator) -> dict[str, Any]:
    """The rolling state of ``est`` as arrays and numbers (live satellite rows only)."""
    state = est.state_rows()
    live = np.flatnonzero(~np.isnan(state[LAST_T]))
    ring = est.rot_ring
    win = est.roti_window
    lengths = np.array([e[0].shape[0] for e in win.entries], np.int64)
    return {
        "t": float(est._last_epoch_t),
        "n_epochs": int(est._n_epochs),
        "interval": float(est._interval),
        "intervals": est._intervals.copy(),
        "roti_median": float(est._last_roti_median),
        "bias_due_t": float(est.biases.last_t),
        "next_arc": int(est.arcs.next_arc),
        "sats": live.astype(np.int64),
        "state": to_columns(state, live),
        "rot": {
            "lag_s": ring.lag_s,
            "head": int(ring.head),
            "t": ring.t.copy(),
            "value": ring.value[:, live],
            "last_arc": ring.last_arc[live],
            "arc_t0": ring.arc_t0[live],
        },
        "roti": {
            "slot_s": win.slot_s,
            "last_slot": int(win.last_slot),
            "since_exact": int(win._since_exact),
            "len": lengths,
            "sat": np.concatenate([e[0] for e in win.entries]).astype(np.int16),
            "val": np.concatenate([e[1] for e in win.entries]).astype(np.float64),
            "total": win.total[live],
            "total_sq": win.total_sq[live],
            "count": win.count[live],
        },
    }


def _arr(x: Any, dtype: type, shape: tuple[int, ...]) -> np.ndarray[Any, Any]:
    a: np.ndarray[Any, Any] = np.asarray(x, dtype=dtype)
    if a.shape != shape:
        raise ValueError(f"estimator state: shape {a.shape} where {shape} was expected")
    return a


def checked_rolling(est: StationEstimator, st: dict[str, Any]) -> dict[str, Any]:
    """``st`` with arrays of the right dtype and shape for ``est``'s configuration; ValueError
    when it does not fit (another ring length, window or slot size, column count)."""
    rot, roti = st["rot"], st["roti"]
    if float(rot["lag_s"]) != est.rot_ring.lag_s or float(roti["slot_s"]) != est.roti_window.slot_s:
        raise ValueError("estimator state: ROT lag or ROTI slot differs from the configuration")
    sats = np.asarray(st["sats"], np.int64).reshape(-1)
    k = sats.shape[0]
    n_slots = est.state_rows().shape[1]
    if k and not (sats.min() >= 0 and sats.max() < n_slots):
        raise ValueError("estimator state: satellite slot out of range")
    rows = int(np.asarray(rot["t"]).shape[0])
    w = est.roti_window.rows
    lengths = _arr(roti["len"], np.int64, (w,))
    n = int(lengths.sum())
    win_sat = _arr(roti["sat"], np.int64, (n,))
    if n and not (win_sat.min() >= 0 and win_sat.max() < n_slots):
        raise ValueError("estimator state: ROTI satellite slot out of range")
    return {
        **st,
        "t": float(st["t"]),
        "intervals": _arr(st["intervals"], np.float64, est._intervals.shape),
        "sats": sats,
        "state": _arr(st["state"], np.float64, (k, len(COLUMNS))),
        "rot": {
            "head": int(rot["head"]),
            "t": _arr(rot["t"], np.float64, (rows,)),
            "value": _arr(rot["value"], np.float32, (rows, k)),
            "last_arc": _arr(rot["last_arc"], np.int32, (k,)),
            "arc_t0": _arr(rot["arc_t0"], np.float64, (k,)),
        },
        "roti": {
            "last_slot": int(roti["last_slot"]),
            "since_exact": int(roti["since_exact"]),
            "len": lengths,
            "sat": win_sat,
            "val": _arr(roti["val"], np.float64, (n,)),
            "total": _arr(roti["total"], np.float64, (k,)),
            "total_sq": _arr(roti["total_sq"], np.float64, (k,)),
            "count": _arr(roti["count"], np.float64, (k,)),
        },
    }


def resume_allowed(est: StationEstimator, st: dict[str, Any], t: float) -> bool:
    """Whether an epoch at ``t`` continues the checkpoint's arcs (the slip detector's gap rule)."""
    gap_s = max(est.settings.max_gap_s, est.settings.gap_samples * float(st["interval"]))
    return bool(0.0 < t - float(st["t"]) <= gap_s)


def apply_rolling(est: StationEstimator, st: dict[str, Any]) -> None:
    """Put the (checked) rolling state ``st`` into ``est``: the inverse of :func:`rolling_state`."""
    sats = st["sats"]
    from_columns(est.state_rows(), sats, st["state"])
    est.arcs.next_arc = max(est.arcs.next_arc, int(st["next_arc"]))
    est._last_epoch_t = st["t"]
    est._n_epochs = int(st["n_epochs"])
    est._interval = float(st["interval"])
    est._intervals[:] = st["intervals"]
    est._last_roti_median = float(st["roti_median"])
    est.biases.last_t = float(st["bias_due_t"])
    rot = st["rot"]
    ring = est.rot_ring
    ring._alloc(rot["t"].shape[0])
    ring.head = rot["head"]
    ring.t[:] = rot["t"]
    ring.value[:, sats] = rot["value"]
    ring.last_arc[sats] = rot["last_arc"]
    ring.arc_t0[sats] = rot["arc_t0"]
    ring.loaded()
    roti = st["roti"]
    win = est.roti_window
    bounds = np.concatenate(([0], np.cumsum(roti["len"])))
    win.load_entries(
        [
            (roti["sat"][a:b].astype(np.intp), roti["val"][a:b].copy())
            for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist(), strict=True)
        ]
    )
    win.last_slot = roti["last_slot"]
    win._since_exact = roti["since_exact"]
    for name in ("total", "total_sq", "count"):
        getattr(win, name)[sats] = roti[name]
