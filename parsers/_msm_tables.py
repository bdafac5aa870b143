"""Constant tables for RTCM 3 Multiple Signal Messages (RTCM 10403.3 §3.5.12, MSM4–MSM7).

Every layout below quotes the table it comes from. Field names are the RTCM data-field numbers
(DFnnn); widths are bits; ``s`` marks two's complement ``intN``, ``u`` marks ``uintN``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

import numpy as np
import numpy.typing as npt

from ._signals import SYSTEMS, signal_code

__all__ = [
    "CELL_FIELDS",
    "HEADER_BITS",
    "LOCK_TIME_DF402_S",
    "LOCK_TIME_DF407_S",
    "MSM_SYSTEMS",
    "SAT_FIELDS",
    "SPEED_OF_LIGHT_MPS",
    "MsmSystem",
    "msm_system",
]

#: IS-GPS-200 §20.3.4.3 value of c; RTCM 10403.3 §3.5.12 uses the same c for "light milliseconds".
SPEED_OF_LIGHT_MPS: Final = 299_792_458.0

# RTCM 10403.3 Table 3.5-78 (MSM header): DF002 12, DF003 12, epoch time 30 (GLONASS: DF416 3 +
# DF034 27), DF393 1, DF409 3, DF001 7 reserved, DF411 2, DF412 2, DF417 1, DF418 3, DF394 64,
# DF395 32, then DF396 (the cell mask) of NSat × NSig bits.
HEADER_BITS: Final = 169

#: Satellite data per MSM level, in transmission order: (name, width, signed). Each field is sent
#: for all satellites before the next field starts.
#: MSM4 Table 3.5-81 / MSM6 Table 3.5-85: DF397 uint8, DF398 uint10.
#: MSM5 Table 3.5-83 / MSM7 Table 3.5-87: DF397 uint8, extended satellite info uint4 (GLONASS:
#: DF419 frequency channel + 7), DF398 uint10, DF399 int14.
SAT_FIELDS: Final[dict[int, tuple[tuple[str, int, bool], ...]]] = {
    4: (("DF397", 8, False), ("DF398", 10, False)),
    5: (("DF397", 8, False), ("EXT", 4, False), ("DF398", 10, False), ("DF399", 14, True)),
    6: (("DF397", 8, False), ("DF398", 10, False)),
    7: (("DF397", 8, False), ("EXT", 4, False), ("DF398", 10, False), ("DF399", 14, True)),
}

#: Signal (cell) data per MSM level, in transmission order; each field for all cells in turn.
#: MSM4 Table 3.5-82: DF400 int15, DF401 int22, DF402 uint4, DF420 bit1, DF403 uint6.
#: MSM5 Table 3.5-84: as MSM4, then DF404 int15.
#: MSM6 Table 3.5-86: DF405 int20, DF406 int24, DF407 uint10, DF420 bit1, DF408 uint10.
#: MSM7 Table 3.5-88: as MSM6, then DF404 int15.
CELL_FIELDS: Final[dict[int, tuple[tuple[str, int, bool], ...]]] = {
    4: (
        ("DF400", 15, True),
        ("DF401", 22, True),
        ("DF402", 4, False),
        ("DF420", 1, False),
        ("DF403", 6, False),
    ),
    5: (
        ("DF400", 15, True),
        ("DF401", 22, True),
        ("DF402", 4, False),
        ("DF420", 1, False),
        ("DF403", 6, False),
        ("DF404", 15, True),
    ),
    6: (
        ("DF405", 20, True),
        ("DF406", 24, True),
        ("DF407", 10, False),
        ("DF420", 1, False),
        ("DF408", 10, False),
    ),
    7: (
        ("DF405", 20, True),
        ("DF406", 24, True),
        ("DF407", 10, False),
        ("DF420", 1, False),
        ("DF408", 10, False),
        ("DF404", 15, True),
    ),
}


def _lock_df402() -> npt.NDArray[np.float32]:
    # RTCM 10403.3 Table 3.5-74: indicator 0 → 0 ms, i ≥ 1 → 2^(i+4) ms minimum lock time.
    ms = np.array([0] + [2 ** (i + 4) for i in range(1, 16)], np.float64)
    return (ms / 1000.0).astype(np.float32)


def _lock_df407() -> npt.NDArray[np.float32]:
    # RTCM 10403.3 Table 3.5-75: 0–63 → i ms; for 32n ≤ i < 32n+32 (n = 2…21):
    # 2^(n−1)·i − offset ms, continuous at each range start (64 → 64 ms, 96 → 128 ms, …);
    # 704 → 67 108 864 ms; 705–1023 reserved (NaN).
    ms = np.full(1024, np.nan)
    ms[:64] = np.arange(64)
    for n in range(2, 22):
        i = np.arange(32 * n, 32 * n + 32)
        ms[i] = 2.0 ** (n - 1) * (i - 32 * n) + 2.0 ** (n + 4)
    ms[704] = 67_108_864.0
    return (ms / 1000.0).astype(np.float32)


#: Minimum lock time (s) by DF402 indicator.
LOCK_TIME_DF402_S: Final = _lock_df402()
#: Minimum lock time (s) by DF407 indicator (NaN for reserved values).
LOCK_TIME_DF407_S: Final = _lock_df407()
LOCK_TIME_DF402_S.setflags(write=False)
LOCK_TIME_DF407_S.setflags(write=False)


@dataclass(frozen=True, slots=True, kw_only=True)
class MsmSystem:
    """Per-constellation MSM facts: message block, satellite numbering, signal table, time scale."""

    letter: str
    #: First message number of the block (1071 for GPS MSM1), so MSM level = type − base + 1.
    base: int
    #: Satellite id of mask bit 1 minus one (satellite id = sat_base + bit).
    sat_base: int
    #: Packed RINEX signal code by DF395 signal id 1…32 (index 0 unused; 0 = undefined id).
    signals: npt.NDArray[np.uint16]
    #: "tow" (ms of week, GPS-aligned), "bdt" (BDT ms of week) or "glo" (DF416 day + DF034 ms of day).
    time_scale: str


def _signal_table(entries: dict[int, str]) -> npt.NDArray[np.uint16]:
    table = np.zeros(33, np.uint16)
    for sig_id, rinex in entries.items():
        table[sig_id] = signal_code(rinex)
    table.setflags(write=False)
    return table


# RTCM 10403.3 Table 3.5-91 (GPS signal ids).
_GPS = {2: "1C", 3: "1P", 4: "1W", 8: "2C", 9: "2P", 10: "2W", 15: "2S", 16: "2L", 17: "2X",
        22: "5I", 23: "5Q", 24: "5X", 30: "1S", 31: "1L", 32: "1X"}  # fmt: skip
# RTCM 10403.3 Table 3.5-96 (GLONASS signal ids).
_GLO = {2: "1C", 3: "1P", 8: "2C", 9: "2P"}
# RTCM 10403.3 Table 3.5-99 (Galileo signal ids).
_GAL = {2: "1C", 3: "1A", 4: "1B", 5: "1X", 6: "1Z", 8: "6C", 9: "6A", 10: "6B", 11: "6X",
        12: "6Z", 14: "7I", 15: "7Q", 16: "7X", 18: "8I", 19: "8Q", 20: "8X", 22: "5I",
        23: "5Q", 24: "5X"}  # fmt: skip
# RTCM 10403.3 Table 3.5-102 (SBAS signal ids).
_SBS = {2: "1C", 22: "5I", 23: "5Q", 24: "5X"}
# RTCM 10403.3 Table 3.5-105 (QZSS signal ids).
_QZS = {2: "1C", 9: "6S", 10: "6L", 11: "6X", 15: "2S", 16: "2L", 17: "2X", 22: "5I", 23: "5Q",
        24: "5X", 30: "1S", 31: "1L", 32: "1X"}  # fmt: skip
# RTCM 10403.3 Table 3.5-108 (BeiDou signal ids, with the BDS-3 additions of Amendment 1).
_BDS = {2: "2I", 3: "2Q", 4: "2X", 8: "6I", 9: "6Q", 10: "6X", 14: "7I", 15: "7Q", 16: "7X",
        22: "5D", 23: "5P", 24: "5X", 25: "7D", 30: "1D", 31: "1P", 32: "1X"}  # fmt: skip
# NavIC/IRNSS signal ids (RTCM 10403.3 Amendment 2 NavIC table, from memory): 22 → L5 SPS "5A".
_IRN = {22: "5A"}

#: MSM systems by message block (message number // 10: 107 → GPS 1071–1077, …).
MSM_SYSTEMS: Final[dict[int, MsmSystem]] = {
    107: MsmSystem(letter="G", base=1071, sat_base=0, signals=_signal_table(_GPS), time_scale="tow"),
    108: MsmSystem(letter="R", base=1081, sat_base=100, signals=_signal_table(_GLO), time_scale="glo"),
    109: MsmSystem(letter="E", base=1091, sat_base=200, signals=_signal_table(_GAL), time_scale="tow"),
    # SBAS mask bit 1 is PRN 120 (RTCM 10403.3 §3.5.12.3), RINEX S20 → id 520.
    110: MsmSystem(letter="S", base=1101, sat_base=519, signals=_signal_table(_SBS), time_scale="tow"),
    # QZSS mask bit 1 is PRN 193 = RINEX J01.
    111: MsmSystem(letter="J", base=1111, sat_base=400, signals=_signal_table(_QZS), time_scale="tow"),
    112: MsmSystem(letter="C", base=1121, sat_base=300, signals=_signal_table(_BDS), time_scale="bdt"),
    113: MsmSystem(letter="I", base=1131, sat_base=600, signals=_signal_table(_IRN), time_scale="tow"),
}  # fmt: skip
assert all(SYSTEMS.index(s.letter) * 100 <= s.sat_base < SYSTEMS.index(s.letter) * 100 + 100
           for s in MSM_SYSTEMS.values())  # fmt: skip


def msm_system(msg_type: int) -> tuple[MsmSystem, int] | None:
    """(system, MSM level 1…7) for an MSM message number, else None."""
    system = MSM_SYSTEMS.get(msg_type // 10)
    if system is None:
        return None
    level = msg_type - system.base + 1
    if not 1 <= level <= 7:
        return None
    return system, level
