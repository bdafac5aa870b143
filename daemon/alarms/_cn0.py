"""A station's own C/N0-versus-elevation baseline per band, and today's drop against it.

Interference on one band lowers C/N0 on every satellite of that band at once, relative to what the
station normally sees at that elevation (SCIENCE.md §8, common practice). Axes: cells ``n``
(satellite × signal) of one epoch; baseline ``(K, B)`` with band key ``k = system_index·10 + band``
(K = 70, RINEX system order GRECJSI, band digit 0–9) and elevation bin ``b = ⌊el / bin_deg⌋``.

The baseline is an exponential moving mean per (band, bin) with time constant ``time_constant_s``
(a plain running mean until a bin has ``min_samples`` epochs). A bin counts only once warmed up.
Learning is frozen for a band while its alarm is active or pending, so interference does not
become the new normal. Everything is vectorised over cells (STYLE rule 21).
"""

# size: ~550 lines: the C/N0 baseline's learning and its drop test share the binned
# cells and their caches (layout, bins and their elevation bounds, warm/cold bookkeeping).
from __future__ import annotations

import functools
import math
import sys
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import numpy.typing as npt

__all__ = ["BAND_NAMES", "N_BAND_KEYS", "Cn0Baseline", "Cn0Cells", "band_key", "band_label"]

N_BAND_KEYS = 70
# 0-d operands: numpy takes them faster than Python scalars, with the same results (each is
# exact in the other operand's type).
_ZERO = np.zeros((), np.float64)
_INF = np.full((), np.inf)
_ZERO_F32 = np.zeros((), np.float32)
_INF_F32 = np.full((), np.inf, np.float32)
_ONE = np.ones((), np.float64)
_ONE_I64 = np.ones((), np.int64)
_NO_DROP = np.full(N_BAND_KEYS, np.nan)
_SYSTEMS = "GRECJSI"
#: Human band names by (system letter, RINEX band digit) — RINEX 3.05 §5.1 Table 4–10 band numbers.
BAND_NAMES: dict[str, str] = {
    "G1": "GPS L1", "G2": "GPS L2", "G5": "GPS L5",
    "R1": "GLONASS G1", "R2": "GLONASS G2", "R3": "GLONASS G3", "R4": "GLONASS G1a", "R6": "GLONASS G2a",
    "E1": "Galileo E1", "E5": "Galileo E5a", "E7": "Galileo E5b", "E8": "Galileo E5", "E6": "Galileo E6",
    "C2": "BeiDou B1I", "C1": "BeiDou B1C", "C5": "BeiDou B2a", "C7": "BeiDou B2I/B2b",
    "C8": "BeiDou B2", "C6": "BeiDou B3I",
    "J1": "QZSS L1", "J2": "QZSS L2", "J5": "QZSS L5", "J6": "QZSS L6",
    "S1": "SBAS L1", "S5": "SBAS L5", "I5": "NavIC L5", "I9": "NavIC S",
}  # fmt: skip


