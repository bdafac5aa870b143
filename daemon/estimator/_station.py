"""Station-level figures from the per-satellite ones: weighted VTEC, ROTI summary, VTEC gradient.

Axes: ``m`` satellites above the elevation mask with a value. Weights sin²(el) (common practice:
low satellites carry more mapping error and multipath). The gradient is the slope of a weighted
least-squares plane VTEC = v0 + g_e·x + g_n·y over the pierce points, x/y their east/north offsets
from the station on the shell (km); it needs at least 4 pierce points.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ionwarden.daemon.geo import DEFAULT_EARTH_RADIUS_M

__all__ = [
    "GPS_L1_M_PER_TECU",
    "SkyTerms",
    "StationFigures",
    "pierce_offsets_km",
    "station_figures",
]

F64 = npt.NDArray[np.float64]
#: L1 group delay of 1 TECU: 40.3·10¹⁶/(1575.42 MHz)² = 0.16237 m (SCIENCE.md §2, IS-GPS-200 L1).
GPS_L1_M_PER_TECU = 40.3e16 / 1575.42e6**2
_ZERO = np.array(0.0)


@dataclass(frozen=True, slots=True)
class StationFigures:
    vtec_tecu: float
    roti_max: float
    roti_median: float
    rot_max_abs: float
    gradient_tecu_per_km: float
    gradient_mm_per_km: float
    gradient_azimuth_deg: float


def pierce_offsets_km(
    lat_rad: float, lon_rad: float, ipp_lat_rad: F64, ipp_lon_rad: F64, shell_height_m: float
) -> tuple[F64, F64]:
    """East/north offsets (km) of pierce points from the station's zenith on the shell."""
    r_km = (DEFAULT_EARTH_RADIUS_M + shell_height_m) / 1000.0
    dlon = (ipp_lon_rad - lon_rad + np.pi) % (2.0 * np.pi) - np.pi
    return r_km * dlon * math.cos(lat_rad), r_km * (ipp_lat_rad - lat_rad)


class SkyTerms:
    """Per-epoch functions of the geometry with in-place operations and 0-d constants (a Python
    float operand costs a conversion per numpy call): the same operations, in the same order, as
    :func:`~ionwarden.daemon.geo.mapping_factor` and :func:`pierce_offsets_km` (bit-identical)."""

    def __init__(self, shell_height_m: float) -> None:
        r = DEFAULT_EARTH_RADIUS_M
        self._r = np.array(r)
        self._r_shell = np.array(r + shell_height_m)
        self._r_km = np.array((r + shell_height_m) / 1000.0)
        self._one = np.array(1.0)
        self._pi = np.array(np.pi)
        self._two_pi = np.array(2.0 * np.pi)
        self._lon = np.array(np.nan)  # station (rad)
        self._lat = np.array(np.nan)
        self._cos_lat = np.array(np.nan)

    def mapping(self, el_rad: F64) -> F64:
        """M(el) = 1/√(1 − (R·cos el/(R + h))²) (SCIENCE.md §6)."""
        s = np.cos(el_rad)
        s *= self._r
        s /= self._r_shell
        s *= s
        np.subtract(self._one, s, out=s)
        np.sqrt(s, out=s)
        out: F64 = np.divide(self._one, s, out=s)
        return out

    def offsets(self, lat_rad: float, lon_rad: float, ipp_lat_lon: F64, out: F64) -> None:
        """East/north offsets (km) of the pierce points (rows lat, lon) into ``out`` (rows x,
        y)."""
        if not (self._lon == lon_rad and self._lat == lat_rad):
            self._lon, self._lat = np.array(lon_rad), np.array(lat_rad)
            self._cos_lat = np.array(math.cos(lat_rad))
        dlon = np.subtract(ipp_lat_lon[1], self._lon, out=out[0])
        np.subtract(ipp_lat_lon[0], self._lat, out=out[1])
        dlon += self._pi
        dlon %= self._two_pi
        dlon -= self._pi
        out *= self._r_km
        dlon *= self._cos_lat


