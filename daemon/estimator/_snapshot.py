"""What the estimator publishes after each epoch: an immutable snapshot read by every output.

Per-satellite figures are a structure of arrays over the ``m`` satellites that had data this epoch
(STYLE rule 21); NaN means unknown. The outputs (MQTT, Prometheus, CSV, alarms) read only this.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np
import numpy.typing as npt

if TYPE_CHECKING:
    from collections.abc import Callable

    from ionwarden.parsers import GpsTime

__all__ = [
    "FixStatus",
    "SatelliteFigures",
    "StationSnapshot",
    "new_satellite_figures",
    "new_snapshot",
]

F64 = npt.NDArray[np.float64]
_T = TypeVar("_T")


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


def _fast_constructor(cls: type[_T]) -> Callable[..., _T]:
    """A constructor of the frozen slots dataclass ``cls`` taking every field by keyword: the
    same object as ``cls(**values)``, without the frozen ``__init__``'s ``object.__setattr__``
    per field (the estimator builds three per epoch). Generated like the dataclass's own
    ``__init__``: the fields are stored into an instance of a plain twin class with the same
    slots (plain attribute stores), whose ``__class__`` is then set to ``cls`` (Python allows it
    between classes of the same slot layout); where that is refused, each slot is set through
    its descriptor instead."""
    names = [f.name for f in fields(cls)]  # type: ignore[arg-type]  # a dataclass
    twin = type(f"_{cls.__name__}Slots", (), {"__slots__": cls.__slots__})  # type: ignore[attr-defined]
    env: dict[str, Any] = {"_new": object.__new__, "_cls": cls, "_twin": twin}
    env.update({f"_set_{n}": getattr(cls, n).__set__ for n in names})
    args = ", ".join(names)
    stores = "\n".join(f"    o.{n} = {n}" for n in names)
    sets = "\n".join(f"    _set_{n}(o, {n})" for n in names)
    src = (
        f"def new_{cls.__name__}(*, {args}):\n    o = _twin()\n{stores}\n    o.__class__ = _cls\n"
        f"    return o\n\n"
        f"def set_{cls.__name__}(*, {args}):\n    o = _new(_cls)\n{sets}\n    return o\n"
    )
    exec(src, env)  # noqa: S102 - source built from the dataclass's own field names
    build: Callable[..., _T] = env[f"new_{cls.__name__}"]
    try:
        build(**dict.fromkeys(names))
    except TypeError:  # no __class__ assignment between the two (another Python)
        build = env[f"set_{cls.__name__}"]
    return build


#: ``SatelliteFigures(**values)`` / ``StationSnapshot(**values)`` with every field given (faster).
new_satellite_figures = _fast_constructor(SatelliteFigures)
new_snapshot = _fast_constructor(StationSnapshot)
