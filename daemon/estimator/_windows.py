"""Rolling windows over epochs, as ring buffers over a fixed satellite axis (STYLE rules 21–22).

Axes: ``R`` ring rows (epochs or time slots), ``S`` satellite slots (``MAX_SAT_ID``). NaN marks
"no value". Both classes are pure: time comes in as an argument.
"""

# size: ~630 lines: both per-epoch rings (LagRing; SlotStd with its _SumBlock) and their shortcuts
# stay together, each beside the general path it must equal bit for bit (STYLE rule 1).
from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from ._npfast import count_nonzero as _count_nonzero

__all__ = ["LagRing", "SlotStd"]

F64 = npt.NDArray[np.float64]
# Ufuncs on the per-epoch paths take ``out`` positionally (a keyword costs ~250 instructions;
# not np.maximum: deprecated there).

#: Columns of a satellite array in a ring: indices, or a slice when they are consecutive.
_Cols = npt.NDArray[np.intp] | slice
_ZERO = np.array(0.0)
_ONE = np.array(1.0)
#: ``min_count`` values of :meth:`SlotStd.std` as 0-d arrays (see ``_min_count_0d``).
_MIN_COUNTS: dict[int, F64] = {}
#: The satellites of an empty ring entry (shared, read-only).
_NO_SATS = np.zeros(0, np.intp)
_NO_SATS.setflags(write=False)


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

    Memory: the values live in ``_data`` (R, columns), one column per satellite slot ever pushed
    (``_col[s]``, −1: none; columns are added, rarely by reallocation, never reassigned), not in
    an (R, ``n_slots``) array: a station sees tens of the ``n_slots`` satellites (33 × 700 float32
    = 90 KiB at the default 30 s lag and 1 Hz, ~6 KiB in columns). ``value`` is the full-width
    view, built on demand (checkpoints, tests); writes into it take effect at :meth:`loaded`.
    """

    def __init__(self, n_slots: int, lag_s: float, rows: int | None = None) -> None:
        self.lag_s = float(lag_s)
        self.n_slots = n_slots
        self.last_arc = np.full(n_slots, -1, np.int32)
        self.arc_t0 = np.full(n_slots, np.nan)
        #: Latest arc start pushed (s): rows at or after it belong to every satellite's arc.
        self.t0_max = -math.inf
        #: (sampling interval, tolerance, rows back) of :meth:`_lag_row` (NaN: none yet).
        self._steps: tuple[float, float, int] = (math.nan, 0.0, 0)
        self._alloc(rows if rows is not None else self._rows_needed(1.0))

    def _rows_needed(self, interval_s: float) -> int:
        """Rows that hold ``lag_s`` plus two samples at sampling ``interval_s``."""
        return math.ceil(self.lag_s / max(interval_s, 1e-3)) + 3

    def _alloc(self, rows: int) -> None:
        """An empty ring of ``rows`` rows (no value, no column)."""
        self.t = np.full(rows, np.nan)
        #: A lower bound of the times in ``t`` (+inf: none): no row is within the tolerance of
        #: a lag target further than that before it (the ring is filling), no search needed.
        self._t_low = math.inf
        self._col = np.full(self.n_slots, -1, np.intp)
        self._slots: list[int] = []  # the slot of each column
        self._data = np.full((rows, 0), np.nan, np.float32)
        #: The full-width ``value`` handed out since the last push (None: not built).
        self._full: npt.NDArray[np.float32] | None = None
        self._forget()
        self.head = -1

    def _forget(self) -> None:
        rows = self.t.shape[0]
        #: The read-only satellite array each row was last written with (None: unknown): a row
        #: rewritten for the same satellites needs no clearing.
        self._row_sats: list[npt.NDArray[np.intp] | None] = [None] * rows
        #: The read-only (satellites, arc ids) of the last :meth:`lag_push` (None: unknown).
        self._last_push: tuple[npt.NDArray[np.intp], npt.NDArray[np.int32]] | None = None
        #: The columns of the last read-only satellite array: (satellites, columns).
        self._cols_of: tuple[npt.NDArray[np.intp], _Cols] | None = None

    @property
    def value(self) -> npt.NDArray[np.float32]:
        """(R, ``n_slots``) values, NaN where none (a copy of the column store, built on demand;
        write into it, then call :meth:`loaded`, to change the ring)."""
        if self._full is None:
            full = np.full((self.rows, self.n_slots), np.nan, np.float32)
            full[:, self._slots] = self._data[:, : len(self._slots)]
            self._full = full
        return self._full

    def loaded(self) -> None:
        """Call after writing ``t``, ``value``, ``last_arc`` or ``arc_t0`` from outside."""
        full = self._full
        if full is not None:  # take the values back: one column per satellite holding one
            slots = np.flatnonzero(~np.isnan(full).all(axis=0))
            self._col = np.full(self.n_slots, -1, np.intp)
            self._col[slots] = np.arange(slots.shape[0])
            self._slots = slots.tolist()
            self._data = np.ascontiguousarray(full[:, slots])
            self._full = None
        self._forget()
        self._t_low = _lowest(self.t)
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
        old = self.rows
        t = np.full(need, np.nan)
        data = np.full((need, self._data.shape[1]), np.nan, np.float32)
        t[:old], data[:old] = self.t[order], self._data[order]
        self.t, self._data, self._full = t, data, None
        self._t_low = _lowest(t)
        self._forget()
        self.head = old - 1

    def _cols(self, sats: npt.NDArray[np.intp]) -> _Cols:
        """Columns of ``sats`` (unique), adding columns for satellites not seen before; a slice
        when they are consecutive (known for a read-only ``sats``: a view, not a gather)."""
        memo = self._cols_of
        if memo is not None and memo[0] is sats:
            return memo[1]
        cols = self._col[sats]
        if _count_nonzero(cols < 0):
            new = sats[cols < 0]
            first = len(self._slots)
            self._col[new] = np.arange(first, first + new.shape[0])
            self._slots.extend(new.tolist())
            if len(self._slots) > self._data.shape[1]:
                # a few spare columns: satellites rise a few at a time
                grown = np.full((self.rows, len(self._slots) + 8), np.nan, np.float32)
                grown[:, :first] = self._data[:, :first]
                self._data = grown
            cols = self._col[sats]
        if not sats.flags.writeable:
            n = cols.shape[0]
            if n and cols[-1] - cols[0] == n - 1 and _count_nonzero(np.diff(cols) == 1) == n - 1:
                self._cols_of = (sats, slice(int(cols[0]), int(cols[0]) + n))
            else:
                self._cols_of = (sats, cols)
            return self._cols_of[1]
        return cols

    def push(
        self, t: float, sats: npt.NDArray[np.intp], value: F64, arc: npt.NDArray[np.int32]
    ) -> None:
        assert sats.shape == value.shape == arc.shape, (sats.shape, value.shape, arc.shape)
        started = self.last_arc[sats] != arc
        self._push(t, sats, value, arc, started=started, any_started=bool(_count_nonzero(started)))
        self._last_push = None

    def _push(
        self, t: float, sats: npt.NDArray[np.intp], value: F64, arc: npt.NDArray[np.int32], *,
        started: npt.NDArray[np.bool_] | None, any_started: bool, cols: _Cols | None = None,
    ) -> None:  # fmt: skip
        """Write the next row (``cols``: ``_cols(sats)`` when the caller has them)."""
        self.head = row = (self.head + 1) % self.t.shape[0]
        self.t[row] = t
        self._t_low = min(self._t_low, t)
        self._full = None
        if cols is None:
            cols = self._cols(sats)
        data = self._data[row]
        if sats.flags.writeable:
            data.fill(np.nan)
            self._row_sats[row] = None
        elif self._row_sats[row] is not sats:
            data.fill(np.nan)
            self._row_sats[row] = sats
        if type(cols) is slice:
            data[cols] = value
        else:
            data.put(cols, value)  # put casts to float32 faster than item assignment
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
            memo = self._cols_of
            if memo is not None and memo[0] is sats:
                # The common case, as below with its calls inlined: no arc started since the
                # lag row (t_k ≥ t0_max), columns known, ``sats`` and ``arc`` read-only (they
                # were when ``_last_push`` kept them), ``_last_push`` unchanged.
                k, t_k = self._lag_row(t, interval_s)
                if k >= 0 and t_k >= self.t0_max:
                    known = memo[1]
                    data = self._data
                    v = data[k][known].astype(np.float64)
                    self.head = row = (self.head + 1) % self.t.shape[0]
                    self.t[row] = t
                    self._t_low = min(self._t_low, t)
                    self._full = None
                    drow = data[row]
                    if self._row_sats[row] is not sats:
                        drow.fill(np.nan)
                        self._row_sats[row] = sats
                    if type(known) is slice:
                        drow[known] = value
                    else:
                        drow.put(known, value)
                    return v, t_k
        else:
            started = self.last_arc[sats] != arc
            any_started = bool(_count_nonzero(started))
        k, t_k = self._lag_row(t, interval_s)
        cols = None
        if k < 0:
            v = np.empty(sats.shape[0])  # np.full(sats.shape, nan) without its Python wrapper
            v.fill(np.nan)
        else:
            cols = self._cols(sats)  # first: it may widen ``_data``
            v = self._data[k][cols].astype(np.float64)
            if any_started or not t_k >= self.t0_max:
                other = ~(self.arc_t0[sats] <= t_k)
                if started is not None:
                    other |= started
                v[other] = np.nan
        self._push(t, sats, value, arc, started=started, any_started=any_started, cols=cols)
        self._last_push = None if sats.flags.writeable or arc.flags.writeable else (sats, arc)
        return v, t_k

    def _lag_row(self, t: float, interval_s: float) -> tuple[int, float]:
        """Row of the stored epoch nearest ``t − lag_s`` within half an interval, and its time
        ((−1, NaN): none)."""
        target = t - self.lag_s
        steps = self._steps
        if steps[0] != interval_s:  # the tolerance and the rows back, per sampling interval
            self._steps = steps = (
                interval_s,
                0.5 * interval_s + 1e-3,
                round(self.lag_s / interval_s),
            )
        tol = steps[1]
        k = (self.head + 1 - steps[2]) % self.t.shape[0]
        t_k: float = self.t.item(k)
        if not abs(t_k - target) <= tol:
            if self._t_low - target > tol:  # so is every row's |t − target|: the ring is filling
                return -1, math.nan
            err = np.abs(self.t - target)
            if not np.isfinite(err).any():
                return -1, math.nan
            k = int(np.nanargmin(err))
            if err[k] > tol:
                return -1, math.nan
            t_k = float(self.t[k])
        return k, t_k

    def lagged(
        self, t: float, sats: npt.NDArray[np.intp], arc: npt.NDArray[np.int32], interval_s: float
    ) -> tuple[F64, float]:
        """Values at the stored epoch nearest ``t − lag_s`` (within half a sampling interval),
        NaN where the satellite had no value then or was in another arc (``arc``: the current
        arc ids, before this epoch's push); also that epoch's time (NaN if none). The row where
        regular sampling puts it is tried first."""
        k, t_k = self._lag_row(t, interval_s)
        if k < 0:
            return np.full(sats.shape, np.nan), math.nan
        cols = self._cols(sats)  # first: it may widen ``_data``
        v = self._data[k][cols].astype(np.float64)
        other = (self.last_arc.take(sats) != arc) | ~(self.arc_t0.take(sats) <= t_k)
        v[other] = np.nan
        return v, t_k


def _min_count_0d(min_count: int) -> F64:
    """``min_count`` as a 0-d float array (made once per value)."""
    arr = _MIN_COUNTS.get(min_count)
    if arr is None:
        if len(_MIN_COUNTS) >= 8:
            _MIN_COUNTS.clear()
        _MIN_COUNTS[min_count] = arr = np.array(float(min_count))
    return arr


def _lowest(t: F64) -> float:
    """The smallest non-NaN value of ``t`` (+inf: none)."""
    known = t[~np.isnan(t)]
    return float(known.min()) if known.size else math.inf


class SlotStd:
    """Standard deviation per satellite over a sliding time window, sampled in fixed time slots.

    Time is cut into slots of ``slot_s``; the first sample of a satellite in a slot is kept.
    Invariant: ``total[s]``, ``total_sq[s]`` and ``count[s]`` (the rows of ``acc``) are the sum,
    sum of squares and count of the values of satellite ``s`` held in the ring, whose entry
    ``n mod R`` holds the (satellites, values) written in slot ``n`` for the last ``R =
    window/slot`` slots up to ``last_slot`` (entries of skipped slots are emptied). Removing an
    entry subtracts exactly what adding it added (value² is recomputed from the kept value, which
    gives the same bits), and the sums are rebuilt exactly each time the ring wraps, so rounding
    cannot drift.

    Memory (300 entries per station at the default 1 s slots): entry ``r`` is the satellite
    array ``_sats[r]`` (the caller's read-only array, shared, not copied) and the first
    ``len(_sats[r])`` values of row ``r`` of one (R, widest entry) float64 pool, which grows
    (rarely, by reallocation) when an epoch has more satellites: no numpy array or tuple per
    entry (~150 B of object overhead each, long-lived small blocks that fragment the heap). A
    satellite without a value (NaN) is held as 0.0 with presence 0.0 in ``_gaps[r]`` (a
    read-only presence shared while the same satellites lack a value; None: all have one):
    adding or removing 0.0 and a count of 0.0 leaves the sums as leaving it out does (x ± 0.0
    is x but for x = −0.0, which no sum is: they start at +0.0, and in round-to-nearest s + v
    or s − v is −0.0 only when s is).

    While the same read-only satellite array is pushed slot after slot, its three sums live in
    a dense block (``_SumBlock``) updated in place, also when the entry leaving is of another
    array (an old layout's: the block is widened once by its satellites missing from it), and
    are written back into ``acc`` when anything else reads or changes it (``acc`` is a
    property).
    """

    def __init__(self, n_slots: int, window_s: float, slot_s: float) -> None:
        self.slot_s = float(slot_s)
        self.n_slots = n_slots
        self.rows = max(2, round(window_s / slot_s))
        self._sats: list[npt.NDArray[np.intp]] = [_NO_SATS] * self.rows
        #: Per entry: None when every satellite has a value, else its read-only presence (1.0
        #: value, 0.0 NaN; its value in the pool is then 0.0), shared by consecutive entries.
        self._gaps: list[F64 | None] = [None] * self.rows
        self._vals: F64 = np.zeros((self.rows, 0))
        self._acc = np.zeros((3, n_slots))  # total, total_sq, count
        #: The sums of the satellites pushed last, while they repeat (None: all in ``_acc``).
        self._blk: _SumBlock | None = None
        self.last_slot = -1
        self._since_exact = 0
        #: The last slot whose push added a value (−inf: none; +inf: unknown, after
        #: :meth:`load_entries`): the ring holds no value once it is ``rows`` slots old.
        self._value_slot = -math.inf
        #: The ring holds no value (known at the all-NaN pushes only; False: not known).
        self._empty = False
        #: Flat indices into ``acc`` of all three rows of the last few read-only satellite
        #: arrays (the entry dropped and the one added are often of two layouts), newest last.
        self._flat3: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]] = []
        #: Work buffers of ``_increments3`` by length.
        self._inc3: dict[int, F64] = {}
        #: Work buffers of ``_increments3`` with a presence row, by length.
        self._inc3p: dict[int, F64] = {}
        #: The last presence made: (the caller's read-only array, NaN mask bytes, presence).
        self._presence_of: tuple[npt.NDArray[np.intp], bytes, F64] | None = None
        #: Where the entries of other read-only satellite arrays sit in the block's (the last
        #: few pairs): (entry's satellites, block's satellites, ``_Placement``), newest last.
        self._places: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.intp], _Placement]] = []

    @property
    def acc(self) -> F64:
        """(3, ``n_slots``) total, total_sq and count per satellite slot (writing into it is
        allowed)."""
        return self._flush()

    def _flush(self) -> F64:
        """Write the block back into ``_acc`` and drop it (a write into ``acc`` would outdate it,
        the next push of the same satellites gathers it again); returns ``_acc``."""
        blk = self._blk
        if blk is not None:
            self._acc[:, blk.cols] = blk.sums
            self._blk = None
        return self._acc

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

    @property
    def entries(self) -> list[tuple[npt.NDArray[np.intp], F64]]:
        """The ring entries as (satellites, values) in row order (values are views: copy them
        to keep them past the next push); the satellites without a value are left out, those of
        entries sharing a presence share one read-only array."""
        out: list[tuple[npt.NDArray[np.intp], F64]] = []
        subsets: dict[tuple[int, int], npt.NDArray[np.intp]] = {}
        for r, s in enumerate(self._sats):
            v = self._vals[r, : s.shape[0]]
            pres = self._gaps[r]
            if pres is None:
                out.append((s, v))
                continue
            fin = pres > _ZERO
            sub = subsets.get((id(s), id(pres)))
            if sub is None:
                subsets[id(s), id(pres)] = sub = s[fin]
                sub.setflags(write=False)
            out.append((sub, v[fin]))
        return out

    def load_entries(self, entries: list[tuple[npt.NDArray[np.intp], F64]]) -> None:
        """Replace the ring entries (restoring a checkpoint; the sums are set separately)."""
        assert len(entries) == self.rows, (len(entries), self.rows)
        assert all(s.shape == v.shape for s, v in entries)
        width = max(s.shape[0] for s, _ in entries)
        vals = np.zeros((self.rows, max(width, self._vals.shape[1])))
        for r, (s, v) in enumerate(entries):
            vals[r, : s.shape[0]] = v
        self._vals = vals
        self._sats = [s if s.shape[0] else _NO_SATS for s, _ in entries]
        self._gaps = [None] * self.rows
        self._value_slot = math.inf
        self._empty = False
        self._flush()

    def _flat3_index(self, sats: npt.NDArray[np.intp]) -> npt.NDArray[np.intp]:
        """Flat indices into ``acc`` of the total, total_sq and count of ``sats`` (as
        ``_increments3`` orders them), kept for the last few read-only arrays."""
        for known, fi in self._flat3:
            if known is sats:
                return fi
        n = self.n_slots
        fi = np.concatenate((sats, sats + n, sats + 2 * n))
        if not sats.flags.writeable:
            if len(self._flat3) >= 4:
                del self._flat3[0]
            self._flat3.append((sats, fi))
        return fi

    def _increments3(self, vals: F64, pres: F64 | None = None) -> F64:
        """What adding the values ``vals`` adds to total, total_sq and count: (values,
        values², ones or the presence ``pres``), in a work buffer per length (its ones written
        once; valid until the next call)."""
        k = vals.shape[0]
        bufs = self._inc3 if pres is None else self._inc3p
        inc = bufs.get(k)
        if inc is None:
            if len(bufs) >= 8:
                bufs.clear()
            bufs[k] = inc = np.ones(3 * k)
        if pres is not None:
            inc[2 * k :] = pres
        inc[:k] = vals
        np.multiply(vals, vals, out=inc[k : 2 * k])
        return inc

    def _placement(self, sats: npt.NDArray[np.intp], into: npt.NDArray[np.intp]) -> _Placement:
        """Where the read-only ``sats`` sit among a block's columns ``into``, kept for the last
        few pairs (an old layout's entries leave for R slots after a layout change)."""
        for known, blk_sats, place in self._places:
            if known is sats and blk_sats is into:
                return place
        place = _Placement(sats, into, self.n_slots)
        if len(self._places) >= 4:
            del self._places[0]
        self._places.append((sats, into, place))
        return place

    def _drop_placed(
        self, blk: _SumBlock, sats: npt.NDArray[np.intp], vals: F64, pres: F64 | None
    ) -> _SumBlock:
        """Drop the entry (``sats``, ``vals``, presence ``pres``) of other satellites than the
        block's in the block (``_drop``'s operations; 0 for its columns not in ``sats``: x − 0
        is x), first widening it by those of ``sats`` it lacks (once per old layout); returns
        the block."""
        place = self._placement(sats, blk.cols)
        if place.outside is not None:
            cols = np.concatenate((blk.cols, sats[place.outside]))
            self._blk = blk = _SumBlock(blk.sats, self._flush()[:, cols], cols)
            place = self._placement(sats, cols)
        blk.sub_placed(place, vals, pres)
        return blk

    def _drop(self, row: int) -> None:
        # One gather, subtraction and scatter of the three rows (the same element operations
        # as row by row: total − v, total_sq − v², count − 1; − 0 where a value is missing).
        sats = self._sats[row]
        if sats.size:
            flat = self.acc.reshape(-1)
            inc = self._increments3(self._vals[row, : sats.shape[0]], self._gaps[row])
            flat[self._flat3_index(sats)] -= inc
            self._sats[row] = _NO_SATS
            self._gaps[row] = None

    def _recompute(self) -> None:
        sats = np.concatenate(self._sats)
        # The entries' values in row order (0.0 where one is missing): the first len(_sats[r])
        # of each pool row (one boolean gather, not one view per entry).
        n = np.fromiter((e.shape[0] for e in self._sats), np.intp, self.rows)
        vals = self._vals[np.arange(self._vals.shape[1]) < n[:, None]]
        self.acc[0] = np.bincount(sats, vals, self.n_slots)  # (+ 0.0 where a value is missing)
        self.acc[1] = np.bincount(sats, vals * vals, self.n_slots)
        if all(p is None for p in self._gaps):
            self.acc[2] = np.bincount(sats, minlength=self.n_slots)
        else:
            # The presence weights: 1.0 for each value of an entry without gaps, its presence
            # row otherwise (the same weights as one 1.0 array per entry joined, written once).
            pres = np.ones(sats.shape[0])
            ends = np.cumsum(n).tolist()
            for r, p in enumerate(self._gaps):
                if p is not None:
                    pres[ends[r] - int(n[r]) : ends[r]] = p
            self.acc[2] = np.bincount(sats, pres, self.n_slots)

    def _presence(self, sats: npt.NDArray[np.intp], nan: npt.NDArray[np.bool_]) -> F64:
        """1.0 where a value is, 0.0 at ``nan``, read-only; the same object as last time for the
        same (read-only) ``sats`` and mask: entries of consecutive slots share it."""
        key = nan.tobytes()
        last = self._presence_of
        if last is not None and last[0] is sats and last[1] == key:
            return last[2]
        pres = np.logical_not(nan).astype(np.float64)
        pres.setflags(write=False)
        if not sats.flags.writeable:
            self._presence_of = (sats, key, pres)
        return pres

    def push(self, t: float, sats: npt.NDArray[np.intp], value: F64) -> None:
        """Add this epoch's values (NaN ignored; ``sats`` unique) if ``t`` opens a new slot."""
        assert sats.shape == value.shape, (sats.shape, value.shape)
        self._push(t, sats, value)

    def push_std(self, t: float, sats: npt.NDArray[np.intp], value: F64, min_count: int) -> F64:
        """:meth:`push` then :meth:`std` of the same satellites, sharing their work."""
        assert sats.shape == value.shape, (sats.shape, value.shape)
        self._push(t, sats, value)
        blk = self._blk
        if blk is None or blk.sats is not sats:
            if self._empty and min_count >= 1:
                # No value in the ring (the ROT lag is filling): every count is 0, below
                # min_count, so :meth:`std` gives NaN for each satellite.
                out = np.empty(sats.shape[0])
                out.fill(np.nan)
                return out
            return self.std(sats, min_count)
        return blk.std(min_count)

    def _push(self, t: float, sats: npt.NDArray[np.intp], value: F64) -> None:
        slot = math.floor(t / self.slot_s)
        if slot <= self.last_slot:
            return
        first = self.last_slot + 1 if self.last_slot >= 0 else slot
        start = max(first, slot - self.rows + 1)
        row = slot % self.rows
        self._since_exact += slot - first + 1
        self.last_slot = slot
        nan = np.isnan(value)
        n_nan = _count_nonzero(nan)
        if n_nan == value.shape[0]:
            # No value (the ROT lag is still filling): the entries of the slots up to this one
            # are emptied, and nothing is added (the general path below adds nothing either).
            for n in range(start, slot + 1):
                self._drop(n % self.rows)
            self._sats[row] = _NO_SATS
            self._gaps[row] = None
            self._empty = self._value_slot <= slot - self.rows
            if self._since_exact >= self.rows:
                self._blk = None  # rebuilt below
                self._recompute()
                self._since_exact = 0
            return
        # An entry holds every satellite pushed; a NaN is held as 0.0 with presence 0.0 (sums
        # ± 0.0 and counts ± 0.0 are unchanged: what leaving the satellite out gives).
        pres = None
        v = value
        if n_nan:
            pres = self._presence(sats, nan)
            v = np.where(nan, _ZERO, value)
        k = sats.shape[0]
        self._value_slot = slot
        self._empty = False
        if k > self._vals.shape[1]:
            grown = np.zeros((self.rows, k))
            grown[:, : self._vals.shape[1]] = self._vals
            self._vals = grown
        gone = self._sats[row]  # the entry this slot replaces (R slots ago)
        blk = self._blk
        if (
            start == slot
            and not sats.flags.writeable
            and (gone is sats or not gone.flags.writeable)  # (one flags object, not two)
        ):
            # One entry leaves, one comes, both of read-only satellite arrays: the sums of the
            # caller's satellites are updated in their block, with the same element operations
            # as ``acc`` below (sum − old, count − 1, then sum + value, count + 1).
            if blk is None or blk.sats is not sats:
                self._blk = blk = _SumBlock(sats, self._flush()[:, sats])
            old = self._vals[row, : gone.shape[0]]
            gone_pres = self._gaps[row]
            if gone is sats and pres is None and gone_pres is None:  # the common case
                blk.replace(old, v)  # (counts unchanged; ``old`` becomes ``v``)
            else:
                if gone is sats:
                    blk.sub(old, gone_pres)
                elif gone.shape[0]:
                    blk = self._drop_placed(blk, gone, old, gone_pres)
                if pres is None:
                    blk.add(v)
                else:
                    blk.add_gaps(v, pres)
                self._vals[row, :k] = v
        else:
            for n in range(start, slot + 1):
                self._drop(n % self.rows)
            flat = self.acc.reshape(-1)
            flat[self._flat3_index(sats)] += self._increments3(v, pres)  # total, sq, count
            self._vals[row, :k] = v
        self._sats[row] = sats
        self._gaps[row] = pres
        if self._since_exact >= self.rows:
            self._blk = None  # rebuilt below
            self._recompute()
            self._since_exact = 0

    def std(self, sats: npt.NDArray[np.intp], min_count: int) -> F64:
        """Population standard deviation over the window (NaN below ``min_count`` samples)."""
        sums = self.acc.reshape(-1).take(self._flat3_index(sats))  # the three rows, one gather
        k = sats.shape[0]
        return self._std(sums[:k], sums[k : 2 * k], sums[2 * k :], min_count)

    @staticmethod
    def _std(total: F64, total_sq: F64, n: F64, min_count: int) -> F64:
        """:meth:`std` from the sums of the satellites."""
        short = n < _min_count_0d(min_count)
        any_short = min_count < 1 or _count_nonzero(short)
        n_safe = np.maximum(n, _ONE) if any_short else n
        mean = total / n_safe
        var = total_sq / n_safe
        mean *= mean
        var -= mean
        out: F64 = np.sqrt(np.maximum(var, _ZERO, out=var), out=var)
        if any_short:
            out[short] = np.nan
        return out


class _SumBlock:
    """The sums (total, total_sq, count) of one read-only satellite array ``sats`` as a dense
    (3, d) block, with the work buffers of its updates. Copies and pickles rebuild the views.

    ``cols`` (D ≥ d): ``sats`` then the satellites of entries still in the ring that are not in
    ``sats`` (an old layout's, for R slots after a change): ``sums`` is (3, D), the entries
    leaving are dropped from its full rows, the block's own figures are its first d columns.
    """

    __slots__ = ("all_count", "all_sq", "all_total", "cols", "count", "min_count", "n_div", "pair",
                 "placed", "q", "q_mean", "q_var", "sats", "short", "sq", "sq_all", "sums",
                 "total", "total_sq")  # fmt: skip

    def __init__(
        self, sats: npt.NDArray[np.intp], sums: F64, cols: npt.NDArray[np.intp] | None = None
    ) -> None:
        d = sats.shape[0]
        self.sats = sats
        self.cols = sats if cols is None else cols
        self.sums = sums
        self.all_total, self.all_sq, self.all_count = sums[0], sums[1], sums[2]
        self.total, self.total_sq, self.count = sums[0, :d], sums[1, :d], sums[2, :d]
        self.pair = sums[:2, :d]  # total, total_sq
        self.sq = np.empty(d)
        width = self.cols.shape[0]
        self.sq_all = np.empty(width)
        self.placed = np.empty(width)  # an entry's values in column order, 0 elsewhere
        self.q = np.empty((2, sats.shape[0]))
        self.q_mean, self.q_var = self.q[0], self.q[1]
        #: ``min_count`` the rows below were made for (−1: redo them; the counts change only in
        #: :meth:`add`, and only up).
        self.min_count = -1
        self.short: npt.NDArray[np.bool_] | None = None
        self.n_div = self.count

    def __reduce__(
        self,
    ) -> tuple[type[_SumBlock], tuple[npt.NDArray[np.intp], F64, npt.NDArray[np.intp]]]:
        return (_SumBlock, (self.sats, self.sums, self.cols))

    def replace(self, old: F64, new: F64) -> None:
        """Replace the values ``old`` by ``new`` in the sums (``old`` is overwritten by ``new``):
        the same operations as :meth:`SlotStd._push` on ``acc`` (sum − old + new)."""
        self.total -= old
        sq = np.multiply(old, old, self.sq)
        self.total_sq -= sq
        old[...] = new
        self.total += new
        np.multiply(new, new, sq)
        self.total_sq += sq

    def add(self, new: F64) -> None:
        """Add the values ``new`` to the sums: the same operations as :meth:`SlotStd._push` on
        ``acc`` (sum + value, count + 1). The counts grow (after a :meth:`sub` or
        :meth:`sub_placed` too: each lost one at most): :meth:`std` redoes its rows unless no
        count was short (none becomes short, and ``n_div`` is then ``count`` itself)."""
        self.total += new
        sq = np.multiply(new, new, self.sq)
        self.total_sq += sq
        self.count += _ONE
        if self.short is not None:
            self.min_count = -1

    def add_gaps(self, new: F64, pres: F64) -> None:
        """:meth:`add` of values some of which are missing (0.0, presence ``pres`` 0.0 there:
        count + presence). The counts may fall after a :meth:`sub`: :meth:`std` redoes its
        rows."""
        self.total += new
        sq = np.multiply(new, new, self.sq)
        self.total_sq += sq
        self.count += pres
        self.min_count = -1

    def sub(self, old: F64, pres: F64 | None) -> None:
        """Drop the values ``old`` (presence ``pres``, None: all) of the block's satellites from
        the sums (sum − value, count − 1 or − presence); :meth:`add` follows."""
        self.total -= old
        sq = np.multiply(old, old, self.sq)
        self.total_sq -= sq
        self.count -= _ONE if pres is None else pres

    def _place(self, place: _Placement, vals: F64) -> F64:
        """``vals`` (of ``place``'s satellites) in column order, 0 where the column's satellite
        has none."""
        placed = self.placed
        if place.partial:
            placed.fill(0.0)
        placed.put(place.pos, vals if place.sel is None else vals.take(place.sel))
        return placed

    def sub_placed(self, place: _Placement, vals: F64, pres: F64 | None) -> None:
        """Drop an entry of other satellites (``place``: all among ``cols``; presence ``pres``,
        None: all) from their sums (sum − value, count − 1 or − presence; the other columns
        − 0: unchanged); :meth:`add` follows."""
        placed = self._place(place, vals)
        self.all_total -= placed
        sq = np.multiply(placed, placed, self.sq_all)
        self.all_sq -= sq
        self.all_count -= place.present if pres is None else self._place(place, pres)

    def std(self, min_count: int) -> F64:
        """:meth:`SlotStd.std` of the block's satellites (the same operations as ``_std``)."""
        if min_count != self.min_count:
            short = self.count < _min_count_0d(min_count)
            any_short = min_count < 1 or _count_nonzero(short)
            self.short = short if any_short else None
            self.n_div = np.maximum(self.count, _ONE) if any_short else self.count
            self.min_count = min_count
        np.divide(self.pair, self.n_div, self.q)
        mean, var = self.q_mean, self.q_var
        mean *= mean
        var -= mean
        out: F64 = np.sqrt(np.maximum(var, _ZERO, out=var))
        if self.short is not None:
            out[self.short] = np.nan
        return out


class _Placement:
    """Where the satellites of an entry sit among a block's (both unique): ``pos`` the block
    positions of those in the block, ``sel`` their indices in the entry (None: all of them, in
    order), ``present`` 1.0 at ``pos`` and 0.0 elsewhere (d,), ``partial``: some block position
    is not in ``pos``; ``outside`` the entry's indices of the satellites outside the block
    (None: none)."""

    __slots__ = ("outside", "partial", "pos", "present", "sel")

    def __init__(
        self, sats: npt.NDArray[np.intp], into: npt.NDArray[np.intp], n_slots: int
    ) -> None:
        lut = np.full(n_slots, -1, np.intp)
        lut[into] = np.arange(into.shape[0])
        where = lut[sats]
        inside = where >= 0
        self.pos = where[inside]  # (writeable: ``put`` copies a read-only index array)
        self.sel = None if inside.all() else np.flatnonzero(inside)
        self.present = np.zeros(into.shape[0])
        self.present[self.pos] = 1.0
        self.partial = self.pos.shape[0] < into.shape[0]
        self.outside = None if self.sel is None else np.flatnonzero(~inside)
