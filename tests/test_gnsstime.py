"""GPS time arithmetic and conversions."""

from __future__ import annotations

import datetime as dt

import pytest

from ionwarden.parsers import GpsTime, gps_to_utc, leap_seconds_at, utc_to_gps


def test_gpstime_resolve_tow_keeps_millisecond_exact() -> None:
    """GpsTime.resolve_tow keeps a 1 ms time of week exact (no float round trip through total s)."""
    assert GpsTime(2300, 5.0).resolve_tow(0.001).tow_s == 0.001


@pytest.mark.parametrize(
    ("ref", "tow", "week"),
    [
        ((2300, 604_799.0), 1.0, 2301),
        ((2301, 1.0), 604_799.0, 2300),
        ((2300, 300_000.0), 300_100.0, 2300),
    ],
)
def test_gpstime_resolve_tow_across_week_rollover(ref, tow, week) -> None:
    """resolve_tow picks the week that puts the time nearest the reference (week rollover)."""
    assert GpsTime(*ref).resolve_tow(tow) == GpsTime(week, tow)


def test_gpstime_add_and_subtract_roll_weeks() -> None:
    """Adding seconds rolls the week; subtraction gives seconds."""
    t = GpsTime(2300, 604_799.5) + 1.0
    assert t == GpsTime(2301, 0.5)
    assert t - GpsTime(2300, 604_799.5) == 1.0


def test_gps_to_utc_applies_18_leap_seconds() -> None:
    """GPS − UTC = 18 s since 2017-01-01 (IERS Bulletin C; IS-GPS-200 §20.3.3.5.2.4 ΔtLS)."""
    t = GpsTime(2300, 5.0)  # 1980-01-06 + 2300 weeks = 2024-02-04 00:00:05 GPS
    assert gps_to_utc(t) == dt.datetime(2024, 2, 3, 23, 59, 47, tzinfo=dt.UTC)
    assert utc_to_gps(gps_to_utc(t)) == t
    assert leap_seconds_at(dt.datetime(2016, 12, 31, tzinfo=dt.UTC)) == 17
