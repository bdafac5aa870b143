"""Satellite geometry: broadcast orbits and clocks, Earth frames, thin-shell pierce points.

Shared by the estimator and the simulator so both use the same propagation. Vectorised over
satellites (numpy structure of arrays); times are continuous GPS seconds (``GpsTime.total_s``).
PZ-90.11 (GLONASS) is treated as WGS 84.

Typical use, once per epoch::

    store = EphemerisStore()
    store.add(eph)                                   # KeplerEphemeris
    store.add(glo_eph, t_received_gps_s=t)           # GlonassEphemeris (places t_b in time)
    geo = satellite_geometry(t, rx_ecef, sat_ids, store, pseudorange_m=pr)   # or without pr
    lat_p, lon_p = pierce_point(lat, lon, geo.az_rad, geo.el_rad)
    vtec = stec / mapping_factor(geo.el_rad)

Lower level: ``kepler_state(KeplerBatch.from_ephemerides(ephs), t)`` and
``glonass_state(GlonassBatch.from_ephemerides(ephs), t)`` → (pos, vel, clock) exactly per the ICDs.
"""

from ._constants import C_MPS, OMEGA_E_GPS_RADPS
from ._ephstore import (
    DEFAULT_KEEP_PER_SAT,
    EphemerisSelection,
    EphemerisStore,
    EphemerisStoreStatistics,
)
from ._frames import az_el, az_el_enu, ecef_to_geodetic, enu_basis, geodetic_to_ecef, sagnac_rotate
from ._glonass import GlonassBatch, glonass_state, resolve_glonass_tb
from ._kepler import KeplerBatch, is_bds_geo, kepler_state
from ._pierce import DEFAULT_EARTH_RADIUS_M, DEFAULT_SHELL_HEIGHT_M, mapping_factor, pierce_point
from ._satgeom import SatelliteGeometry, satellite_geometry

__all__ = [
    "C_MPS",
    "DEFAULT_EARTH_RADIUS_M",
    "DEFAULT_KEEP_PER_SAT",
    "DEFAULT_SHELL_HEIGHT_M",
    "OMEGA_E_GPS_RADPS",
    "EphemerisSelection",
    "EphemerisStore",
    "EphemerisStoreStatistics",
    "GlonassBatch",
    "KeplerBatch",
    "SatelliteGeometry",
    "az_el",
    "az_el_enu",
    "ecef_to_geodetic",
    "enu_basis",
    "geodetic_to_ecef",
    "glonass_state",
    "is_bds_geo",
    "kepler_state",
    "mapping_factor",
    "pierce_point",
    "resolve_glonass_tb",
    "sagnac_rotate",
    "satellite_geometry",
]
