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
_ZERO = np.array(0.0)
_ONE = np.array(1.0)


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
        #: Latest arc start pushed (s): rows at or after it belong to every satellite's arc.
        self.t0_max = -math.inf
        self._alloc(rows if rows is not None else self._rows_needed(1.0))

    def _rows_needed(self, interval_s: float) -> int:
        """Rows that hold ``lag_s`` plus two samples at sampling ``interval_s``."""
        return math.ceil(self.lag_s / max(interval_s, 1e-3)) + 3

    def _alloc(self, rows: int) -> None:
        self.t = np.full(rows, np.nan)
        self.value = np.full((rows, self.n_slots), np.nan, np.float32)
        self.head = -1
        #: The read-only satellite array each row was last written with (None: unknown): a row
        #: rewritten for the same satellites needs no clearing.
        self._row_sats: list[npt.NDArray[np.intp] | None] = [None] * rows
        #: The read-only (satellites, arc ids) of the last :meth:`lag_push` (None: unknown).
        self._last_push: tuple[npt.NDArray[np.intp], npt.NDArray[np.int32]] | None = None

    def loaded(self) -> None:
        """Call after writing ``t``, ``value``, ``last_arc`` or ``arc_t0`` from outside."""
        self._row_sats = [None] * self.rows
        self._last_push = None
        t0 = self.arc_t0[~np.isnan(self.arc_t0)]
        self.t0_max = float(t0.max()) if t0.size else -math.inf

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
        started = self.last_arc[sats] != arc
        self._push(
            t, sats, value, arc, started=started, any_started=bool(np.count_nonzero(started))
        )
        self._last_push = None

    def _push(
        self, t: float, sats: npt.NDArray[np.intp], value: F64, arc: npt.NDArray[np.int32], *,
        started: npt.NDArray[np.bool_] | None, any_started: bool,
    ) -> None:  # fmt: skip
        self.head = row = (self.head + 1) % self.t.shape[0]
        self.t[row] = t
        if sats.flags.writeable:
            self.value[row].fill(np.nan)
            self._row_sats[row] = None
        elif self._row_sats[row] is not sats:
            self.value[row].fill(np.nan)
            self._row_sats[row] = sats
        self.value[row].put(sats, value)  # put casts to float32 faster than item assignment
        if any_started:
            assert started is not None
            self.arc_t0[sats[started]] = t
            self.last_arc[sats] = arc
            self.t0_max = max(self.t0_max, t)

    def lag_push(
        self, t: float, sats: npt.NDArray[np.intp], value: F64, arc: npt.NDArray[np.int32],
        interval_s: float,
    ) -> tuple[F64, float]:  # fmt: skip
        """:meth:`lagged` then :meth:`push` of ``value``, sharing their work."""
        assert sats.shape == value.shape == arc.shape, (sats.shape, value.shape, arc.shape)
        last = self._last_push
        started: npt.NDArray[np.bool_] | None = None
        if last is not None and last[0] is sats and last[1] is arc:
            any_started = False  # the same read-only arrays as before: last_arc[sats] == arc
        else:
            started = self.last_arc[sats] != arc
            any_started = bool(np.count_nonzero(started))
        k = self._lag_row(t, interval_s)
        if k < 0:
            v, t_k = np.full(sats.shape, np.nan), math.nan
        else:
            t_k = float(self.t[k])
            v = self.value[k][sats].astype(np.float64)
            if any_started or not t_k >= self.t0_max:
                other = ~(self.arc_t0[sats] <= t_k)
                if started is not None:
                    other |= started
                v[other] = np.nan
        self._push(t, sats, value, arc, started=started, any_started=any_started)
        self._last_push = None if sats.flags.writeable or arc.flags.writeable else (sats, arc)
        return v, t_k

    def _lag_row(self, t: float, interval_s: float) -> int:
        """Row of the stored epoch nearest ``t − lag_s`` within half an interval (−1: none)."""
        target = t - self.lag_s
        tol = 0.5 * interval_s + 1e-3
        k = (self.head + 1 - round(self.lag_s / interval_s)) % self.t.shape[0]
        if not abs(float(self.t[k]) - target) <= tol:
            err = np.abs(self.t - target)
            if not np.isfinite(err).any():
                return -1
            k = int(np.nanargmin(err))
            if err[k] > tol:
                return -1
        return k

    def lagged(
        self, t: float, sats: npt.NDArray[np.intp], arc: npt.NDArray[np.int32], interval_s: float
    ) -> tuple[F64, float]:
        """Values at the stored epoch nearest ``t − lag_s`` (within half a sampling interval),
        NaN where the satellite had no value then or was in another arc (``arc``: the current
        arc ids, before this epoch's push); also that epoch's time (NaN if none). The row where
        regular sampling puts it is tried first."""
        k = self._lag_row(t, interval_s)
        if k < 0:
            return np.full(sats.shape, np.nan), math.nan
        t_k = float(self.t[k])
        v = self.value[k].take(sats).astype(np.float64)
        other = (self.last_arc.take(sats) != arc) | ~(self.arc_t0.take(sats) <= t_k)
        v[other] = np.nan
        return v, t_k


