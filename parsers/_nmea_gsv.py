"""NMEA 0183 satellite numbering, signal bands and GSV group assembly.

GSV sentences (NMEA 0183 §6.3 GSV) list up to four satellites each; a group of ``n_msgs`` sentences
per talker and (NMEA 4.10+) signal id makes one :class:`SatellitesInView`, whose arrays are what the
estimator reads (structure of arrays, read-only).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._signals import sat_id

__all__ = [
    "SYSTEM_ID",
    "TALKER_SYSTEM",
    "GsvAssembler",
    "GsvPart",
    "SatellitesInView",
    "nmea_sat_id",
    "signal_band",
]

#: Sentences per GSV group we accept: a constellation with 64 satellites in view at four per
#: sentence needs 16 (NMEA 0183 §6.3 GSV); twice that is a generous bound for one partial group.
MAX_GSV_SENTENCES = 32


@dataclass(frozen=True, slots=True, kw_only=True)
class GsvPart:
    """One GSV sentence (NMEA 0183 §6.3 GSV); :class:`GsvAssembler` joins a group."""

    talker: str
    n_msgs: int
    msg_num: int
    n_in_view: int
    signal_id: str | None  # NMEA 4.10+ signal id as sent (hex digit), None before 4.10
    svids: tuple[int, ...]
    elevation_deg: tuple[float, ...]
    azimuth_deg: tuple[float, ...]
    cn0_dbhz: tuple[float, ...]


@dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class SatellitesInView:
    """One complete GSV group for a talker and signal: arrays indexed alike (read-only).

    ``band`` is the RINEX band digit of ``signal_id`` (0 for "all signals"/unknown); without a
    signal id (NMEA before 4.10) the system's primary open signal is assumed (1; BeiDou B1I: 2).
    """

    talker: str
    system: str  # RINEX system letter
    signal_id: str | None
    band: int
    n_in_view: int
    sat: npt.NDArray[np.int16]
    elevation_deg: npt.NDArray[np.float64]
    azimuth_deg: npt.NDArray[np.float64]
    cn0_dbhz: npt.NDArray[np.float64]


#: Talker → RINEX system letter (NMEA 0183 §6.1.1 talker ids; GN = combined, decided per number).
TALKER_SYSTEM = {
    "GP": "G",
    "GL": "R",
    "GA": "E",
    "GB": "C",
    "BD": "C",
    "GQ": "J",
    "QZ": "J",
    "GI": "I",
}
#: NMEA 4.10+ GNSS system id → RINEX system letter (NMEA 0183 4.11 Table 20, from memory).
SYSTEM_ID = {1: "G", 2: "R", 3: "E", 4: "C", 5: "J", 6: "I"}


def nmea_sat_id(system: str | None, n: int) -> int | None:
    """Our satellite id for NMEA satellite number ``n`` of ``system`` (None: combined numbering).

    NMEA 4.11 numbers satellites per system (GPS 1–32, SBAS 33–64 = PRN − 87, GLONASS 65–96 =
    slot + 64, Galileo 1–36, BeiDou 1–63, QZSS 1–10, NavIC 1–14); receivers with the older
    combined numbering also send QZSS 193–202, Galileo 301–336 and BeiDou 401–463 (u-blox
    convention, from memory). Returns None for numbers that fit neither.
    """
    try:
        if 33 <= n <= 64 and system in (None, "G"):
            return sat_id("S", n - 13)  # SBAS PRN n + 87 → RINEX S(PRN − 100)
        if 65 <= n <= 96 and system in (None, "R"):
            return sat_id("R", n - 64)
        if 193 <= n <= 202 and system in (None, "G", "J"):
            return sat_id("J", n - 192)
        if 301 <= n <= 336 and system in (None, "E"):
            return sat_id("E", n - 300)
        if 401 <= n <= 463 and system in (None, "C"):
            return sat_id("C", n - 400)
        if system is None:
            return sat_id("G", n) if 1 <= n <= 32 else None
        return sat_id(system, n)
    except ValueError:
        return None


# NMEA 0183 4.11 signal ids (Table 21, from memory) → RINEX band digit, per system.
_SIGNAL_BAND = {
    "G": {"1": 1, "2": 1, "3": 1, "4": 2, "5": 2, "6": 2, "7": 5, "8": 5},
    "R": {"1": 1, "2": 1, "3": 2, "4": 2},
    "E": {"1": 5, "2": 7, "3": 8, "4": 6, "5": 6, "6": 1, "7": 1},
    "C": {
        "1": 2,
        "2": 2,
        "3": 1,
        "4": 1,
        "5": 5,
        "6": 7,
        "7": 8,
        "8": 6,
        "9": 6,
        "A": 6,
        "B": 7,
        "C": 7,
    },
    "J": {"1": 1, "2": 1, "3": 1, "4": 1, "5": 2, "6": 2, "7": 5, "8": 5, "9": 6, "A": 6},
    "I": {"1": 5, "2": 9},
}
_PRIMARY_BAND = {"G": 1, "R": 1, "E": 1, "C": 2, "J": 1, "I": 5, "S": 1}


def signal_band(system: str, signal_id: str | None) -> int:
    if signal_id is None:
        return _PRIMARY_BAND.get(system, 0)
    return _SIGNAL_BAND.get(system, {}).get(signal_id.upper(), 0)


class GsvAssembler:
    """Joins GSV sentences into one :class:`SatellitesInView` per talker and signal id.

    A group is complete when sentence ``n_msgs`` of ``n_msgs`` arrives after 1 … n_msgs − 1 in
    order; a sentence out of order, or a new group starting before the last one ended, drops the
    partial group and counts it in ``dropped_groups``. At most one partial group is kept per
    (talker, signal id) key, and keys are few (talkers × NMEA signal ids), so memory is bounded.
    """

    __slots__ = ("_parts", "dropped_groups")

    def __init__(self) -> None:
        self._parts: dict[tuple[str, str | None], list[GsvPart]] = {}
        self.dropped_groups = 0

    def push(self, msg: object) -> SatellitesInView | None:
        """Add one decoded sentence; returns the group it completes, else None."""
        if not isinstance(msg, GsvPart):
            return None
        key = (msg.talker, msg.signal_id)
        if not 1 <= msg.msg_num <= msg.n_msgs <= MAX_GSV_SENTENCES:
            self.dropped_groups += 1 if self._parts.pop(key, None) else 0
            return None
        parts = self._parts.get(key)
        if msg.msg_num == 1:
            if parts:
                self.dropped_groups += 1
            parts = self._parts[key] = []
        elif not parts or parts[-1].msg_num + 1 != msg.msg_num or parts[-1].n_msgs != msg.n_msgs:
            if parts:
                self.dropped_groups += 1
            self._parts.pop(key, None)
            return None
        parts.append(msg)
        if msg.msg_num < msg.n_msgs:
            return None
        del self._parts[key]
        return _assemble(parts)


def _assemble(parts: list[GsvPart]) -> SatellitesInView:
    first = parts[0]
    system = TALKER_SYSTEM.get(first.talker)
    sats: list[int] = []
    elv: list[float] = []
    az: list[float] = []
    cn0: list[float] = []
    for p in parts:
        for n, e, a, c in zip(p.svids, p.elevation_deg, p.azimuth_deg, p.cn0_dbhz, strict=True):
            s = nmea_sat_id(system, n)
            if s is not None:
                sats.append(s)
                elv.append(e)
                az.append(a)
                cn0.append(c)
    letter = system or ("G" if not sats else "GRECJSI"[sats[0] // 100])
    arrays = (
        np.array(sats, dtype=np.int16),
        np.array(elv, dtype=np.float64),
        np.array(az, dtype=np.float64),
        np.array(cn0, dtype=np.float64),
    )
    for arr in arrays:
        arr.setflags(write=False)
    return SatellitesInView(
        talker=first.talker,
        system=letter,
        signal_id=first.signal_id,
        band=signal_band(letter, first.signal_id),
        n_in_view=first.n_in_view,
        sat=arrays[0],
        elevation_deg=arrays[1],
        azimuth_deg=arrays[2],
        cn0_dbhz=arrays[3],
    )