def station_figures(
    *, el_rad: F64, sin_el: F64, el_known: bool, pts: F64, rot: F64, roti: F64, mask_rad: float
) -> StationFigures:
    """Station summary over satellites at or above ``mask_rad`` (all when elevation is unknown).

    ``sin_el`` is sin(el_rad); ``el_known``: no elevation is NaN (and the pierce points are
    known); ``pts`` (3, m): pierce-point offsets x, y (km; x and y from the same pierce point)
    and VTEC of each satellite.
    """
    m = el_rad.shape[0]
    assert pts.shape == (3, m), (pts.shape, m)
    assert rot.shape == roti.shape == (m,), (rot.shape, roti.shape, m)
    known = None if el_known else np.isfinite(el_rad)
    n_known = m if known is None else np.count_nonzero(known)
    above = (el_rad >= np.array(mask_rad)) if n_known else np.ones(m, np.bool_)
    n_above = np.count_nonzero(above)
    # sin(max(el, 0)) = max(sin el, 0) for el in [−90°, 90°]
    w = np.maximum(sin_el, _ZERO)
    w *= w
    if known is not None and n_known < m:
        w[~known] = 1.0

    use = above & np.isfinite(pts[2])
    n_use = np.count_nonzero(use)
    vtec = pts[2]
    wu, vu = (w, vtec) if n_use == m else (w[use], vtec[use])
    wu_sum = np.add.reduce(wu)  # wu.sum() without its Python wrapper
    vtec_st = float(wu @ vu / wu_sum) if n_use else math.nan
    r = roti[above & np.isfinite(roti)] if n_above < m else roti[np.isfinite(roti)]
    r.sort()  # a copy already
    roti_max = float(r[-1]) if r.size else math.nan
    roti_med = float(0.5 * (r[(r.size - 1) // 2] + r[r.size // 2])) if r.size else math.nan
    rr = np.abs(rot[above] if n_above < m else rot)
    rot_max = float(np.fmax.reduce(rr)) if rr.size else math.nan  # NaN only if all are NaN

    g_t = g_mm = g_az = math.nan
    if el_known:  # pierce points of known elevations are finite: x, y are
        fit, n_fit = use, n_use
    else:
        fit = use & np.isfinite(pts[0])
        n_fit = np.count_nonzero(fit)
    if n_fit >= 4:
        if n_fit == m:
            ge, gn = _plane_slopes(w, pts, wu_sum)
        elif fit is use:  # the weights and their sum of the VTEC mean
            ge, gn = _plane_slopes(wu, pts[:, fit], wu_sum)
        else:
            ge, gn = _plane_slopes(w[fit], pts[:, fit])
        if math.isfinite(ge):
            g_t = math.hypot(ge, gn)
            g_mm = g_t * GPS_L1_M_PER_TECU * 1000.0
            g_az = math.degrees(math.atan2(ge, gn)) % 360.0
    return StationFigures(
        vtec_tecu=vtec_st,
        roti_max=roti_max,
        roti_median=roti_med,
        rot_max_abs=rot_max,
        gradient_tecu_per_km=g_t,
        gradient_mm_per_km=g_mm,
        gradient_azimuth_deg=g_az,
    )


def _plane_slopes(w: F64, xyv: F64, w_sum: np.float64 | None = None) -> tuple[float, float]:
    """Slopes (∂v/∂x, ∂v/∂y) of the weighted least-squares plane v = c + gx·x + gy·y through
    the points ``xyv`` (rows x, y, v) with weights ``w`` (``w_sum``: their sum, if known).

    Centred on the weighted means, the normal equations reduce to 2 × 2, solved in closed form;
    NaN when the points lie (nearly) on one line.
    """
    c = xyv - (xyv @ w / (np.add.reduce(w) if w_sum is None else w_sum))[:, None]
    (sxx, sxy, sxv), (_, syy, syv), _ = ((c * w) @ c.T).tolist()
    det = sxx * syy - sxy * sxy
    if not det > 1e-9 * sxx * syy:
        return math.nan, math.nan
    return (syy * sxv - sxy * syv) / det, (sxx * syv - sxy * sxv) / det