class SlotStd:
    """Standard deviation per satellite over a sliding time window, sampled in fixed time slots.

    Time is cut into slots of ``slot_s``; the first sample of a satellite in a slot is kept.
    Invariant: ``total[s]``, ``total_sq[s]`` and ``count[s]`` (the rows of ``acc``) are the sum,
    sum of squares and count of the values of satellite ``s`` held in the ring, whose entry
    ``n mod R`` holds the (satellites, values) written in slot ``n`` for the last ``R =
    window/slot`` slots up to ``last_slot`` (entries of skipped slots are emptied). Removing an
    entry subtracts exactly what adding it added (value² is recomputed from the kept value, which
    gives the same bits; keeping only the values halves the ring's memory: 300 entries per
    station at the default 1 s slots), and the sums are rebuilt exactly each time the ring wraps,
    so rounding cannot drift.
    """

    def __init__(self, n_slots: int, window_s: float, slot_s: float) -> None:
        self.slot_s = float(slot_s)
        self.n_slots = n_slots
        self.rows = max(2, round(window_s / slot_s))
        empty = (np.zeros(0, np.intp), np.zeros(0))
        self.entries: list[tuple[npt.NDArray[np.intp], F64]] = [empty] * self.rows
        self.acc = np.zeros((3, n_slots))  # total, total_sq, count
        self.last_slot = -1
        self._since_exact = 0
        #: Flat indices into ``acc`` of the three rows of a read-only satellite array.
        self._flat: tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]] | None = None

    @property
    def total(self) -> F64:
        row: F64 = self.acc[0]
        return row

    @property
    def total_sq(self) -> F64:
        row: F64 = self.acc[1]
        return row

    @property
    def count(self) -> F64:
        row: F64 = self.acc[2]
        return row

    def load_entries(self, entries: list[tuple[npt.NDArray[np.intp], F64]]) -> None:
        """Replace the ring entries (restoring a checkpoint; the sums are set separately)."""
        assert len(entries) == self.rows, (len(entries), self.rows)
        self.entries = entries

    def _inc(self, row: int) -> F64:
        """The increments (values, values²) that adding entry ``row`` added."""
        return self._increments(self.entries[row][1])

    @staticmethod
    def _increments(vals: F64) -> F64:
        k = vals.shape[0]
        inc = np.empty(2 * k)
        inc[:k] = vals
        np.multiply(vals, vals, out=inc[k:])
        return inc

    def _flat_index(self, sats: npt.NDArray[np.intp]) -> npt.NDArray[np.intp]:
        flat = self._flat
        if flat is None or flat[0] is not sats:
            fi = np.concatenate((sats, sats + self.n_slots))  # total, total_sq
            self._flat = flat = (sats, fi)
        return flat[1]

    def _drop(self, row: int) -> None:
        sats, vals = self.entries[row]
        if sats.size:
            self.acc[:2, sats] -= self._inc(row).reshape(2, -1)
            self.acc[2, sats] -= 1.0
            self.entries[row] = (sats[:0], vals[:0])

    def _recompute(self) -> None:
        sats = np.concatenate([e[0] for e in self.entries])
        vals = np.concatenate([e[1] for e in self.entries])
        self.acc[0] = np.bincount(sats, vals, self.n_slots)
        self.acc[1] = np.bincount(sats, vals * vals, self.n_slots)
        self.acc[2] = np.bincount(sats, minlength=self.n_slots)

    def push(self, t: float, sats: npt.NDArray[np.intp], value: F64) -> None:
        """Add this epoch's values (NaN ignored; ``sats`` unique) if ``t`` opens a new slot."""
        assert sats.shape == value.shape, (sats.shape, value.shape)
        self._push(t, sats, value)

    def push_std(self, t: float, sats: npt.NDArray[np.intp], value: F64, min_count: int) -> F64:
        """:meth:`push` then :meth:`std` of the same satellites, sharing their work."""
        assert sats.shape == value.shape, (sats.shape, value.shape)
        blk = self._push(t, sats, value)
        if blk is None:
            return self.std(sats, min_count)
        d = sats.shape[0]
        return self._std(blk[:d], blk[d:], self.acc[2][sats], min_count)

    def _push(self, t: float, sats: npt.NDArray[np.intp], value: F64) -> F64 | None:
        """Push; returns the sums and sums of squares of ``sats`` after it (flat, as
        ``_increments``) when they came for free, else None."""
        slot = math.floor(t / self.slot_s)
        if slot <= self.last_slot:
            return None
        first = self.last_slot + 1 if self.last_slot >= 0 else slot
        start = max(first, slot - self.rows + 1)
        row = slot % self.rows
        self._since_exact += slot - first + 1
        self.last_slot = slot
        nan = np.isnan(value)
        if np.count_nonzero(nan):
            fin = ~nan
            s, v = sats[fin], value[fin]
        else:
            s, v = sats, value
        vals = np.array(v)  # a copy: the caller's array may be handed on
        inc = self._increments(vals)
        blk: F64 | None = None
        if start == slot and self.entries[row][0] is s and not s.flags.writeable:
            # The common case: the slot replaces the entry of the same satellites R slots ago
            # (their counts lose one and gain one: unchanged).
            fi = self._flat_index(s)
            flat = self.acc.reshape(-1)
            blk = flat[fi]
            blk -= self._inc(row)
            blk += inc
            flat[fi] = blk
        else:
            for n in range(start, slot + 1):
                self._drop(n % self.rows)
            self.acc[:2, s] += inc.reshape(2, -1)
            self.acc[2, s] += 1.0
        self.entries[row] = (s, vals)
        if self._since_exact >= self.rows:
            self._recompute()
            self._since_exact = 0
            blk = None
        return blk if s is sats else None

    def std(self, sats: npt.NDArray[np.intp], min_count: int) -> F64:
        """Population standard deviation over the window (NaN below ``min_count`` samples)."""
        return self._std(self.total[sats], self.total_sq[sats], self.count[sats], min_count)

    @staticmethod
    def _std(total: F64, total_sq: F64, n: F64, min_count: int) -> F64:
        """:meth:`std` from the sums of the satellites."""
        short = n < np.array(float(min_count))
        any_short = min_count < 1 or np.count_nonzero(short)
        n_safe = np.maximum(n, _ONE) if any_short else n
        mean = total / n_safe
        var = total_sq / n_safe
        mean *= mean
        var -= mean
        out: F64 = np.sqrt(np.maximum(var, _ZERO, out=var), out=var)
        if any_short:
            out[short] = np.nan
        return out
