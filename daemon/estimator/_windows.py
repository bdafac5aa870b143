"""Rolling windows over epochs, as ring buffers over a fixed satellite axis (STYLE rules 21–22).

Axes: ``R`` ring rows (epochs or time slots), ``S`` satellite slots (``MAX_SAT_ID``). NaN marks
"no value". Both classes are pure: time comes in as an argument.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

__all__ = ["LagRing", "SlotStd"]

F64 = npt.NDArray[np.float64]


class LagRing:
    """The last ``R`` epochs of one per-satellite value, to difference it over a fixed lag.

    Invariant: row ``k`` holds the epoch written ``(head − k) mod R`` writes ago; ``t[k]`` is its
    time (NaN if never written) and ``value[k, s]`` the satellite's value then (NaN if it had
    none); ``last_arc[s]`` is the arc id last pushed for satellite ``s`` and ``arc_t0[s]`` the time
    of that arc's first push. Arc ids are never reused and a satellite's arcs follow each other in
    time, so row ``k`` belongs to the satellite's current arc exactly when ``t[k] ≥ arc_t0[s]``
    (no arc id per row needed). Values are stored relative to the arc's first value (float32 is
    then exact to ~1e-4 TECU) — the caller passes them so. The capacity is what ``lag_s`` needs at
    1 Hz and grows (rarely, by reallocation) when the data rate needs more rows.
    """

    def __init__(self, n_slots: int, lag_s: float, rows: int | None = None) -> None:
        self.lag_s = float(lag_s)
        self.n_slots = n_slots
        self.last_arc = np.full(n_slots, -1, np.int32)
        self.arc_t0 = np.full(n_slots, np.nan)
        self._alloc(rows if rows is not None else self._rows_needed(1.0))

    def _rows_needed(self, interval_s: float) -> int:
        """Rows that hold ``lag_s`` plus two samples at sampling ``interval_s``."""
        return math.ceil(self.lag_s / max(interval_s, 1e-3)) + 3

    def _alloc(self, rows: int) -> None:
        self.t = np.full(rows, np.nan)
        self.value = np.full((rows, self.n_slots), np.nan, np.float32)
        self.head = -1

    @property
    def rows(self) -> int:
        return int(self.t.shape[0])

    def ensure_interval(self, interval_s: float) -> None:
        """Grow so that ``lag_s`` plus two samples fits at sampling ``interval_s`` (keeps data)."""
        need = self._rows_needed(interval_s)
        if need <= self.rows:
            return
        order = (np.arange(self.rows) + self.head + 1) % self.rows  # oldest first
        t, value = self.t[order], self.value[order]
        old = self.rows
        self._alloc(need)
        self.t[:old], self.value[:old] = t, value
        self.head = old - 1

    def push(
        self, t: float, sats: npt.NDArray[np.intp], value: F64, arc: npt.NDArray[np.int32]
    ) -> None:
        assert sats.shape == value.shape == arc.shape, (sats.shape, value.shape, arc.shape)
        self.head = (self.head + 1) % self.rows
        row = self.head
        self.t[row] = t
        self.value[row].fill(np.nan)
        self.value[row, sats] = value
        started = self.last_arc.take(sats) != arc
        if np.count_nonzero(started):
            self.arc_t0[sats[started]] = t
            self.last_arc[sats] = arc

    def lagged(
        self, t: float, sats: npt.NDArray[np.intp], arc: npt.NDArray[np.int32], interval_s: float
    ) -> tuple[F64, float]:
        """Values at the stored epoch nearest ``t − lag_s`` (within half a sampling interval),
        NaN where the satellite had no value then or was in another arc (``arc``: the current
        arc ids, before this epoch's push); also that epoch's time (NaN if none). The row where
        regular sampling puts it is tried first."""
        target = t - self.lag_s
        tol = 0.5 * interval_s + 1e-3
        k = (self.head + 1 - round(self.lag_s / interval_s)) % self.rows
        if not abs(self.t[k] - target) <= tol:
            err = np.abs(self.t - target)
            if not np.isfinite(err).any():
                return np.full(sats.shape, np.nan), math.nan
            k = int(np.nanargmin(err))
            if err[k] > tol:
                return np.full(sats.shape, np.nan), math.nan
        t_k = float(self.t[k])
        v = self.value[k].take(sats).astype(np.float64)
        other = (self.last_arc.take(sats) != arc) | ~(self.arc_t0.take(sats) <= t_k)
        v[other] = np.nan
        return v, t_k


class SlotStd:
    """Standard deviation per satellite over a sliding time window, sampled in fixed time slots.

    Time is cut into slots of ``slot_s``; the first sample of a satellite in a slot is kept.
    Invariant: ``total[s]``, ``total_sq[s]`` and ``count[s]`` are the sum, sum of squares and count
    of the values of satellite ``s`` held in the ring, whose entry ``n mod R`` holds the
    (satellites, values) written in slot ``n`` for the last ``R = window/slot`` slots up to
    ``last_slot`` (entries of skipped slots are emptied). Removing an entry subtracts exactly what
    adding it added, and the sums are rebuilt exactly each time the ring wraps, so rounding
    cannot drift.
    """

    def __init__(self, n_slots: int, window_s: float, slot_s: float) -> None:
        self.slot_s = float(slot_s)
        self.n_slots = n_slots
        self.rows = max(2, round(window_s / slot_s))
        empty = (np.zeros(0, np.intp), np.zeros(0))
        self.entries: list[tuple[npt.NDArray[np.intp], F64]] = [empty] * self.rows
        self.total = np.zeros(n_slots)
        self.total_sq = np.zeros(n_slots)
        self.count = np.zeros(n_slots)
        self.last_slot = -1
        self._since_exact = 0

    def _drop(self, row: int) -> None:
        sats, vals = self.entries[row]
        if sats.size:
            self.total[sats] -= vals
            self.total_sq[sats] -= vals * vals
            self.count[sats] -= 1.0
            self.entries[row] = (sats[:0], vals[:0])

    def _recompute(self) -> None:
        sats = np.concatenate([e[0] for e in self.entries])
        vals = np.concatenate([e[1] for e in self.entries])
        self.total = np.asarray(np.bincount(sats, vals, self.n_slots), dtype=np.float64)
        self.total_sq = np.asarray(np.bincount(sats, vals * vals, self.n_slots), dtype=np.float64)
        self.count = np.asarray(np.bincount(sats, minlength=self.n_slots), dtype=np.float64)

    def push(self, t: float, sats: npt.NDArray[np.intp], value: F64) -> None:
        """Add this epoch's values (NaN ignored; ``sats`` unique) if ``t`` opens a new slot."""
        assert sats.shape == value.shape, (sats.shape, value.shape)
        slot = math.floor(t / self.slot_s)
        if slot <= self.last_slot:
            return
        first = self.last_slot + 1 if self.last_slot >= 0 else slot
        for n in range(max(first, slot - self.rows + 1), slot + 1):
            self._drop(n % self.rows)
        self._since_exact += slot - first + 1
        self.last_slot = slot
        nan = np.isnan(value)
        if np.count_nonzero(nan):
            fin = ~nan
            s, v = sats[fin], value[fin]
        else:
            s, v = sats, value.copy()  # the caller's array may be handed on (snapshots)
        self.entries[slot % self.rows] = (s, v)
        self.total[s] += v
        self.total_sq[s] += v * v
        self.count[s] += 1.0
        if self._since_exact >= self.rows:
            self._recompute()
            self._since_exact = 0

    def std(self, sats: npt.NDArray[np.intp], min_count: int) -> F64:
        """Population standard deviation over the window (NaN below ``min_count`` samples)."""
        n = self.count[sats]
        n_safe = np.maximum(n, 1.0)
        mean = self.total[sats] / n_safe
        var = self.total_sq[sats] / n_safe - mean * mean
        out = np.sqrt(np.maximum(var, 0.0))
        out[n < min_count] = np.nan
        return out
