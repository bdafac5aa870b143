"""Earth-fixed frames: WGS 84 geodetic ↔ ECEF, local azimuth/elevation, Earth rotation in flight.

Axes: ``n`` satellites (or points) along the leading axis; ECEF vectors are ``(n, 3)`` float64 in
metres; angles in radians; heights above the WGS 84 ellipsoid in metres.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ._constants import OMEGA_E_GPS_RADPS, WGS84_A_M, WGS84_E2

__all__ = ["az_el", "ecef_to_geodetic", "enu_basis", "geodetic_to_ecef", "sagnac_rotate"]

F64 = npt.NDArray[np.float64]
ArrayLike = npt.ArrayLike
_TWO_PI = 2.0 * np.pi
_B_M = WGS84_A_M * np.sqrt(1.0 - WGS84_E2)
_EP2 = WGS84_E2 / (1.0 - WGS84_E2)


def geodetic_to_ecef(lat_rad: ArrayLike, lon_rad: ArrayLike, h_m: ArrayLike) -> F64:
    """ECEF (…, 3) in metres of WGS 84 geodetic latitude, longitude and ellipsoidal height
    (NIMA TR8350.2 §4, standard closed form). Inputs broadcast together."""
    lat = np.asarray(lat_rad, dtype=np.float64)
    lon = np.asarray(lon_rad, dtype=np.float64)
    h = np.asarray(h_m, dtype=np.float64)
    sin_lat = np.sin(lat)
    cos_lat = np.cos(lat)
    n_m = WGS84_A_M / np.sqrt(1.0 - WGS84_E2 * sin_lat * sin_lat)
    x = (n_m + h) * cos_lat * np.cos(lon)
    y = (n_m + h) * cos_lat * np.sin(lon)
    z = (n_m * (1.0 - WGS84_E2) + h) * sin_lat
    return np.stack(np.broadcast_arrays(x, y, z), axis=-1)


def ecef_to_geodetic(xyz: ArrayLike) -> tuple[F64, F64, F64]:
    """(lat_rad, lon_rad, h_m) of ECEF points ``(…, 3)`` on WGS 84.

    Bowring's parametric-latitude start plus two fixed-point refinements (common practice): below
    0.1 mm in height and 1e-11 rad in latitude from the ground to GNSS altitudes, away from the
    Earth's centre.
    """
    p_xyz = np.asarray(xyz, dtype=np.float64)
    assert p_xyz.shape[-1] == 3, p_xyz.shape
    x = p_xyz[..., 0]
    y = p_xyz[..., 1]
    z = p_xyz[..., 2]
    p = np.hypot(x, y)
    lon = np.arctan2(y, x)
    beta = np.arctan2(z * WGS84_A_M, p * _B_M)
    lat = np.arctan2(
        z + _EP2 * _B_M * np.sin(beta) ** 3, p - WGS84_E2 * WGS84_A_M * np.cos(beta) ** 3
    )
    for _ in range(2):
        beta = np.arctan2(_B_M * np.sin(lat), WGS84_A_M * np.cos(lat))
        lat = np.arctan2(
            z + _EP2 * _B_M * np.sin(beta) ** 3, p - WGS84_E2 * WGS84_A_M * np.cos(beta) ** 3
        )
    sin_lat = np.sin(lat)
    n_m = WGS84_A_M / np.sqrt(1.0 - WGS84_E2 * sin_lat * sin_lat)
    # Height from the projection that stays well conditioned at all latitudes.
    h = p * np.cos(lat) + z * sin_lat - WGS84_A_M**2 / n_m
    return lat, lon, h


def enu_basis(lat_rad: float, lon_rad: float) -> F64:
    """Rows are the east, north and up unit vectors (3, 3) at a geodetic position."""
    sl, cl = np.sin(lat_rad), np.cos(lat_rad)
    so, co = np.sin(lon_rad), np.cos(lon_rad)
    return np.array(
        [[-so, co, 0.0], [-sl * co, -sl * so, cl], [cl * co, cl * so, sl]], dtype=np.float64
    )


def az_el(rx_ecef: ArrayLike, sat_ecef: ArrayLike) -> tuple[F64, F64]:
    """Azimuth (0…2π from north, clockwise) and elevation (rad) of satellites ``(n, 3)`` seen from
    the receiver ``(3,)``, in the local geodetic east-north-up frame (common practice)."""
    rx = np.asarray(rx_ecef, dtype=np.float64)
    sat = np.asarray(sat_ecef, dtype=np.float64)
    assert rx.shape == (3,), rx.shape
    assert sat.ndim == 2, sat.shape
    assert sat.shape[1] == 3, sat.shape
    lat, lon, _ = ecef_to_geodetic(rx)
    return az_el_enu(enu_basis(float(lat), float(lon)), rx, sat)


def az_el_enu(basis: F64, rx: F64, sat: F64) -> tuple[F64, F64]:
    """:func:`az_el` with a precomputed :func:`enu_basis` (the receiver rarely moves)."""
    enu = (sat - rx) @ basis.T
    az = np.arctan2(enu[:, 0], enu[:, 1]) % _TWO_PI
    el = np.arctan2(enu[:, 2], np.hypot(enu[:, 0], enu[:, 1]))
    return az, el


def sagnac_rotate(sat_ecef: ArrayLike, tau_s: ArrayLike) -> F64:
    """Satellite ECEF ``(n, 3)`` at transmission expressed in the ECEF frame of reception.

    The Earth turns by Ω̇e·τ during the flight time τ, so the frame rotates about z by −Ω̇e·τ
    relative to the satellite (IS-GPS-200 §20.3.3.4.3.3.2, Earth rotation correction; WGS 84 Ω̇e).
    """
    sat = np.asarray(sat_ecef, dtype=np.float64)
    assert sat.ndim == 2, sat.shape
    assert sat.shape[1] == 3, sat.shape
    theta = OMEGA_E_GPS_RADPS * np.asarray(tau_s, dtype=np.float64)
    c = np.cos(theta)
    s = np.sin(theta)
    out = np.empty_like(sat)
    out[:, 0] = c * sat[:, 0] + s * sat[:, 1]
    out[:, 1] = c * sat[:, 1] - s * sat[:, 0]
    out[:, 2] = sat[:, 2]
    return out
