"""MSM epoch times (RTCM 10403.3 Table 3.5-78) to full GPS time, in integer milliseconds.

GPS, Galileo, QZSS, SBAS and NavIC send ms of the GPS-aligned week (DF004, DF248, DF428, DF546);
BeiDou sends BDT ms of week (DF427; BDT = GPST − 14 s, BDS-SIS-ICD-B1I §5.1.3); GLONASS sends the
day of week (DF416, 0 = Sunday, 7 = unknown) and ms of day (DF034) in UTC(SU) + 3 h (GLONASS ICD
§3.3.3), so it needs GPS − UTC leap seconds. Integer ms keep every constellation of one epoch on
exactly the same value; float seconds of a full GPS time would not (``GpsTime.from_total``).
"""

from __future__ import annotations

import functools
from typing import TYPE_CHECKING, Final

from ._gnsstime import BDS_GPS_OFFSET_S, GpsTime, leap_seconds_at
from ._twin import slots_twin

if TYPE_CHECKING:
    from ._msm import MsmHead, MsmMessage

__all__ = [
    "BDS_OFFSET_MS",
    "DAY_MS",
    "LEAP_NOW_S",
    "WEEK_MS",
    "gps_ms_of_day",
    "leap_at",
    "msm_gps_tow_ms",
    "resolve_epoch",
]

DAY_MS: Final = 86_400_000
WEEK_MS: Final = 604_800_000
_GLO_UTC_OFFSET_MS: Final = 10_800_000  # GLONASS time = UTC(SU) + 3 h (GLONASS ICD §3.3.3)
BDS_OFFSET_MS: Final = round(BDS_GPS_OFFSET_S * 1000)  # BDT = GPST − 14 s
_GLO_DAY_UNKNOWN: Final = 7  # DF416: 7 = day of week unknown
#: GPS − UTC today (IERS Bulletin C: 18 s since 2017-01-01), used only to group messages before
#: any reference time is known; each epoch is resolved with the leap second of its own date.
LEAP_NOW_S: Final = 18


def msm_gps_tow_ms(msg: MsmMessage | MsmHead, leap_s: int) -> int | None:
    """GPS ms of week of an MSM epoch (``None`` for GLONASS with an unknown day of week).

    Integer milliseconds so that every constellation of one epoch lands on the same value.
    """
    if msg.system == "R":
        if msg.glonass_day == _GLO_DAY_UNKNOWN:
            return None
        glo_ms = msg.glonass_day * DAY_MS + msg.epoch_ms
        return (glo_ms - _GLO_UTC_OFFSET_MS + leap_s * 1000) % WEEK_MS
    if msg.system == "C":
        return (msg.epoch_ms + BDS_OFFSET_MS) % WEEK_MS
    return msg.epoch_ms % WEEK_MS


def gps_ms_of_day(msg: MsmMessage | MsmHead, leap_s: int) -> int:
    """GPS ms of day of an MSM epoch (defined even when the GLONASS day is unknown)."""
    if msg.system == "R":
        return (msg.epoch_ms - _GLO_UTC_OFFSET_MS + leap_s * 1000) % DAY_MS
    tow = msm_gps_tow_ms(msg, leap_s)
    assert tow is not None
    return tow % DAY_MS


#: Plain twin of GpsTime (see ``_twin``): ``_at`` stores the fields and sets the class, without
#: the frozen ``__init__``'s ``object.__setattr__`` per field and its range check, which cannot
#: fail there (0 <= ms < WEEK_MS, so 0 <= ms / 1000.0 < 604800.0 after rounding).
_GpsTimeSlots = slots_twin(GpsTime)


def _at(week: int, tow_ms: int) -> GpsTime:
    """``GpsTime(week + week_shift, tow_ms / 1000.0)`` with the ms wrapped into the week."""
    week_shift, tow_ms = divmod(tow_ms, WEEK_MS)
    t = _GpsTimeSlots()
    t.week = week + week_shift
    t.tow_s = tow_ms / 1000.0
    t.__class__ = GpsTime
    result: GpsTime = t
    return result


@functools.lru_cache(maxsize=8)
def _leap_on_gps_day(gps_day: int) -> int:
    """GPS − UTC (s) at noon of a GPS day: leap seconds only change at a UTC day's end."""
    return leap_seconds_at(GpsTime.from_total(gps_day * 86_400.0 + 43_200.0).to_utc())


def leap_at(ref: GpsTime) -> int:
    return _leap_on_gps_day(int(ref.total_s // 86_400.0))


def resolve_epoch(msg: MsmMessage | MsmHead, ref: GpsTime, leap_s: int | None = None) -> GpsTime:
    """Full GPS time of an MSM epoch nearest to ``ref`` (week and day rollovers), exact to 1 ms.

    ``leap_s``: ``leap_at(ref)`` when the caller already has it (a stream keeps it per reference).
    """
    leap = leap_at(ref) if leap_s is None else leap_s
    ref_ms = round(ref.tow_s * 1000.0)
    tow = msm_gps_tow_ms(msg, leap)
    if tow is not None:
        delta = (tow - ref_ms + WEEK_MS // 2) % WEEK_MS - WEEK_MS // 2
    else:
        sod = gps_ms_of_day(msg, leap)
        delta = (sod - ref_ms + DAY_MS // 2) % DAY_MS - DAY_MS // 2
    return _at(ref.week, ref_ms + delta)
