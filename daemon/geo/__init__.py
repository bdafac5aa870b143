"""Satellite geometry: broadcast orbits and clocks, Earth frames, thin-shell pierce points.

Shared by the estimator and the simulator so both use the same propagation. Vectorised over
satellites (numpy structure of arrays); times are continuous GPS seconds (``GpsTime.total_s``).
"""

from ._frames import az_el, ecef_to_geodetic, enu_basis, geodetic_to_ecef, sagnac_rotate
from ._kepler import KeplerBatch, is_bds_geo, kepler_state
from ._pierce import DEFAULT_EARTH_RADIUS_M, DEFAULT_SHELL_HEIGHT_M, mapping_factor, pierce_point

__all__ = [
    "DEFAULT_EARTH_RADIUS_M",
    "DEFAULT_SHELL_HEIGHT_M",
    "KeplerBatch",
    "az_el",
    "ecef_to_geodetic",
    "enu_basis",
    "geodetic_to_ecef",
    "is_bds_geo",
    "kepler_state",
    "mapping_factor",
    "pierce_point",
    "sagnac_rotate",
]
