"""Satellite ids, signal codes and carrier frequencies, as compact integers for numpy arrays.

* **Satellite id** (``int16``): ``system_index * 100 + prn`` with systems ``G R E C J S I`` at
  0…6, so G07 → 7, R05 → 105, E11 → 211, C23 → 323, J02 → 402. SBAS uses the RINEX number
  (PRN − 100, S20 → 520). Fixed-size per-satellite state arrays index directly by this id
  (``MAX_SAT_ID``).
* **Signal code** (``uint16``): the RINEX 3 observation code's band digit and attribute letter
  (RINEX 3.05 §5.1, Table 4–10), packed as ``band * 32 + (letter − 'A')``: "1C" → 34.
* **Carrier frequency** per (system, band) from the signal ICDs; GLONASS FDMA bands 1 and 2 need the
  satellite's channel number k (GLONASS ICD Ed. 5.1 §3.3.1.4: 1602 + k·0.5625 MHz and
  1246 + k·0.4375 MHz). Without k the frequency is NaN and the satellite gets no TEC.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = [
    "GLO_NO_CHANNEL",
    "MAX_SAT_ID",
    "SYSTEMS",
    "carrier_frequency_hz",
    "frequencies_hz",
    "sat_id",
    "sat_name",
    "signal_code",
    "signal_name",
    "system_of",
]

#: RINEX 3 system letters, in the order of their index in a satellite id.
SYSTEMS = "GRECJSI"
MAX_SAT_ID = 700
#: Marker for "GLONASS frequency channel unknown" in int8 channel arrays.
GLO_NO_CHANNEL = -128

_MHZ = 1e6
# Carrier frequencies (Hz) by system index and RINEX band digit; NaN where the band does not exist
# for that system or (GLONASS FDMA bands 1, 2) depends on the channel number.
# GPS: IS-GPS-200N §3.3.1.1 (L1 1575.42, L2 1227.60), IS-GPS-705J §3.3.1.1 (L5 1176.45).
# GLONASS CDMA L3 1202.025 (GLONASS ICD CDMA L3 Ed. 1.0), L1OC 1600.995, L2OC 1248.06.
# Galileo OS SIS ICD 2.1 §2.3: E1 1575.42, E5a 1176.45, E5b 1207.14, E5 1191.795, E6 1278.75.
# BeiDou: B1I 1561.098 (BDS-SIS-ICD-B1I-3.0 §4.2), B1C 1575.42 (B1C ICD 1.0), B2a 1176.45
# (B2a ICD 1.0), B2I/B2b 1207.14, B3I 1268.52 (B3I ICD 1.0), B2a+b 1191.795.
# QZSS IS-QZSS-PNT: as GPS, plus L6 1278.75. SBAS: L1, L5. NavIC SPS ICD: L5 1176.45, S 2492.028.
_FREQ_TABLE = np.full((len(SYSTEMS), 10), np.nan)
for _sys, _band, _mhz in (
    ("G", 1, 1575.42), ("G", 2, 1227.60), ("G", 5, 1176.45),
    ("R", 3, 1202.025), ("R", 4, 1600.995), ("R", 6, 1248.06),
    ("E", 1, 1575.42), ("E", 5, 1176.45), ("E", 7, 1207.14), ("E", 8, 1191.795), ("E", 6, 1278.75),
    ("C", 2, 1561.098), ("C", 1, 1575.42), ("C", 5, 1176.45), ("C", 7, 1207.14),
    ("C", 6, 1268.52), ("C", 8, 1191.795),
    ("J", 1, 1575.42), ("J", 2, 1227.60), ("J", 5, 1176.45), ("J", 6, 1278.75),
    ("S", 1, 1575.42), ("S", 5, 1176.45),
    ("I", 5, 1176.45), ("I", 9, 2492.028),
):  # fmt: skip
    _FREQ_TABLE[SYSTEMS.index(_sys), _band] = _mhz * _MHZ
_FREQ_TABLE.setflags(write=False)

# GLONASS FDMA (ICD Ed. 5.1 §3.3.1.4): f = base + k · step, k in −7…+6.
_GLO_BASE_HZ = (np.nan, 1602.0e6, 1246.0e6)
_GLO_STEP_HZ = (np.nan, 0.5625e6, 0.4375e6)


def sat_id(system: str, prn: int) -> int:
    """Satellite id from a RINEX system letter and number (``sat_id("E", 11) == 211``)."""
    if len(system) != 1 or system not in SYSTEMS or not 0 < prn < 100:
        raise ValueError(f"bad satellite {system}{prn}")
    return SYSTEMS.index(system) * 100 + prn


def sat_name(sat: int) -> str:
    """RINEX form of a satellite id (``sat_name(211) == "E11"``)."""
    return f"{SYSTEMS[sat // 100]}{sat % 100:02d}"


def system_of(sat: int) -> str:
    return SYSTEMS[sat // 100]


def signal_code(name: str) -> int:
    """Pack a RINEX 3 observation code ("1C", "5Q") into an integer."""
    if len(name) != 2 or not name[0].isdigit() or not "A" <= name[1] <= "Z":
        raise ValueError(f"bad RINEX signal code {name!r}")
    return int(name[0]) * 32 + (ord(name[1]) - ord("A"))


def signal_name(code: int) -> str:
    return f"{code // 32}{chr(ord('A') + code % 32)}"


def carrier_frequency_hz(system: str, band: int, glo_channel: int | None = None) -> float:
    """Carrier frequency of one band (NaN if unknown, e.g. GLONASS FDMA without a channel)."""
    s = SYSTEMS.index(system)
    if system == "R" and band in (1, 2):
        if glo_channel is None:
            return float("nan")
        return _GLO_BASE_HZ[band] + glo_channel * _GLO_STEP_HZ[band]
    return float(_FREQ_TABLE[s, band])


def frequencies_hz(
    sat: npt.NDArray[np.int16],
    sig: npt.NDArray[np.uint16],
    glo_channel: npt.NDArray[np.int8] | None = None,
) -> npt.NDArray[np.float64]:
    """Vectorised carrier frequency per cell; ``glo_channel`` is per cell (``GLO_NO_CHANNEL`` = unknown)."""
    sys_idx = sat.astype(np.intp) // 100
    band = sig.astype(np.intp) // 32
    out = _FREQ_TABLE[sys_idx, band].copy()
    glo = (sys_idx == 1) & ((band == 1) | (band == 2))
    if glo.any():
        if glo_channel is None:
            out[glo] = np.nan
        else:
            k = glo_channel[glo].astype(np.float64)
            k[glo_channel[glo] == GLO_NO_CHANNEL] = np.nan
            b = band[glo]
            out[glo] = np.where(b == 1, 1602.0e6 + k * 0.5625e6, 1246.0e6 + k * 0.4375e6)
    return out
