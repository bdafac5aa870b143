"""The summary's figures with unknown (null) values and the payloads' time fields give the bytes of
the code they replace (issue 8: the summary is formatted on every station's urgent step).

Oracles: equal to the previous implementation (oracle copy): ``summary_payload``, ``iso_utc`` and
``_time_json`` as they were, kept verbatim below; and the general path (a dict of ``_num`` values
through ``encode``: Python ``round`` and ``json.dumps``) from tests/test_outputs_fastjson.py.
Inputs: invented snapshots where any figure may be NaN next to any other value (hypothesis and
edge values), the simulator's invented quiet-day stream (its first seconds have unknown ROTI, ROT
and receiver bias), invented dates from year 1 to 9999 and seconds of week with decimal ties.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.daemon.outputs import _payloads as fmt
from ionwarden.daemon.outputs._payloads import (
    _SUMMARY_FIGURES,
    _SUMMARY_HEAD,
    _jnum,
    _jstr,
    iso_utc,
    summary_payload,
    time_fields,
)
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import GpsTime, gps_to_utc
from tests._outputs_support import make_snapshot
from tests.test_emit_lean_alarms import scenario_snapshots
from tests.test_outputs_fastjson import _SUMMARY_DIGITS, _summary_general

# --- the previous code, verbatim (equal to the previous implementation: oracle copy) -------------


def _iso_utc_previous(utc: dt.datetime) -> str:
    return utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z"


def _time_json_previous(week: int, tow_s: float) -> str:
    t = GpsTime(week, tow_s)
    return (
        f'"time_utc":"{_iso_utc_previous(gps_to_utc(t))}","gps_week":{int(week)},'
        f'"gps_tow_s":{float.__repr__(round(tow_s, 3))}'
    )


def _summary_previous(snap: StationSnapshot) -> bytes:
    t = snap.time
    vtec = snap.vtec_tecu
    roti_max = snap.roti_max_tecu_per_min
    roti_median = snap.roti_median_tecu_per_min
    rot = snap.rot_max_abs_tecu_per_min
    grad = snap.gradient_mm_per_km
    grad_tecu = snap.gradient_tecu_per_km
    azimuth = snap.gradient_azimuth_deg
    dual = snap.dual_freq_fraction
    bias = snap.receiver_bias_tecu
    bias_sigma = snap.receiver_bias_sigma_tecu
    if (
        vtec * vtec
        + roti_max * roti_max
        + roti_median * roti_median
        + rot * rot
        + grad * grad
        + grad_tecu * grad_tecu
        + azimuth * azimuth
        + dual * dual
        + bias * bias
        + bias_sigma * bias_sigma
        < 1e16
    ) and not (-1e-4 < grad_tecu < 1e-4 and grad_tecu != 0.0):
        figures = (
            (
                _SUMMARY_FIGURES
                % (
                    vtec,
                    roti_max,
                    roti_median,
                    rot,
                    grad,
                    grad_tecu,
                    azimuth,
                    dual,
                    bias,
                    bias_sigma,
                )
            )
            .replace("00,", ",")
            .replace("00,", ",")
            .replace("0,", ",")
            .replace(".,", ".0,")
        )
    else:
        figures = (
            f'"vtec_tecu":{_jnum(vtec, 3)},'
            f'"roti_max_tecu_per_min":{_jnum(roti_max, 4)},'
            f'"roti_median_tecu_per_min":{_jnum(roti_median, 4)},'
            f'"rot_max_abs_tecu_per_min":{_jnum(rot, 4)},'
            f'"gradient_mm_per_km":{_jnum(grad, 2)},'
            f'"gradient_tecu_per_km":{_jnum(grad_tecu, 5)},'
            f'"gradient_azimuth_deg":{_jnum(azimuth, 1)},'
            f'"dual_freq_fraction":{_jnum(dual, 3)},'
            f'"receiver_bias_tecu":{_jnum(bias, 3)},'
            f'"receiver_bias_sigma_tecu":{_jnum(bias_sigma, 3)},'
        )
    return (
        f"{_SUMMARY_HEAD}{_jstr(snap.station)},{_time_json_previous(t.week, t.tow_s)},"
        f'"n_sats":{int(snap.n_sats)},{figures}"geometry_source":{_jstr(snap.geometry_source)}}}'
    ).encode()


# --- summary figures with nulls ------------------------------------------------------------------


def _with_figures(snap, values):
    return dataclasses.replace(snap, **dict(zip(_SUMMARY_DIGITS, values, strict=True)))


_EDGES = [
    0.0, -0.0, 1e-4, -1e-4, 5e-5, 1e-5, 0.5, 0.05, 0.0005, 0.00005, 1.0, 99999999.9, 1e8, -1e8,
    math.nextafter(1e8, 0.0), 3e7, 12.345, 1e-300, 5e-324, 1e300, math.inf, -math.inf,
]  # fmt: skip


def test_summary_payload_with_nulls_equals_previous_code_on_edges():
    """summary_payload gives the previous code's bytes (and the general path's) when some figures
    are NaN and another takes an edge value, scaled to sit on its own decimals."""
    snap = make_snapshot()
    base = [20.123, 0.1234, 0.0567, 0.2, 3.25, 0.0201, 123.4, 1.0, -2.5, 0.125]
    for nan_at in ([1], [1, 2, 3, 8, 9], [5], [0, 9], list(range(10))):
        for x in _EDGES:
            for i, d in enumerate(_SUMMARY_DIGITS.values()):
                for v in (x, x / 10.0**d, -x / 10.0**d):
                    values = base.copy()
                    values[i] = v
                    for j in nan_at:
                        values[j] = math.nan if j != i else v
                    s = _with_figures(snap, values)
                    assert summary_payload(s) == _summary_previous(s) == _summary_general(s), (
                        nan_at,
                        i,
                        v,
                    )


@settings(max_examples=1500, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.just(math.nan),
            st.floats(allow_nan=True, allow_infinity=True),
            st.floats(-1e9, 1e9),
            st.floats(-1e-3, 1e-3),
            st.integers(-(10**10), 10**10).map(lambda k: (k + 0.5) / 1e5),
        ),
        min_size=10,
        max_size=10,
    )
)
def test_summary_payload_with_nulls_equals_previous_code(values):
    """summary_payload == the previous code == the general path when figures are NaN (about one
    in five) beside any others."""
    s = _with_figures(make_snapshot(), values)
    assert summary_payload(s) == _summary_previous(s) == _summary_general(s)


@functools.cache
def _quiet_day_snapshots() -> list[StationSnapshot]:
    sc = build_scenario("quiet-day", duration_s=40.0)
    pipe = StationPipeline(sc.stations[0].name, reference_time=sc.start)
    out: list[StationSnapshot] = []
    for _, data in iter_stream(Simulator(sc), 0):
        out += [x for x in pipe.feed(data) if isinstance(x, StationSnapshot)]
    return out


def test_summary_payload_equals_previous_code_on_simulator_streams():
    """summary_payload gives the previous code's bytes on every epoch of the simulator's quiet-day
    (unknown figures at the start), storm-front, scintillation and band-outage streams."""
    snaps = _quiet_day_snapshots() + [s for v in scenario_snapshots().values() for s in v]
    n_null = 0
    for s in snaps:
        new = summary_payload(s)
        assert new == _summary_previous(s) == _summary_general(s)
        n_null += b"null" in new
    assert 0 < n_null < len(snaps)


# --- time fields -----------------------------------------------------------------------------


def test_iso_utc_equals_previous_code():
    """iso_utc gives strftime's text for dates from year 1 to 9999, aware or naive, with any
    microsecond."""
    days = [1, 59, 365, 366, 999 * 365, 1000 * 365, 723_000, 738_000, 3_652_059]
    for day in days:
        for second, micro in ((0, 0), (59, 999), (3661, 999_999), (86_399, 1000), (45_296, 500)):
            base = dt.datetime.fromordinal(day) + dt.timedelta(seconds=second, microseconds=micro)
            for utc in (base, base.replace(tzinfo=dt.UTC)):
                assert iso_utc(utc) == _iso_utc_previous(utc), utc


@settings(max_examples=1000, deadline=None)
@given(
    st.integers(0, 5000),
    st.one_of(
        st.floats(0.0, 604_799.999, allow_nan=False),
        st.integers(0, 604_799).map(float),
        st.integers(0, 604_799_999).map(lambda k: k / 1000.0),
        st.integers(0, 604_799_999).map(lambda k: (k + 0.5) / 1000.0),
        st.sampled_from([0.0, 0.0005, 0.9995, 59.9995, 604_799.9995, 604_799.99951]),
    ),
)
def test_time_json_equals_previous_code(week, tow_s):
    """_time_json (the payloads' three time fields) gives the previous code's text, and the
    general path's (``time_fields`` through json), for any GPS time."""
    fmt._time_json.cache_clear()
    new = fmt._time_json(week, tow_s)
    assert new == _time_json_previous(week, tow_s)
    encoded = fmt.encode(time_fields(GpsTime(week, tow_s))).decode()
    assert "{" + new + "}" == encoded


def test_time_json_refuses_what_gps_time_refuses():
    """_time_json raises GpsTime's ValueError for a second of week out of range, as before."""
    fmt._time_json.cache_clear()
    for tow_s in (-1.0, 604_800.0, math.nan, math.inf):
        with pytest.raises(ValueError, match="tow_s out of range"):
            fmt._time_json(2400, tow_s)
        with pytest.raises(ValueError, match="tow_s out of range"):
            _time_json_previous(2400, tow_s)
