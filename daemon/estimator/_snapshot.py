"""What the estimator publishes after each epoch: an immutable snapshot read by every output.

Per-satellite figures are a structure of arrays over the ``m`` satellites that had data this epoch
(STYLE rule 21); NaN means unknown. The outputs (MQTT, Prometheus, CSV, alarms) read only this.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.daemon._records import fast_constructor

if TYPE_CHECKING:
    from ionwarden.parsers import GpsTime

__all__ = [
    "FixStatus",
    "SatelliteFigures",
    "StationSnapshot",
    "new_fix_status",
    "new_satellite_figures",
    "new_snapshot",
    "satellite_figures_of",
    "snapshot_of",
]

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True, slots=True, kw_only=True)
class SatelliteFigures:
    """Per-satellite figures for one epoch (arrays of length m).

    ``pair``: the frequency pair in use as "1C-2W" (RINEX codes), "" when single-frequency.
    ``slip``: a new arc started at this epoch (slip, gap, lock reset, pair switch).
    """

    sat: npt.NDArray[np.int16]
    pair: tuple[str, ...]
    el_deg: F64
    az_deg: F64
    ipp_lat_deg: F64
    ipp_lon_deg: F64
    stec_tecu: F64
    vtec_tecu: F64
    rot_tecu_per_min: F64
    roti_tecu_per_min: F64
    iono_l1_m: F64
    if_code_m: F64
    if_phase_m: F64
    if_code_smoothed_m: F64
    slip: npt.NDArray[np.bool_]
    arc_id: npt.NDArray[np.int32]
    #: Optional extras (empty arrays when a producer does not fill them): code-minus-carrier
    #: multipath of band 1 and band 2 of the pair (arc mean removed, m), the iono-free noise
    #: amplification √(α²+β²), "this new arc is a frequency-pair switch", and the arc's
    #: levelling correction already subtracted from ``stec_tecu`` (TECU, 0 where none; the
    #: receiver-bias fit's estimate of the arc's levelling error, ``_biases``).
    mp1_m: F64 = field(default_factory=lambda: np.zeros(0))
    mp2_m: F64 = field(default_factory=lambda: np.zeros(0))
    if_noise_factor: F64 = field(default_factory=lambda: np.zeros(0))
    pair_switch: npt.NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, np.bool_))
    stec_relevel_tecu: F64 = field(default_factory=lambda: np.zeros(0))

    def __len__(self) -> int:
        return int(self.sat.shape[0])


@dataclass(frozen=True, slots=True, kw_only=True)
class StationSnapshot:
    """Station-level figures after one epoch, plus the per-satellite and per-cell detail.

    ``cell_*`` arrays (length n, one per satellite × signal) carry what the CN0-baseline alarm
    needs: satellite, packed signal code, elevation and C/N0.
    """

    station: str
    time: GpsTime
    n_sats: int
    vtec_tecu: float
    roti_max_tecu_per_min: float
    roti_median_tecu_per_min: float
    rot_max_abs_tecu_per_min: float
    gradient_mm_per_km: float
    gradient_tecu_per_km: float
    gradient_azimuth_deg: float
    dual_freq_fraction: float
    receiver_bias_tecu: float
    receiver_bias_sigma_tecu: float
    satellites: SatelliteFigures
    cell_sat: npt.NDArray[np.int16]
    cell_sig: npt.NDArray[np.uint16]
    cell_el_deg: F64
    cell_cn0_dbhz: npt.NDArray[np.float32]
    geometry_source: str = "ephemeris"  # "ephemeris", "gsv" (flagged fallback) or "none"
    counters: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True, slots=True, kw_only=True)
class FixStatus:
    """The receiver's own position fix quality, from NMEA GGA (and GST when present).

    ``quality`` is the GGA fix quality indicator (NMEA 0183 v4.11: 0 invalid, 1 GPS, 2 DGPS,
    4 RTK fixed, 5 RTK float, …); sigmas are GST 1-σ errors in metres (NaN when no GST).
    """

    station: str
    time: GpsTime | None
    quality: int
    n_sats_used: int
    hdop: float
    sigma_lat_m: float = float("nan")
    sigma_lon_m: float = float("nan")
    sigma_alt_m: float = float("nan")


#: ``SatelliteFigures(**values)`` / ``StationSnapshot(**values)`` with every field given (faster).
new_satellite_figures = fast_constructor(SatelliteFigures)
new_snapshot = fast_constructor(StationSnapshot)

#: ``SatelliteFigures(*values)`` / ``StationSnapshot(*values)``, every field in field order
#: (the per-epoch path's: no keyword matching).
satellite_figures_of = fast_constructor(SatelliteFigures, positional=True)
snapshot_of = fast_constructor(StationSnapshot, positional=True)

#: ``FixStatus(**values)`` with every field given: two a second per station (GGA, then GST).
new_fix_status = fast_constructor(FixStatus)