def band_key(sat: npt.NDArray[np.int16], sig: npt.NDArray[np.uint16]) -> npt.NDArray[np.intp]:
    """Band key per cell: system index · 10 + RINEX band digit (packed codes: ``band*32+letter``)."""
    return (sat.astype(np.intp) // 100) * 10 + sig.astype(np.intp) // 32


def band_label(key: int) -> str:
    """ "G2" for key 2, "E5" for key 25."""
    return f"{_SYSTEMS[key // 10]}{key % 10}"


@functools.cache
def _bin_bounds(
    bin_deg: float, n_bins: int
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Per elevation bin ``b``: the bounds ``lo[b] ≤ el < hi[b]`` of the elevations that
    :meth:`Cn0Baseline.cells` takes as usable and puts in bin ``b`` (``min(⌊el / bin_deg⌋,
    n_bins − 1)``, the quotient rounded as numpy's division rounds it), exactly.

    ``lo[b]`` for b ≥ 1 is the least double whose rounded quotient reaches ``b`` (the quotient
    is monotonic in el, so those above it all reach ``b``); ``lo[0]`` is 0 (−0 passes it, as
    in ``el ≥ 0``). The last bin takes every finite elevation above it up to ``2⁶¹ · bin_deg``,
    whose quotients ``astype(intp)`` still truncates (more is absurd: the general path)."""
    lo = [0.0]
    for b in range(1, n_bins):
        x = b * bin_deg
        while x / bin_deg >= b:
            x = math.nextafter(x, -math.inf)
        while x / bin_deg < b:
            x = math.nextafter(x, math.inf)
        lo.append(x)
    top = math.ldexp(bin_deg, 61)
    hi = [*lo[1:], top if math.isfinite(top) else sys.float_info.max]
    bounds = np.array(lo, np.float64), np.array(hi, np.float64)
    for a in bounds:
        a.flags.writeable = False  # shared by every baseline of this bin width
    return bounds


class _Layout:
    """What depends only on the epoch's cell layout (satellite and signal of each cell), and the
    bins of its last epoch whose every cell was usable (``full``), with each cell's elevation
    bounds for them (``bounds``: lo, hi; None until asked): an epoch whose elevations all fall
    within them and whose C/N0 are all usable has those bins again, without binning
    (tests/test_alarms_steady_bins.py)."""

    __slots__ = (
        "all_known", "bounds", "dtypes", "flat0", "full", "key", "known", "ones", "sat", "sig",
    )  # fmt: skip

    def __init__(
        self, sat: npt.NDArray[np.int16], sig: npt.NDArray[np.uint16], n_bins: int
    ) -> None:
        self.dtypes = (sat.dtype, sig.dtype)
        self.sat = sat.tobytes()
        self.sig = sig.tobytes()
        self.key = band_key(sat, sig)
        self.known = (self.key >= 0) & (self.key < N_BAND_KEYS)
        self.all_known = bool(self.known.all())
        self.flat0 = self.key * n_bins
        self.full: _Bins | None = None
        self.bounds: tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]] | None = None
        #: A comparison true for every cell, as bytes (numpy bools are bytes 0/1).
        self.ones = b"\x01" * sat.shape[0]


class _Bins:
    """What depends only on the usable cells' flat indices (equal flat ⇒ equal band keys):
    the bins seen and their cell counts (for learning), the cells per band and whether every
    cell's bin is warm (for the drop). Counts only grow, so "all warm" once True stays True.

    While some bin is cold: which cells are warm, kept until ``warm_until`` learning calls (a
    bin's count grows by at most one per call, so no cold bin can turn warm before), and the
    bands judged on the warm cells with their (float) warm-cell counts."""

    __slots__ = (
        "all_warm",
        "bands",
        "bands_min_cells",
        "base",
        "base_learned",
        "flat",
        "flat_cells",
        "judged",
        "min_cells",
        "n_band",
        "n_seen",
        "n_warm",
        "seen",
        "warm",
        "warm_bands",
        "warm_key",
        "warm_min_cells",
        "warm_until",
    )

    def __init__(self, flat: bytes, flat_cells: npt.NDArray[np.intp]) -> None:
        self.flat = flat
        #: The flat indices themselves (read-only), handed out again by the steady-bins path.
        self.flat_cells = flat_cells
        flat_cells.flags.writeable = False
        self.all_warm = False
        #: The baseline gathered at these bins (``_mean_flat.take(flat)``) after the baseline's
        #: ``base_learned``-th learning call (-1: none), by :meth:`Cn0Baseline.prepare`.
        self.base: npt.NDArray[np.float64] | None = None
        self.base_learned = -1
        self.seen: npt.NDArray[np.intp] | None = None
        self.n_seen: npt.NDArray[np.intp] | None = None
        self.n_band: npt.NDArray[np.intp] | None = None
        #: ``n_band >= min_cells`` for the ``min_cells`` last asked.
        self.judged: npt.NDArray[np.bool_] | None = None
        self.min_cells = -1
        #: The judged band keys (ascending) and their cell counts, for ``bands_min_cells``.
        self.bands: _Bands | None = None
        self.bands_min_cells = -1
        #: The cells in warm bins, their number, valid while the baseline's learning calls are
        #: fewer than ``warm_until`` (0: not judged yet).
        self.warm: npt.NDArray[np.bool_] | None = None
        self.n_warm = 0
        self.warm_until = 0
        #: The bands judged on the warm cells (ascending) and their warm-cell counts, for
        #: ``warm_min_cells``.
        self.warm_bands: _Bands | None = None
        #: Each cell's band key, warm cells only (cold ones: N_BAND_KEYS, no band).
        self.warm_key: npt.NDArray[np.intp] | None = None
        self.warm_min_cells = -1


@dataclass(slots=True)
class Cn0Cells:
    """The usable cells of one epoch: band key, flat (band, elevation bin) index, C/N0 (dB-Hz),
    and what the baseline has cached for these flat indices (read-only for callers)."""

    key: npt.NDArray[np.intp]
    flat: npt.NDArray[np.intp]
    cn0: npt.NDArray[np.float64]
    bins: _Bins


class Cn0Baseline:
    """Per-band, per-elevation-bin C/N0 baseline of one station (mutable state, pure methods).

    Per-epoch shortcuts (results bit for bit those of the general path; tests/test_alarms_fastpaths.py,
    tests/test_alarms_steady_bins.py): band keys are kept while the cell layout repeats; when
    every cell is usable no cell is gathered, and when moreover every elevation stays within
    its bin the bins are not recomputed; while the cells' bins repeat, the bins seen, their
    counts and the cells per band are kept, and the warm test is skipped once every bin is
    warm; :meth:`prepare` gathers the baseline for the next epoch ahead (the engine calls it
    in its deferred step).
    """

    __slots__ = (
        "_bins",
        "_count",
        "_count_flat",
        "_last_t_s",
        "_layout",
        "_mean",
        "_mean_flat",
        "_n_learned",
        "_operands",
        "_weight",
        "bin_deg",
        "min_samples",
        "time_constant_s",
    )

    def __init__(
        self, *, bin_deg: float = 5.0, time_constant_s: float = 3600.0, min_samples: int = 120
    ) -> None:
        self.bin_deg = bin_deg
        self.time_constant_s = time_constant_s
        self.min_samples = min_samples
        n_bins = math.ceil(90.0 / bin_deg)
        # 0 until a bin's first epoch, whose weight is 1 (alpha = 1/(0+1)): the mean is then
        # exactly that epoch's mean; only warmed-up bins are ever read.
        self._mean = np.zeros((N_BAND_KEYS, n_bins))
        self._count = np.zeros((N_BAND_KEYS, n_bins), np.int64)
        self._mean_flat = self._mean.reshape(-1)  # views: writes go to _mean / _count
        self._count_flat = self._count.reshape(-1)
        self._last_t_s: float | None = None
        #: learn_cells calls so far: no bin's count is above it (each call adds at most one).
        self._n_learned = 0
        self._layout: _Layout | None = None
        self._bins: _Bins | None = None
        # 0-d operands: bin width, last bin, min_samples; the time-constant weight and its dt.
        self._operands = (
            np.full((), bin_deg, np.float64),
            np.full((), n_bins - 1, np.intp),
            np.full((), min_samples, np.int64),
        )
        self._weight: tuple[float, npt.NDArray[np.float64]] = (math.nan, _ONE)

    def cells(
        self,
        sat: npt.NDArray[np.int16],
        sig: npt.NDArray[np.uint16],
        el_deg: npt.NDArray[np.float64],
        cn0_dbhz: npt.NDArray[np.float32],
    ) -> Cn0Cells:
        """The usable cells of one epoch (finite elevation ≥ 0, finite C/N0 > 0, a known band),
        indexed once for both :meth:`drop_db_cells` and :meth:`learn_cells`."""
        assert sat.shape == sig.shape == el_deg.shape == cn0_dbhz.shape
        n_bins = self._mean.shape[1]
        lay = self._layout
        if (
            lay is None
            or lay.sat != sat.tobytes()
            or lay.sig != sig.tobytes()
            or lay.dtypes[0] is not sat.dtype
            or lay.dtypes[1] is not sig.dtype
        ):
            lay = self._layout = _Layout(sat, sig, n_bins)
        full = lay.full
        if full is not None:
            # Steady bins: every elevation within its cell's bounds for the layout's last bins
            # (finite and ≥ 0 with them) and every C/N0 usable give those bins again, bit for bit.
            lo, hi = lay.bounds or self._bounds(lay, full)
            ones = lay.ones
            if (
                np.greater_equal(el_deg, lo).tobytes() == ones
                and np.less(el_deg, hi).tobytes() == ones
                and np.greater(cn0_dbhz, _ZERO_F32).tobytes() == ones
                and np.less(cn0_dbhz, _INF_F32).tobytes() == ones
            ):
                self._bins = full
                return Cn0Cells(lay.key, full.flat_cells, cn0_dbhz.astype(np.float64), full)
        bin_deg, last_bin, _ = self._operands
        # Comparisons with NaN are False (no warning): NaN and ±∞ fail one bound each.
        ok = np.greater_equal(el_deg, _ZERO)
        ok &= np.less(el_deg, _INF)
        ok &= np.greater(cn0_dbhz, _ZERO_F32)
        ok &= np.less(cn0_dbhz, _INF_F32)
        if not lay.all_known:
            ok &= lay.known
        every = np.count_nonzero(ok) == ok.shape[0]
        if every:  # every cell usable: nothing to gather
            key, flat0 = lay.key, lay.flat0
            q = np.divide(el_deg, bin_deg)
            cn0 = cn0_dbhz.astype(np.float64)
        else:
            key, flat0 = lay.key[ok], lay.flat0[ok]
            q = np.divide(el_deg[ok], bin_deg)
            cn0 = cn0_dbhz[ok].astype(np.float64)
        # el ≥ 0 here, so truncation is the floor.
        b = q.astype(np.intp)
        np.minimum(b, last_bin, out=b)
        flat = np.add(flat0, b)
        packed = flat.tobytes()
        bins = self._bins
        if bins is None or bins.flat != packed:
            bins = self._bins = _Bins(packed, flat)
        if every and lay.full is not bins:
            lay.full, lay.bounds = bins, None
        return Cn0Cells(key=key, flat=flat, cn0=cn0, bins=bins)

    def _bounds(
        self, lay: _Layout, full: _Bins
    ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
        """Each cell's elevation bounds for the bins ``full`` of layout ``lay`` (kept there)."""
        lo_bin, hi_bin = _bin_bounds(self.bin_deg, self._mean.shape[1])
        b = full.flat_cells - lay.flat0
        bounds = lay.bounds = lo_bin.take(b), hi_bin.take(b)
        return bounds

    def drop_db(
        self,
        sat: npt.NDArray[np.int16],
        sig: npt.NDArray[np.uint16],
        el_deg: npt.NDArray[np.float64],
        cn0_dbhz: npt.NDArray[np.float32],
        *,
        min_cells: int = 3,
    ) -> npt.NDArray[np.float64]:
        """Mean C/N0 drop (dB, positive = below baseline) per band key; NaN where < ``min_cells``
        cells fall in warmed-up bins."""
        return self.drop_db_cells(self.cells(sat, sig, el_deg, cn0_dbhz), min_cells=min_cells)

    def drop_db_cells(self, cells: Cn0Cells, *, min_cells: int = 3) -> npt.NDArray[np.float64]:
        """:meth:`drop_db` on cells from :meth:`cells`."""
        out = _NO_DROP.copy()
        bins = cells.bins
        key, flat, cn0 = cells.key, cells.flat, cells.cn0
        if not bins.all_warm:
            warm = np.greater_equal(self._count_flat.take(flat), self._operands[2])
            n_warm = np.count_nonzero(warm)
            if n_warm == 0:
                return out
            if n_warm < warm.shape[0]:
                # Cells in cold bins weigh ±0: the sums of the warm cells only, in the same order
                # (x + ±0 = x, and no partial sum is −0), without gathering the warm cells.
                dev = self._mean_flat.take(flat)
                dev -= cn0
                dev *= warm
                total = np.bincount(key, weights=dev, minlength=N_BAND_KEYS)
                n_warm_band = np.bincount(key, weights=warm, minlength=N_BAND_KEYS)
                np.divide(total, n_warm_band, out=out, where=n_warm_band >= min_cells)
                return out
            bins.all_warm = True
        dev = self._mean_flat.take(flat)
        dev -= cn0
        total = np.bincount(key, weights=dev, minlength=N_BAND_KEYS)
        if bins.n_band is None:
            bins.n_band = np.bincount(key, minlength=N_BAND_KEYS)
        n = bins.n_band
        judged = bins.judged
        if judged is None or bins.min_cells != min_cells:
            judged = bins.judged = n >= min_cells
            bins.min_cells = min_cells
        np.divide(total, n, out=out, where=judged)
        return out

    def drop_db_bands(
        self, cells: Cn0Cells, *, min_cells: int = 3
    ) -> tuple[list[int], list[float]]:
        """The bands judged this epoch and their drops: the keys ``k`` (ascending) where
        ``drop_db_cells(cells, min_cells=min_cells)[k]`` is finite, and those values, bit for bit.

        Shortcuts (tests/test_alarms_fixed_settle.py, tests/test_alarms_warm_cache.py,
        tests/test_alarms_steady_bins.py): the judged bands and their cell counts are kept with
        the bins, and the judged bands' means are the same sums divided by the same counts, so
        no 70-band array is filled, tested and gathered. While some cell's bin is cold, which
        cells are warm is kept too until a cold bin could have turned warm
        (``_Bins.warm_until``), and the sums are those of drop_db_cells' cold-bin path (the
        warm cells' in order); with no warm cell there is nothing to judge."""
        keys, values = self.judged_drops(cells, min_cells)
        return list(keys), values

    def judged_drops(self, cells: Cn0Cells, min_cells: int) -> tuple[tuple[int, ...], list[float]]:
        """:meth:`drop_db_bands` with the keys as a tuple (the same tuple while the bins and
        ``min_cells`` repeat)."""
        bins = cells.bins
        if not bins.all_warm:
            if self._n_learned >= bins.warm_until:
                self._judge_warm(cells)
            if not bins.all_warm:
                return self._partly_warm_bands(cells, min_cells)
        bands = bins.bands
        if bands is None or bins.bands_min_cells != min_cells:
            n = bins.n_band
            if n is None:
                n = bins.n_band = np.bincount(cells.key, minlength=N_BAND_KEYS)
            # A band without cells is never judged (0/0 is NaN in drop_db_cells).
            bands = bins.bands = _judged_bands(n, min_cells)
            bins.bands_min_cells = min_cells
        if not bands[0]:
            return (), []
        return _band_means(cells.key, self._deviation(cells), bands)

    def _deviation(self, cells: Cn0Cells) -> npt.NDArray[np.float64]:
        """Baseline − C/N0 per cell (a new array), from the baseline :meth:`prepare` gathered at
        these bins when nothing was learned since."""
        bins = cells.bins
        base = bins.base
        if base is not None and bins.base_learned == self._n_learned:
            return np.subtract(base, cells.cn0)
        dev = self._mean_flat.take(cells.flat)
        dev -= cells.cn0
        return dev

    def prepare(self, cells: Cn0Cells) -> None:
        """Work for the next epoch, done ahead (its results are the same without it): gather
        the baseline as it now is at ``cells``' bins, which the next epoch's cells most often
        have again, and the elevation bounds of the steady-bins test. Its caller must not write
        to the baseline's arrays itself before the next epoch (tests do, to make a bin
        infinite: they do not call this)."""
        bins = cells.bins
        bins.base = self._mean_flat.take(cells.flat)
        bins.base_learned = self._n_learned
        lay = self._layout
        if lay is not None and lay.full is bins and lay.bounds is None:
            self._bounds(lay, bins)

    def _judge_warm(self, cells: Cn0Cells) -> None:
        """Which cells are in warm bins now (drop_db_cells' warm test), kept with the bins until
        a cold one could turn warm; or "all warm" for good."""
        bins = cells.bins
        count = self._count_flat.take(cells.flat)
        warm = np.greater_equal(count, self._operands[2])
        n_warm = np.count_nonzero(warm)
        if n_warm == warm.shape[0]:
            bins.all_warm = True
            return
        # The warmest cold bin needs min_samples − its count more learning calls at least.
        coldest_gap = self._operands[2] - np.maximum.reduce(count, where=~warm, initial=0)
        bins.warm_until = self._n_learned + int(coldest_gap)
        bins.warm = warm
        bins.n_warm = int(n_warm)
        bins.warm_bands = None
        bins.warm_key = np.where(warm, cells.key, N_BAND_KEYS)

    def _partly_warm_bands(
        self, cells: Cn0Cells, min_cells: int
    ) -> tuple[tuple[int, ...], list[float]]:
        """drop_db_bands while some cell's bin is cold (the warm cells as judged last)."""
        bins = cells.bins
        warm = bins.warm
        if bins.n_warm == 0 or warm is None:
            return (), []  # drop_db_cells: all NaN
        bands = bins.warm_bands
        if bands is None or bins.warm_min_cells != min_cells:
            n_warm_band = np.bincount(cells.key, weights=warm, minlength=N_BAND_KEYS)
            # A band without warm cells is never judged (0/0 is NaN in drop_db_cells).
            bands = bins.warm_bands = _judged_bands(n_warm_band, min_cells)
            bins.warm_min_cells = min_cells
        if not bands[0] or bins.warm_key is None:
            return (), []
        # drop_db_cells' cold-bin path sums the warm cells in order, the cold ones weighing ±0
        # (x + ±0 = x, and no partial sum is −0); here they are summed apart instead (band key
        # N_BAND_KEYS): the same sums, as the baseline and the usable C/N0 are finite (a
        # deviation times 0 is ±0, never NaN).
        return _band_means(bins.warm_key, self._deviation(cells), bands)

    def learn(
        self,
        sat: npt.NDArray[np.int16],
        sig: npt.NDArray[np.uint16],
        el_deg: npt.NDArray[np.float64],
        cn0_dbhz: npt.NDArray[np.float32],
        t_s: float,
        *,
        frozen: npt.NDArray[np.bool_] | None = None,
    ) -> None:
        """Fold one epoch into the baseline; ``frozen[k]`` True skips band key ``k``."""
        self.learn_cells(self.cells(sat, sig, el_deg, cn0_dbhz), t_s, frozen=frozen)

    def learn_cells(
        self, cells: Cn0Cells, t_s: float, *, frozen: npt.NDArray[np.bool_] | None = None
    ) -> None:
        """:meth:`learn` on cells from :meth:`cells`."""
        flat, cn0 = cells.flat, cells.cn0
        dt = 1.0 if self._last_t_s is None else min(max(t_s - self._last_t_s, 0.0), 3600.0)
        self._last_t_s = t_s
        self._n_learned += 1
        if frozen is None:
            bins = cells.bins
            seen, n_seen = bins.seen, bins.n_seen
            if seen is None or n_seen is None:
                n = np.bincount(flat)
                seen = bins.seen = n.nonzero()[0]
                n_seen = bins.n_seen = n.take(seen)
        else:
            keep = ~frozen[cells.key]
            flat, cn0 = flat[keep], cn0[keep]
            n = np.bincount(flat)
            seen = n.nonzero()[0]
            n_seen = n.take(seen)
        # Without minlength the sums stop at the largest bin seen: the same sums, less to clear.
        s = np.bincount(flat, weights=cn0)
        epoch_mean = s.take(seen) / n_seen
        mean = self._mean_flat
        count = self._count_flat
        # count + 1 once, in int64: 1 / (c + 1) divides the same double as 1 / (c + 1.0) did
        # (c + 1 < 2⁵³ converts exactly), and it is the new count.
        c1 = np.add(count.take(seen), _ONE_I64)
        w = min(dt / self.time_constant_s, 1.0)
        if self._weight[0] != w:
            self._weight = (w, np.full((), w, np.float64))
        alpha = np.maximum(np.divide(_ONE, c1), self._weight[1])
        prev = mean.take(seen)
        # prev + alpha·(epoch_mean − prev), in place (the same operations in the same order).
        epoch_mean -= prev
        epoch_mean *= alpha
        epoch_mean += prev
        mean.put(seen, epoch_mean)
        count.put(seen, c1)


#: Judged band keys (ascending), the same as an index array, and their cell counts (floats).
_Bands = tuple[tuple[int, ...], "npt.NDArray[np.intp]", "npt.NDArray[np.float64]"]


def _judged_bands(n: npt.NDArray[np.int64] | npt.NDArray[np.float64], min_cells: int) -> _Bands:
    """The bands with at least ``min_cells`` cells (and one) among counts ``n`` per band key."""
    judged = (n >= max(min_cells, 1)).nonzero()[0]
    return tuple(judged.tolist()), judged, n.take(judged).astype(np.float64)


def _band_means(
    key: npt.NDArray[np.intp], dev: npt.NDArray[np.float64], bands: _Bands
) -> tuple[tuple[int, ...], list[float]]:
    """The mean of ``dev`` over the cells of each judged band (cells summed in order, as
    drop_db_cells' bincount sums them, then divided by the count: IEEE division, the same
    quotient), the finite ones only."""
    keys, at, counts = bands
    # Without minlength the sums stop at the largest band key seen: the same sums.
    values: list[float] = np.divide(np.bincount(key, weights=dev).take(at), counts).tolist()
    # A sum is finite only if every value is (NaN and ±∞ carry through it; a finite sum
    # that overflows only costs the filter, which keeps them all).
    if not math.isfinite(sum(values)):  # only with absurd inputs: keep the finite ones
        return _finite_bands(keys, values)
    return keys, values


def _finite_bands(
    keys: tuple[int, ...], values: list[float]
) -> tuple[tuple[int, ...], list[float]]:
    """The bands whose drop is finite (as drop_db_cells' finite values; a drop is not finite
    only with absurd inputs), the values as a new list."""
    kept = [(k, x) for k, x in zip(keys, values, strict=True) if math.isfinite(x)]
    return tuple(k for k, _ in kept), [x for _, x in kept]
