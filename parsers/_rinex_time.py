"""RINEX civil epochs (year … seconds in a named time system) to one continuous GPS time.

RINEX 3.05 §3.4 / Table A2 "TIME OF FIRST OBS" names the time system of a file's epochs: GPS (GPST),
GAL (GST, aligned with GPST), QZS and IRN (aligned with GPST), BDT (GPST − 14 s) and GLO (UTC(SU),
i.e. UTC: RINEX writes GLONASS epochs in UTC, not in Moscow time).
"""

from __future__ import annotations

import datetime as _dt

from ._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime, leap_seconds_at

__all__ = [
    "Civil",
    "civil_from_week",
    "civil_to_gps",
    "civil_tow_s",
    "gps_to_civil",
    "two_digit_year",
]

#: A RINEX civil epoch: year, month, day, hour, minute, seconds.
Civil = tuple[int, int, int, int, int, float]
_GPS_EPOCH_ORDINAL = _dt.date(1980, 1, 6).toordinal()
#: Time systems whose clock reads GPS time (GST is steered to GPST for our purpose).
_GPS_ALIGNED = frozenset({"GPS", "GAL", "QZS", "IRN", ""})


def two_digit_year(yy: int) -> int:
    """RINEX 2 years: 80–99 → 1980–1999, 00–79 → 2000–2079 (RINEX 2.11 §6.5)."""
    return yy + (1900 if yy >= 80 else 2000)


def civil_tow_s(civil: Civil) -> tuple[int, float]:
    """(week, seconds of week) of a civil epoch counted as if it were GPS time (no offsets)."""
    year, month, day, hour, minute, second = civil
    days = _dt.date(year, month, day).toordinal() - _GPS_EPOCH_ORDINAL
    week, dow = divmod(days, 7)
    return week, dow * 86_400.0 + hour * 3600.0 + minute * 60.0 + second


def civil_to_gps(civil: Civil, time_system: str = "GPS") -> GpsTime:
    """GPS time of a RINEX epoch written in ``time_system`` (raises ValueError if unknown)."""
    week, tow = civil_tow_s(civil)
    if time_system in _GPS_ALIGNED:
        pass
    elif time_system == "BDT":
        tow += BDS_GPS_OFFSET_S
    elif time_system in ("GLO", "UTC"):
        utc = _dt.datetime(*civil[:5], tzinfo=_dt.UTC)
        tow += leap_seconds_at(utc)
    else:
        raise ValueError(f"unknown RINEX time system {time_system!r}")
    if tow >= SECONDS_PER_WEEK:
        week, tow = week + 1, tow - SECONDS_PER_WEEK
    return GpsTime(week, tow)


def civil_from_week(week: int, tow_s: float) -> Civil:
    """Civil (y, m, d, h, min, s) of a week + seconds count from 1980-01-06 (inverse of
    :func:`civil_tow_s`; also right for BDT weeks offset by 1356, whose epoch is 2006-01-01)."""
    days, sod = divmod(tow_s, 86_400.0)
    day = _dt.date.fromordinal(_GPS_EPOCH_ORDINAL + week * 7 + int(days))
    hour, rem = divmod(sod, 3600.0)
    minute, second = divmod(rem, 60.0)
    return day.year, day.month, day.day, int(hour), int(minute), second


def gps_to_civil(t: GpsTime, time_system: str = "GPS") -> Civil:
    """Civil epoch, written in ``time_system``, of a GPS time (inverse of :func:`civil_to_gps`)."""
    week, tow = t.week, t.tow_s
    if time_system in _GPS_ALIGNED:
        pass
    elif time_system == "BDT":
        tow -= BDS_GPS_OFFSET_S
    elif time_system in ("GLO", "UTC"):
        approx = _dt.datetime(1980, 1, 6, tzinfo=_dt.UTC) + _dt.timedelta(seconds=t.total_s)
        tow -= leap_seconds_at(approx - _dt.timedelta(seconds=leap_seconds_at(approx)))
    else:
        raise ValueError(f"unknown RINEX time system {time_system!r}")
    if tow < 0.0:
        week, tow = week - 1, tow + SECONDS_PER_WEEK
    return civil_from_week(week, tow)
