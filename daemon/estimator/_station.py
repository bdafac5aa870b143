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

__all__ = ["GPS_L1_M_PER_TECU", "StationFigures", "pierce_offsets_km", "station_figures"]

F64 = npt.NDArray[np.float64]
#: L1 group delay of 1 TECU: 40.3·10¹⁶/(1575.42 MHz)² = 0.16237 m (SCIENCE.md §2, IS-GPS-200 L1).
GPS_L1_M_PER_TECU = 40.3e16 / 1575.42e6**2


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


def station_figures(
    *, el_rad: F64, vtec: F64, rot: F64, roti: F64, x_km: F64, y_km: F64, mask_rad: float,
    sin_el: F64 | None = None,
) -> StationFigures:  # fmt: skip
    """Station summary over satellites at or above ``mask_rad`` (all when elevation is unknown);
    ``sin_el`` is sin(el_rad) when the caller has it already."""
    m = el_rad.shape[0]
    for a in (vtec, rot, roti, x_km, y_km):
        assert a.shape == (m,), (a.shape, m)
    known = np.isfinite(el_rad)
    n_known = np.count_nonzero(known)
    above = (el_rad >= mask_rad) if n_known else np.ones(m, np.bool_)
    # sin(max(el, 0)) = max(sin el, 0) for el in [−90°, 90°]
    w = np.maximum(np.sin(el_rad) if sin_el is None else sin_el, 0.0)
    w *= w
    if n_known < m:
        w[~known] = 1.0

    use = above & np.isfinite(vtec)
    n_use = np.count_nonzero(use)
    wu, vu = (w, vtec) if n_use == m else (w[use], vtec[use])
    vtec_st = float(wu @ vu / wu.sum()) if n_use else math.nan
    r = np.sort(roti[above & np.isfinite(roti)])
    roti_max = float(r[-1]) if r.size else math.nan
    roti_med = float(0.5 * (r[(r.size - 1) // 2] + r[r.size // 2])) if r.size else math.nan
    rr = np.abs(rot[above])
    rot_max = float(np.fmax.reduce(rr)) if rr.size else math.nan  # NaN only if all are NaN

    g_t = g_mm = g_az = math.nan
    fit = use & np.isfinite(x_km)  # x and y come from the same pierce point
    n_fit = np.count_nonzero(fit)
    if n_fit >= 4:
        pts = np.empty((3, m))
        pts[0], pts[1], pts[2] = x_km, y_km, vtec
        ge, gn = _plane_slopes(w, pts) if n_fit == m else _plane_slopes(w[fit], pts[:, fit])
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


def _plane_slopes(w: F64, xyv: F64) -> tuple[float, float]:
    """Slopes (∂v/∂x, ∂v/∂y) of the weighted least-squares plane v = c + gx·x + gy·y through
    the points ``xyv`` (rows x, y, v) with weights ``w``.

    Centred on the weighted means, the normal equations reduce to 2 × 2, solved in closed form;
    NaN when the points lie (nearly) on one line.
    """
    c = xyv - (xyv @ w / w.sum())[:, None]
    (sxx, sxy, sxv), (_, syy, syv), _ = ((c * w) @ c.T).tolist()
    det = sxx * syy - sxy * sxy
    if not det > 1e-9 * sxx * syy:
        return math.nan, math.nan
    return (syy * sxv - sxy * syv) / det, (sxx * syv - sxy * sxv) / det
