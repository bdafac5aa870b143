"""Physical constants of the broadcast orbit models, each with the clause it comes from.

Every figure here was checked against the cited clause (or marked "from memory" where the text was
recalled, not read). Units are SI throughout: m, s, rad.
"""

from __future__ import annotations

import math

__all__ = [
    "BDS_GEO_PRNS",
    "BDS_GEO_TILT_RAD",
    "C_MPS",
    "GLO_AE_M",
    "GLO_J20",
    "GLO_MU_M3PS2",
    "GLO_OMEGA_E_RADPS",
    "HALF_WEEK_S",
    "MU_BDS_M3PS2",
    "MU_GAL_M3PS2",
    "MU_GPS_M3PS2",
    "OMEGA_E_BDS_RADPS",
    "OMEGA_E_GAL_RADPS",
    "OMEGA_E_GPS_RADPS",
    "WGS84_A_M",
    "WGS84_E2",
    "WGS84_F",
    "relativistic_f",
]

#: Speed of light in vacuum (IS-GPS-200 §20.3.4.3; SI definition).
C_MPS = 299_792_458.0

# GPS and QZSS: IS-GPS-200 Table 20-IV (WGS 84 values); IS-QZSS-PNT uses the same.
MU_GPS_M3PS2 = 3.986005e14
OMEGA_E_GPS_RADPS = 7.2921151467e-5

# Galileo OS SIS ICD §5.1.1 (Table 58): μ and Ω̇e.
MU_GAL_M3PS2 = 3.986004418e14
OMEGA_E_GAL_RADPS = 7.2921151467e-5

# BeiDou BDS-SIS-ICD-B1I §5.2.4.12 (Table 5-12, CGCS2000 values).
MU_BDS_M3PS2 = 3.986004418e14
OMEGA_E_BDS_RADPS = 7.2921150e-5
#: BDS GEO orbit: the extra rotation of the GEO "GK" frame by −5° about x (BDS-SIS-ICD-B1I §5.2.4.12).
BDS_GEO_TILT_RAD = math.radians(-5.0)
#: BeiDou GEO PRNs (C01–C05, and C59–C63 of BDS-3); everything else is MEO or IGSO.
BDS_GEO_PRNS = frozenset((1, 2, 3, 4, 5, 59, 60, 61, 62, 63))

# GLONASS ICD Ed. 5.1 Table 3.2 (PZ-90 geodetic constants), used in the §A.3.1.2 equations of
# motion: GM, semi-major axis, J2 (second zonal harmonic), Earth rotation rate (from memory of the
# table; Ω̇e differs from WGS 84 by 1.5e-14 rad/s, which is immaterial).
GLO_MU_M3PS2 = 398_600.4418e9
GLO_AE_M = 6_378_136.0
GLO_J20 = 1_082_625.75e-9
GLO_OMEGA_E_RADPS = 7.292115e-5

# WGS 84 ellipsoid (NIMA TR8350.2 §3.2): semi-major axis and flattening. PZ-90.11 is treated as
# WGS 84 (the frames agree to a few cm, far below broadcast orbit errors).
WGS84_A_M = 6_378_137.0
WGS84_F = 1.0 / 298.257223563
WGS84_E2 = WGS84_F * (2.0 - WGS84_F)

#: Half a week: ``t − toe`` is folded into ±302 400 s (IS-GPS-200 Table 20-IV, note on t_k).
HALF_WEEK_S = 302_400.0


def relativistic_f(mu_m3ps2: float) -> float:
    """F = −2√μ/c² (s/√m) of the relativistic clock term F·e·√A·sin E.

    IS-GPS-200 §20.3.3.3.3.1 gives −4.442807633e-10 for the GPS μ; Galileo OS SIS ICD §5.1.4 and
    BDS-SIS-ICD-B1I §5.2.4.10 give −4.442807309e-10 for μ = 3.986004418e14.
    """
    return -2.0 * math.sqrt(mu_m3ps2) / C_MPS**2
