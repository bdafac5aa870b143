"""RINEX civil epochs (year … seconds in a named time system) to one continuous GPS time.

RINEX 3.05 §3.4 / Table A2 "TIME OF FIRST OBS" names the time system of a file's epochs: GPS (GPST),
GAL (GST, aligned with GPST), QZS and IRN (aligned with GPST), BDT (GPST − 14 s) and GLO (UTC(SU),
i.e. UTC: RINEX writes GLONASS epochs in UTC, not in Moscow time).
"""

from __future__ import annotations

import datetime as _dt

from ._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime, leap_seconds_at

__all__ = ["civil_to_gps", "civil_tow_s", "two_digit_year"]

_GPS_EPOCH_ORDINAL = _dt.date(1980, 1, 6).toordinal()
#: Time systems whose clock reads GPS time (GST is steered to GPST for our purpose).
_GPS_ALIGNED = frozenset({"GPS", "GAL", "QZS", "IRN", ""})


def two_digit_year(yy: int) -> int:
    """RINEX 2 years: 80–99 → 1980–1999, 00–79 → 2000–2079 (RINEX 2.11 §6.5)."""
    return yy + (1900 if yy >= 80 else 2000)


def civil_tow_s(
    year: int, month: int, day: int, hour: int, minute: int, second: float
) -> tuple[int, float]:
    """(week, seconds of week) of a civil epoch counted as if it were GPS time (no offsets)."""
    days = _dt.date(year, month, day).toordinal() - _GPS_EPOCH_ORDINAL
    week, dow = divmod(days, 7)
    return week, dow * 86_400.0 + hour * 3600.0 + minute * 60.0 + second


def civil_to_gps(
    year: int,
    month: int,
    day: int,
    hour: int,
    minute: int,
    second: float,
    time_system: str = "GPS",
) -> GpsTime:
    """GPS time of a RINEX epoch written in ``time_system`` (raises ValueError if unknown)."""
    week, tow = civil_tow_s(year, month, day, hour, minute, second)
    if time_system in _GPS_ALIGNED:
        pass
    elif time_system == "BDT":
        tow += BDS_GPS_OFFSET_S
    elif time_system in ("GLO", "UTC"):
        utc = _dt.datetime(year, month, day, hour, minute, tzinfo=_dt.UTC)
        tow += leap_seconds_at(utc)
    else:
        raise ValueError(f"unknown RINEX time system {time_system!r}")
    if tow >= SECONDS_PER_WEEK:
        week, tow = week + 1, tow - SECONDS_PER_WEEK
    return GpsTime(week, tow)
