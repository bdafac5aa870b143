"""GNSS time scales, resolved to one continuous GPS time.

``GpsTime`` is the time tag carried by every decoded epoch: full GPS week and seconds of week. GPS
time started 1980-01-06T00:00:00 UTC (IS-GPS-200 §3.3.4). Galileo System Time is aligned with GPS
for our purpose; BeiDou Time is GPS time − 14 s (BDS-SIS-ICD-B1I §5.1.3: BDT started
2006-01-01T00:00:00 UTC, when GPS−UTC was 14 s); GLONASS time is UTC(SU) + 3 h (GLONASS ICD §3.3.3).
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

__all__ = [
    "BDS_GPS_OFFSET_S",
    "GPS_EPOCH",
    "LEAP_SECONDS",
    "SECONDS_PER_WEEK",
    "GpsTime",
    "gps_to_utc",
    "leap_seconds_at",
    "utc_to_gps",
]

SECONDS_PER_WEEK = 604_800.0
SECONDS_PER_DAY = 86_400.0
GPS_EPOCH = _dt.datetime(1980, 1, 6, tzinfo=_dt.UTC)
#: BDT = GPST − 14 s (BDS-SIS-ICD-B1I-3.0 §5.1.3).
BDS_GPS_OFFSET_S = 14.0

#: GPS − UTC in seconds, from the date each value took effect (IERS Bulletin C; the value has been
#: 18 s since 2017-01-01 and no leap second is announced up to 2026).
LEAP_SECONDS: tuple[tuple[_dt.datetime, int], ...] = (
    (_dt.datetime(2006, 1, 1, tzinfo=_dt.UTC), 14),
    (_dt.datetime(2009, 1, 1, tzinfo=_dt.UTC), 15),
    (_dt.datetime(2012, 7, 1, tzinfo=_dt.UTC), 16),
    (_dt.datetime(2015, 7, 1, tzinfo=_dt.UTC), 17),
    (_dt.datetime(2017, 1, 1, tzinfo=_dt.UTC), 18),
)


def leap_seconds_at(utc: _dt.datetime) -> int:
    """GPS − UTC (s) in force at ``utc`` (13 before 2006; our data starts later)."""
    # The table is in date order: the newest entry in force is the first one from the end.
    for start, leap in reversed(LEAP_SECONDS):
        if utc >= start:
            return leap
    return 13


@dataclass(frozen=True, slots=True, order=True)
class GpsTime:
    """Full GPS week and seconds of week (``0 <= tow_s < 604800``)."""

    week: int
    tow_s: float

    def __post_init__(self) -> None:
        if not 0.0 <= self.tow_s < SECONDS_PER_WEEK:
            raise ValueError(f"tow_s out of range: {self.tow_s}")

    @property
    def total_s(self) -> float:
        """Seconds since the GPS epoch (continuous; float64 keeps ~0.2 µs at today's dates)."""
        return self.week * SECONDS_PER_WEEK + self.tow_s

    @classmethod
    def from_total(cls, total_s: float) -> GpsTime:
        week, tow = divmod(total_s, SECONDS_PER_WEEK)
        return cls(int(week), float(tow))

    def __add__(self, seconds: float) -> GpsTime:
        # Week and seconds-of-week arithmetic: going through total seconds would lose ~0.1 µs.
        week_shift, tow = divmod(self.tow_s + seconds, SECONDS_PER_WEEK)
        return GpsTime(self.week + int(week_shift), float(tow))

    def __sub__(self, other: GpsTime) -> float:
        return (self.week - other.week) * SECONDS_PER_WEEK + (self.tow_s - other.tow_s)

    def resolve_tow(self, tow_s: float) -> GpsTime:
        """The full time whose seconds-of-week is ``tow_s`` nearest to this reference (week rollover)."""
        delta = tow_s - self.tow_s
        week = self.week
        if delta > SECONDS_PER_WEEK / 2:
            week -= 1
        elif delta < -SECONDS_PER_WEEK / 2:
            week += 1
        return GpsTime(week, tow_s)

    def to_utc(self) -> _dt.datetime:
        return gps_to_utc(self)


#: ``timedelta(seconds=leap)`` of every GPS − UTC value of the table (immutable: made once).
_LEAP_DELTAS = {leap: _dt.timedelta(seconds=leap) for leap in (13, *dict(LEAP_SECONDS).values())}


def gps_to_utc(t: GpsTime) -> _dt.datetime:
    """UTC of a GPS time, using the leap-second table."""
    approx = GPS_EPOCH + _dt.timedelta(seconds=t.total_s)
    leap = leap_seconds_at(approx - _LEAP_DELTAS[leap_seconds_at(approx)])
    return approx - _LEAP_DELTAS[leap]


def utc_to_gps(utc: _dt.datetime) -> GpsTime:
    """GPS time of a UTC instant (``utc`` must be timezone-aware)."""
    if utc.tzinfo is None:
        raise ValueError("utc must be timezone-aware")
    seconds = (utc - GPS_EPOCH).total_seconds() + leap_seconds_at(utc)
    return GpsTime.from_total(seconds)
