"""One receiver epoch of raw measurements as a structure of arrays (STYLE rule 21).

Every source (RTCM MSM, RINEX observation files, the simulator) produces :class:`ObsEpoch`: one
row ("cell") per satellite × signal, all arrays the same length ``n``. Missing values are NaN.

Axes and symbols: ``n`` cells; ``sat`` satellite id (see ``_signals``); ``sig`` packed RINEX signal
code; pseudorange P (m), carrier phase L (cycles), range rate (m/s, positive when the range grows),
C/N0 (dB-Hz), carrier frequency f (Hz).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

if TYPE_CHECKING:
    from ._gnsstime import GpsTime

__all__ = ["EPOCH_DTYPES", "ObsEpoch"]

#: dtype of each per-cell array, checked on construction.
EPOCH_DTYPES: dict[str, np.dtype[np.generic]] = {
    "sat": np.dtype(np.int16),
    "sig": np.dtype(np.uint16),
    "pseudorange_m": np.dtype(np.float64),
    "phase_cycles": np.dtype(np.float64),
    "range_rate_mps": np.dtype(np.float64),
    "cn0_dbhz": np.dtype(np.float32),
    "lock_time_s": np.dtype(np.float32),
    "lock_indicator": np.dtype(np.int16),
    "half_cycle": np.dtype(np.bool_),
    "lli": np.dtype(np.uint8),
    "freq_hz": np.dtype(np.float64),
}


@dataclass(frozen=True, slots=True, kw_only=True)
class ObsEpoch:
    """Raw measurements of one epoch, all constellations, as parallel arrays.

    * ``lock_time_s``: minimum continuous lock time (RTCM DF402/DF407 decoded; NaN from RINEX).
    * ``lock_indicator``: the raw MSM lock-time indicator (−1 where the source has none).
    * ``half_cycle``: RTCM DF420 or RINEX LLI bit 1 (half-cycle ambiguity possible).
    * ``lli``: RINEX loss-of-lock indicator (bit 0 = lost lock since the previous epoch); 0 from RTCM.
    * ``freq_hz``: carrier frequency of the cell (NaN for GLONASS FDMA without a known channel).
    """

    time: GpsTime
    station_id: int = -1
    sat: npt.NDArray[np.int16]
    sig: npt.NDArray[np.uint16]
    pseudorange_m: npt.NDArray[np.float64]
    phase_cycles: npt.NDArray[np.float64]
    range_rate_mps: npt.NDArray[np.float64]
    cn0_dbhz: npt.NDArray[np.float32]
    lock_time_s: npt.NDArray[np.float32]
    lock_indicator: npt.NDArray[np.int16]
    half_cycle: npt.NDArray[np.bool_]
    lli: npt.NDArray[np.uint8]
    freq_hz: npt.NDArray[np.float64]
    #: Message numbers (or "RINEX") that contributed, for diagnostics.
    sources: tuple[int | str, ...] = field(default=())
    _validate: bool = field(default=True, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self._validate:
            return
        n = self.sat.shape[0]
        for name, dtype in EPOCH_DTYPES.items():
            arr = getattr(self, name)
            if arr.shape != (n,) or arr.dtype != dtype:
                raise ValueError(
                    f"ObsEpoch.{name}: want shape ({n},) {dtype}, got {arr.shape} {arr.dtype}"
                )

    def __len__(self) -> int:
        return int(self.sat.shape[0])

    @classmethod
    def empty(cls, time: GpsTime, station_id: int = -1) -> ObsEpoch:
        arrays = {name: np.zeros(0, dtype) for name, dtype in EPOCH_DTYPES.items()}
        return cls(time=time, station_id=station_id, **arrays)  # type: ignore[arg-type]
