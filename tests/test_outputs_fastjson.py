"""The per-epoch payloads' template formatting gives the bytes of the general path: a dict of
rounded values (``_num``, ``_col``) through ``encode`` (json.dumps).

Oracles: Python's ``round`` and ``json.dumps`` (the general path); numpy's ``np.round`` for the
satellites columns (what ``_col`` uses). Inputs: invented snapshots (tests/_outputs_support.py) with
random values, rounding ties, signed zeros, NaN/±∞ and values past the fixed-width formatter.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.outputs._payloads import (
    _col,
    _jnum,
    _num,
    encode,
    satellites_payload,
    schema_id,
    summary_payload,
    time_fields,
)
from ionwarden.parsers import sat_name
from tests._outputs_support import T0, make_snapshot

_SUMMARY_DIGITS = {
    "vtec_tecu": 3,
    "roti_max_tecu_per_min": 4,
    "roti_median_tecu_per_min": 4,
    "rot_max_abs_tecu_per_min": 4,
    "gradient_mm_per_km": 2,
    "gradient_tecu_per_km": 5,
    "gradient_azimuth_deg": 1,
    "dual_freq_fraction": 3,
    "receiver_bias_tecu": 3,
    "receiver_bias_sigma_tecu": 3,
}
_SAT_DIGITS = {
    "el_deg": 2,
    "az_deg": 2,
    "ipp_lat_deg": 4,
    "ipp_lon_deg": 4,
    "stec_tecu": 3,
    "vtec_tecu": 3,
    "rot_tecu_per_min": 4,
    "roti_tecu_per_min": 4,
    "iono_l1_m": 4,
}

#: Values at or next to rounding ties and other edges of the shortcut in _jnum.
_EDGES = [
    0.0, -0.0, 0.5, -0.5, 2.5, -2.5, 0.125, -0.125, 2.675, 1.0005, 0.00015, -0.00015, 1e-5,
    -1e-5, 4.9999999e-6, 99999.99995, 1e6, 1e6 + 0.5, 123456.789125, 5e-324, 1e-300, 1e300,
    math.nextafter(0.5, 0.0), math.nextafter(0.5, 1.0), math.nan, math.inf, -math.inf,
]  # fmt: skip


@pytest.mark.parametrize("digits", range(10))
def test_jnum_equals_round_and_json_dumps_on_edges(digits):
    """_jnum(x, d) == json.dumps(_num(x, d)) (Python round + float repr) on ties and edges,
    also scaled so that x·10ᵈ is the tie or the edge."""
    for x in _EDGES:
        for v in (x, x / 10.0**digits, -x / 10.0**digits):
            assert _jnum(v, digits) == json.dumps(_num(v, digits)), (v, digits)


@settings(max_examples=3000, deadline=None)
@given(st.floats(allow_nan=True, allow_infinity=True), st.integers(0, 9))
def test_jnum_equals_round_and_json_dumps(x, digits):
    """_jnum(x, d) == json.dumps(_num(x, d)) for any double and decimal count."""
    assert _jnum(x, digits) == json.dumps(_num(x, digits))


@settings(max_examples=1000, deadline=None)
@given(st.integers(-(10**12), 10**12), st.integers(0, 9))
def test_jnum_equals_round_on_decimal_ties(k, digits):
    """_jnum on the doubles nearest to (k + ½)·10⁻ᵈ (decimal ties and their neighbours)."""
    v = (k + 0.5) / 10.0**digits
    for w in (v, math.nextafter(v, math.inf), math.nextafter(v, -math.inf)):
        assert _jnum(w, digits) == json.dumps(_num(w, digits))


def _summary_general(snap) -> bytes:
    return encode(
        {
            "schema": schema_id("summary"),
            "station": snap.station,
            **time_fields(snap.time),
            "n_sats": snap.n_sats,
            **{name: _num(getattr(snap, name), d) for name, d in _SUMMARY_DIGITS.items()},
            "geometry_source": snap.geometry_source,
        }
    )


def _satellites_general(snap) -> bytes:
    s = snap.satellites
    return encode(
        {
            "schema": schema_id("satellites"),
            "station": snap.station,
            **time_fields(snap.time),
            "sat": [sat_name(int(i)) for i in s.sat],
            "pair": list(s.pair),
            **{name: _col(getattr(s, name), d) for name, d in _SAT_DIGITS.items()},
            "slip": [bool(x) for x in s.slip],
            "arc_id": [int(x) for x in s.arc_id],
        }
    )


def _random_values(rng: np.random.Generator, n: int) -> np.ndarray:
    kind = rng.integers(0, 6, n)
    v = rng.uniform(-200.0, 200.0, n)
    v = np.where(kind == 1, np.round(v, int(rng.integers(0, 5))) + 0.5e-4, v)  # near ties
    v = np.where(kind == 2, rng.choice([0.0, -0.0, np.nan, np.inf, -np.inf, 1e-7, -1e-7], n), v)
    return np.where(kind == 3, rng.uniform(-1.0, 1.0, n) * 10.0 ** rng.uniform(-8, 9, n), v)


@pytest.mark.parametrize("seed", range(8))
def test_summary_and_satellites_equal_general_path(seed):
    """summary_payload / satellites_payload bytes == the dict built with _num / _col through
    encode, on random values (ties, signed zeros, NaN/±∞, |x| ≥ 1e8 for the satellites' slow
    path)."""
    rng = np.random.default_rng(seed)
    for i in range(40):
        n = int(rng.integers(0, 45))
        snap = make_snapshot(f"ST{seed}", T0 + 0.25 * i, n=n)
        values = _random_values(rng, len(_SUMMARY_DIGITS)).tolist()
        scalars = dict(zip(_SUMMARY_DIGITS, values, strict=True))
        figs = {name: _random_values(rng, n) for name in _SAT_DIGITS}
        if i == 7 and n:
            figs["iono_l1_m"][0] = 3e8  # past the fixed-width formatter
        snap = dataclasses.replace(
            snap,
            **scalars,
            satellites=dataclasses.replace(
                snap.satellites,
                **figs,
                slip=rng.random(n) < 0.2,
                arc_id=rng.integers(0, 10_000, n).astype(np.int32),
            ),
        )
        assert summary_payload(snap) == _summary_general(snap)
        assert satellites_payload(snap) == _satellites_general(snap)
