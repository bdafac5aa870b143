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

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import numpy.typing as npt

__all__ = ["BAND_NAMES", "N_BAND_KEYS", "Cn0Baseline", "Cn0Cells", "band_key", "band_label"]

N_BAND_KEYS = 70
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


@dataclass(frozen=True, slots=True)
class Cn0Cells:
    """The usable cells of one epoch: band key, flat (band, elevation bin) index, C/N0 (dB-Hz)."""

    key: npt.NDArray[np.intp]
    flat: npt.NDArray[np.intp]
    cn0: npt.NDArray[np.float64]


class Cn0Baseline:
    """Per-band, per-elevation-bin C/N0 baseline of one station (mutable state, pure methods)."""

    __slots__ = ("_count", "_last_t_s", "_mean", "bin_deg", "min_samples", "time_constant_s")

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
        self._last_t_s: float | None = None

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
        key = band_key(sat, sig)
        # Comparisons with NaN are False (no warning): NaN and ±∞ fail one bound each.
        ok = (
            (el_deg >= 0.0)
            & (el_deg < np.inf)
            & (cn0_dbhz > 0.0)
            & (cn0_dbhz < np.inf)
            & (key >= 0)
            & (key < N_BAND_KEYS)
        )
        key = key[ok]
        n_bins = self._mean.shape[1]
        # el ≥ 0 here, so truncation is the floor.
        b = (el_deg[ok] / self.bin_deg).astype(np.intp)
        np.minimum(b, n_bins - 1, out=b)
        flat = key * n_bins
        flat += b
        return Cn0Cells(key=key, flat=flat, cn0=cn0_dbhz[ok].astype(np.float64))

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
        out = np.full(N_BAND_KEYS, np.nan)
        warm = self._count.reshape(-1)[cells.flat] >= self.min_samples
        if not warm.any():
            return out
        key = cells.key[warm]
        dev = self._mean.reshape(-1)[cells.flat[warm]] - cells.cn0[warm]
        total = np.bincount(key, weights=dev, minlength=N_BAND_KEYS)
        n = np.bincount(key, minlength=N_BAND_KEYS)
        np.divide(total, n, out=out, where=n >= min_cells)
        return out

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
        if frozen is not None:
            keep = ~frozen[cells.key]
            flat, cn0 = flat[keep], cn0[keep]
        dt = 1.0 if self._last_t_s is None else min(max(t_s - self._last_t_s, 0.0), 3600.0)
        self._last_t_s = t_s
        size = self._mean.size
        n = np.bincount(flat, minlength=size)
        s = np.bincount(flat, weights=cn0, minlength=size)
        seen = n.nonzero()[0]
        epoch_mean = s[seen] / n[seen]
        mean = self._mean.reshape(-1)
        count = self._count.reshape(-1)
        c = count[seen]
        alpha = np.maximum(1.0 / (c + 1.0), min(dt / self.time_constant_s, 1.0))
        prev = mean[seen]
        mean[seen] = prev + alpha * (epoch_mean - prev)
        count[seen] = c + 1
