"""Thin-shell ionosphere: ionospheric pierce point and slant-to-vertical mapping factor.

SCIENCE.md §6 (common practice): a single shell at height h above a spherical Earth of radius R.
Axes: ``n`` lines of sight; angles in radians, lengths in metres.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["DEFAULT_EARTH_RADIUS_M", "DEFAULT_SHELL_HEIGHT_M", "mapping_factor", "pierce_point"]

F64 = npt.NDArray[np.float64]
#: Mean Earth radius and shell height of SCIENCE.md §6 (global maps often use 450 km).
DEFAULT_EARTH_RADIUS_M = 6_371e3
DEFAULT_SHELL_HEIGHT_M = 350e3


def mapping_factor(
    el_rad: npt.ArrayLike,
    shell_height_m: float = DEFAULT_SHELL_HEIGHT_M,
    earth_radius_m: float = DEFAULT_EARTH_RADIUS_M,
) -> F64:
    """M(el) = 1/√(1 − (R·cos el/(R + h))²): STEC = M · VTEC (SCIENCE.md §6)."""
    el = np.asarray(el_rad, dtype=np.float64)
    s = earth_radius_m * np.cos(el) / (earth_radius_m + shell_height_m)
    return np.asarray(1.0 / np.sqrt(1.0 - s * s), dtype=np.float64)


def pierce_point(  # noqa: PLR0917 - signature shared with the estimator and simulator
    lat_rad: float | npt.ArrayLike,
    lon_rad: float | npt.ArrayLike,
    az_rad: npt.ArrayLike,
    el_rad: npt.ArrayLike,
    shell_height_m: float = DEFAULT_SHELL_HEIGHT_M,
    earth_radius_m: float = DEFAULT_EARTH_RADIUS_M,
) -> tuple[F64, F64]:
    """(lat_rad, lon_rad) of the pierce point, longitude wrapped to [−π, π).

    ψ = π/2 − el − asin(R·cos el/(R + h)) is the Earth-central angle; φ_p = asin(sin φ cos ψ +
    cos φ sin ψ cos az) (SCIENCE.md §6). For the longitude we use the equivalent, pole-safe form
    λ_p = λ + atan2(sin ψ sin az cos φ, cos ψ − sin φ sin φ_p): it equals SCIENCE.md's
    asin(sin ψ sin az / cos φ_p) wherever that is valid and stays right when the line of sight
    passes over a pole (asin cannot return angles beyond ±90°).
    """
    lat = np.asarray(lat_rad, dtype=np.float64)
    el = np.asarray(el_rad, dtype=np.float64)
    az = np.asarray(az_rad, dtype=np.float64)
    psi = (
        0.5 * np.pi
        - el
        - np.arcsin(earth_radius_m * np.cos(el) / (earth_radius_m + shell_height_m))
    )
    sin_lat = np.sin(lat)
    cos_lat = np.cos(lat)
    sin_psi = np.sin(psi)
    cos_psi = np.cos(psi)
    sin_lat_p = np.clip(sin_lat * cos_psi + cos_lat * sin_psi * np.cos(az), -1.0, 1.0)
    lat_p = np.arcsin(sin_lat_p)
    dlon = np.arctan2(sin_psi * np.sin(az) * cos_lat, cos_psi - sin_lat * sin_lat_p)
    lon_p = (np.asarray(lon_rad, dtype=np.float64) + dlon + np.pi) % (2.0 * np.pi) - np.pi
    return np.asarray(lat_p, dtype=np.float64), np.asarray(lon_p, dtype=np.float64)
