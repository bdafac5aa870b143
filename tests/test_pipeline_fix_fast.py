"""The fix reports' cheaper steps (StationPipeline._utc_time's day choice, FixStatus built by
``new_fix_status``) give the values of the code they replaced.

Oracle: the previous code path, kept here verbatim (``_utc_time_reference``: the min() over the day
before, the day and the day after by |total_seconds()|, the first of equal ones; ``FixStatus(…)``
through its dataclass ``__init__``). Compared exactly: GpsTime week and tow_s, FixStatus fields by
``repr`` (NaN = NaN, -0.0 ≠ 0.0). Inputs: generated epochs and times of day, the ±12 h ties and
midnight rollovers on purpose. One difference by design: the old code also built the two days it
did not take, so an epoch on 0001-01-01 or 9999-12-31 raised OverflowError there; GPS time cannot
reach those dates.
"""

from __future__ import annotations

import datetime as dt
import math

from hypothesis import given
from hypothesis import strategies as st

from ionwarden.daemon.estimator import FixStatus, StationPipeline
from ionwarden.daemon.estimator._snapshot import new_fix_status
from ionwarden.parsers import GpsTime, utc_to_gps


def _utc_time_reference(last_t: GpsTime, tod: dt.time) -> GpsTime:
    """StationPipeline._utc_time before this change (both non-None)."""
    ref = last_t.to_utc()
    cand = dt.datetime.combine(ref.date(), tod, tzinfo=dt.UTC)
    best = cand + dt.timedelta(days=-1)
    gap = abs((best - ref).total_seconds())
    for c in (cand, cand + dt.timedelta(days=1)):
        g = abs((c - ref).total_seconds())
        if g < gap:
            best, gap = c, g
    return utc_to_gps(best)


def _new_way(last_t: GpsTime, tod: dt.time) -> GpsTime | None:
    pipe = StationPipeline("T")
    pipe._last_t = last_t
    return pipe._utc_time(tod)


def _same(a: GpsTime | None, b: GpsTime) -> None:
    assert a is not None
    assert (a.week, a.tow_s.hex()) == (b.week, b.tow_s.hex())


_WEEKS = st.integers(min_value=1, max_value=4000)
_TOWS = st.floats(min_value=0.0, max_value=604_799.999999, allow_nan=False)
_TODS = st.times()


@given(_WEEKS, _TOWS, _TODS)
def test_utc_time_day_choice_as_before(week: int, tow: float, tod: dt.time) -> None:
    last_t = GpsTime(week, tow)
    _same(_new_way(last_t, tod), _utc_time_reference(last_t, tod))


@given(_WEEKS, st.integers(min_value=0, max_value=604_799), st.sampled_from([-1, 0, 1]))
def test_utc_time_ties_and_rollovers(week: int, tow_s: int, jitter_us: int) -> None:
    """Times of day exactly 12 h (± 1 µs) from the epoch's UTC time, and just past midnight."""
    last_t = GpsTime(week, float(tow_s))
    ref = last_t.to_utc()
    for shift in (dt.timedelta(hours=12), dt.timedelta(hours=-12), dt.timedelta(0)):
        t = (ref + shift + dt.timedelta(microseconds=jitter_us)).time()
        _same(_new_way(last_t, t), _utc_time_reference(last_t, t))
    for tod in (dt.time(0, 0, 0), dt.time(23, 59, 59, 999_999), dt.time(12, 0, 0)):
        _same(_new_way(last_t, tod), _utc_time_reference(last_t, tod))


@given(
    st.one_of(st.none(), st.builds(GpsTime, _WEEKS, _TOWS)),
    st.integers(min_value=0, max_value=9),
    st.integers(min_value=0, max_value=99),
    st.floats(allow_nan=True),
    st.floats(allow_nan=True),
)
def test_fix_status_built_as_before(
    time: GpsTime | None, quality: int, n_used: int, hdop: float, sigma: float
) -> None:
    values = {
        "station": "ST00",
        "time": time,
        "quality": quality,
        "n_sats_used": n_used,
        "hdop": hdop,
        "sigma_lat_m": sigma,
        "sigma_lon_m": -sigma,
        "sigma_alt_m": math.nan,
    }
    new, ref = new_fix_status(**values), FixStatus(**values)  # type: ignore[arg-type]
    assert type(new) is FixStatus
    assert repr(new) == repr(ref)
    assert new == ref or math.isnan(hdop) or math.isnan(sigma)
