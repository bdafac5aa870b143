"""The per-epoch payloads' lean paths (issue 8) give the bytes of the paths they replace.

Oracles: the previous formatting code, kept verbatim below (``_summary_previous``,
``_fixed_columns_previous``, ``_satellites_previous``: golden behaviour from our own previous code,
itself checked against ``json.dumps`` in tests/test_outputs_fastjson.py), and the general path
(a dict of ``_num`` / ``_col`` values through ``encode``, i.e. Python ``round`` and ``json.dumps``).
Inputs: any double (hypothesis), decimal ties, signed zeros, NaN/±∞, values at the edges of the
shortcuts, and the simulator's storm-front, scintillation and band-outage streams through the real
estimator pipeline.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.outputs import _payloads as fmt
from ionwarden.daemon.outputs._payloads import (
    _CLOSE,
    _COMMA,
    _DOT,
    _FRAC_DIGITS,
    _MINUS,
    _POW,
    _SAT_COLUMNS,
    _SAT_JSON,
    _SAT_SCALE,
    _SATELLITES_HEAD,
    _SPACE,
    _SUMMARY_HEAD,
    _ZERO,
    _fixed_columns,
    _jcol,
    _jnum,
    _jstr,
    _pairs_json,
    _time_json,
    satellites_payload,
    summary_payload,
)
from tests._outputs_support import T0, make_snapshot
from tests.test_emit_lean_alarms import scenario_snapshots
from tests.test_outputs_fastjson import (
    _SUMMARY_DIGITS,
    _satellites_general,
    _summary_general,
)

# --- the previous code, verbatim (golden behaviour of our own previous code) ---------------------


def _summary_previous(snap) -> bytes:
    t = snap.time
    return (
        f"{_SUMMARY_HEAD}{_jstr(snap.station)},{_time_json(t.week, t.tow_s)},"
        f'"n_sats":{int(snap.n_sats)},'
        f'"vtec_tecu":{_jnum(snap.vtec_tecu, 3)},'
        f'"roti_max_tecu_per_min":{_jnum(snap.roti_max_tecu_per_min, 4)},'
        f'"roti_median_tecu_per_min":{_jnum(snap.roti_median_tecu_per_min, 4)},'
        f'"rot_max_abs_tecu_per_min":{_jnum(snap.rot_max_abs_tecu_per_min, 4)},'
        f'"gradient_mm_per_km":{_jnum(snap.gradient_mm_per_km, 2)},'
        f'"gradient_tecu_per_km":{_jnum(snap.gradient_tecu_per_km, 5)},'
        f'"gradient_azimuth_deg":{_jnum(snap.gradient_azimuth_deg, 1)},'
        f'"dual_freq_fraction":{_jnum(snap.dual_freq_fraction, 3)},'
        f'"receiver_bias_tecu":{_jnum(snap.receiver_bias_tecu, 3)},'
        f'"receiver_bias_sigma_tecu":{_jnum(snap.receiver_bias_sigma_tecu, 3)},'
        f'"geometry_source":{_jstr(snap.geometry_source)}}}'
    ).encode()


def _fixed_columns_previous(r: npt.NDArray[np.float64]) -> list[str] | None:
    m, n = r.shape
    flat = r.reshape(-1)
    finite = np.isfinite(flat)
    mag = np.abs(np.where(finite, flat, 0.0))
    k = np.rint(mag * 10.0**_FRAC_DIGITS)
    top = float(k.max()) if k.size else 0.0
    if top >= 1e12:  # |x| ≥ 1e8
        return None
    w = len(str(int(top) // 10**_FRAC_DIGITS))  # integer digits of the largest value
    nd = w + _FRAC_DIGITS
    q = np.floor(k / _POW[-nd - 1 :, None])  # q[j] = ⌊k / 10^p⌋, p = nd … 0
    d = q[1:] - 10.0 * q[:-1]  # digit at p = nd − 1 … 0
    d += _ZERO
    digits = d.astype(np.uint8)
    q = q[1:]
    text = np.empty((nd + 3, m * n), np.uint8)  # sign, w digits, ".", decimals, ","
    text[0] = np.where(np.signbit(flat), _MINUS, _SPACE)
    text[1:w] = np.where(q[: w - 1] == 0.0, _SPACE, digits[: w - 1])
    text[w] = digits[w - 1]
    text[w + 1] = _DOT
    keep = q[w - 1 : nd - 1] * _POW[-_FRAC_DIGITS - 1 : -1, None] != k
    keep[0] = True
    text[w + 2 : -1] = np.where(keep, digits[w:], _SPACE)
    text[-1] = _COMMA
    if not finite.all():
        null = np.frombuffer(b"null".rjust(nd + 2) + b",", np.uint8)
        text[:, ~finite] = null[:, None]
    text[-1, n - 1 :: n] = _CLOSE  # end of each row
    chars = text.T.ravel()  # value by value
    packed: bytes = chars[chars != _SPACE].tobytes()
    return packed.decode().split("]")[:m]


def _satellites_previous(snap) -> bytes:
    s = snap.satellites
    t = snap.time
    cols: list[str] | None = None
    if s.sat.size:
        raw = np.stack([getattr(s, name) for name, _ in _SAT_COLUMNS]).astype(np.float64)
        cols = _fixed_columns_previous(np.rint(raw * _SAT_SCALE) / _SAT_SCALE)
    if cols is None:
        cols = [_jcol(getattr(s, name), d)[1:-1] for name, d in _SAT_COLUMNS]
    sats = ",".join(_SAT_JSON[s.sat.astype(np.intp)].tolist())
    slips = ",".join(["true" if x else "false" for x in s.slip.tolist()])
    arcs = ",".join(map(str, s.arc_id.tolist()))
    body = ",".join(
        [f'"{name}":[{col}]' for (name, _), col in zip(_SAT_COLUMNS, cols, strict=True)]
    )
    return (
        f"{_SATELLITES_HEAD}{_jstr(snap.station)},{_time_json(t.week, t.tow_s)},"
        f'"sat":[{sats}],"pair":[{_pairs_json(tuple(s.pair))}],{body},'
        f'"slip":[{slips}],"arc_id":[{arcs}]}}'
    ).encode()


# --- summary ----------------------------------------------------------------------------------

#: Figures at the edges of the template shortcut: rounding ties, signed zeros, the |x| < 1e8 and
#: 1e-4 bounds, trailing zeros of every count, NaN/±∞.
_SUMMARY_EDGES = [
    0.0, -0.0, 0.5, -0.5, 2.5, 0.125, -0.125, 2.675, 1.0005, 0.00015, -0.00015, 1e-4, -1e-4,
    math.nextafter(1e-4, 0.0), 9.5e-5, 1e-5, -1e-5, 4.9999999e-6, 5e-6, 99999.99995, 1e6,
    99999999.9, 1e8, -1e8, math.nextafter(1e8, 0.0), 12.3, 12.34, 12.345, 10.0, 100.0,
    1e-300, 5e-324, 1e300, math.nan, math.inf, -math.inf,
]  # fmt: skip


def _with_figures(snap, values) -> object:
    return dataclasses.replace(snap, **dict(zip(_SUMMARY_DIGITS, values, strict=True)))


def test_summary_payload_equals_previous_code_on_edges():
    """summary_payload gives the bytes of the previous code and of the general path when each
    figure in turn (and all at once) takes an edge value, scaled to sit on its own decimals."""
    snap = make_snapshot()
    base = [20.123, 0.1234, 0.0567, 0.2, 3.25, 0.0201, 123.4, 1.0, -2.5, 0.125]
    for x in _SUMMARY_EDGES:
        for i, d in enumerate(_SUMMARY_DIGITS.values()):
            for v in (x, x / 10.0**d, -x / 10.0**d):
                values = base.copy()
                values[i] = v
                s = _with_figures(snap, values)
                assert summary_payload(s) == _summary_previous(s) == _summary_general(s), (i, v)
        s = _with_figures(snap, [x] * len(_SUMMARY_DIGITS))
        assert summary_payload(s) == _summary_previous(s) == _summary_general(s), x


@settings(max_examples=1000, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.floats(allow_nan=True, allow_infinity=True),
            st.floats(-1e9, 1e9),
            st.floats(-1e-3, 1e-3),
            st.integers(-(10**10), 10**10).map(lambda k: (k + 0.5) / 1e5),
        ),
        min_size=10,
        max_size=10,
    )
)
def test_summary_payload_equals_previous_code(values):
    """summary_payload == the previous code == the general path for any figures (any doubles,
    the template's range, tiny gradients, decimal ties)."""
    s = _with_figures(make_snapshot(), values)
    assert summary_payload(s) == _summary_previous(s) == _summary_general(s)


# --- satellites ----------------------------------------------------------------------------------


def _rounded(raw: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    return np.rint(raw * _SAT_SCALE) / _SAT_SCALE


def _table_values(rng: np.random.Generator, n: int) -> npt.NDArray[np.float64]:
    """Satellite-like figures (|x| < 400), a third of them moved onto or next to a decimal tie of
    0 to 4 places, and now and then a signed zero, NaN/±∞ or a tiny value."""
    v = rng.uniform(-400.0, 400.0, n)
    d = rng.integers(0, 5, n)
    tie = (np.round(v * 10.0**d) + 0.5) / 10.0**d
    v = np.where(rng.random(n) < 0.3, tie + rng.choice([-1e-12, 0.0, 1e-12], n), v)
    odd = rng.random(n) < 0.1
    edges = [0.0, -0.0, np.nan, np.inf, -np.inf, 4e-5, -6e-5, 5e-5, 1e-4]
    return np.where(odd, rng.choice(edges, n), v)


@pytest.mark.parametrize("seed", range(6))
def test_fixed_columns_table_path_equals_previous_code(seed):
    """_fixed_columns (the table path below 1e4, the digit path above) gives the previous
    code's text of every row: satellite-like values, decimal ties, signed zeros, NaN/±∞, 1e4."""
    rng = np.random.default_rng(seed)
    n_table = 0
    for _ in range(60):
        n = int(rng.integers(1, 50))
        raw = np.stack([_table_values(rng, n) for _ in _SAT_COLUMNS])
        if rng.random() < 0.4:  # at or past the table's 1e4
            raw.flat[rng.integers(0, raw.size)] = rng.choice(
                [9999.99995, 9999.99994, -9999.9999, 1e4, -1e4, 12345.6789, 3e7]
            )
        r = _rounded(raw)
        n_table += float(np.abs(np.where(np.isfinite(r), r, 0.0)).max()) < 9999.9
        assert _fixed_columns(r) == _fixed_columns_previous(r)
    assert 10 < n_table < 60  # both paths were taken


@settings(max_examples=500, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.floats(-1e4, 1e4),
            st.floats(-1e12, 1e12),
            st.sampled_from([math.nan, math.inf, -math.inf]),
            st.integers(-(10**8), 10**8).map(lambda k: (k + 0.5) / 1e4),
            st.sampled_from([0.0, -0.0, 1e-4, -1e-4, 5e-5, -5e-5]),
        ),
        min_size=9,
        max_size=90,
    ).filter(lambda v: len(v) % 9 == 0)
)
def test_fixed_columns_equals_previous_code(values):
    """_fixed_columns == the previous code for any values (rounded as satellites_payload does)."""
    r = _rounded(np.array(values, np.float64).reshape(9, -1))
    assert _fixed_columns(r) == _fixed_columns_previous(r)


def test_satellites_payload_equals_previous_code_on_simulator_streams():
    """satellites_payload and summary_payload give the previous code's bytes (and the general
    path's) on every 7th epoch of the simulator's storm-front, scintillation and band-outage
    streams (real estimator output, every station)."""
    n = 0
    for snaps in scenario_snapshots().values():
        for snap in snaps[::7]:
            assert satellites_payload(snap) == _satellites_previous(snap)
            assert summary_payload(snap) == _summary_previous(snap)
            n += 1
        snap = snaps[-1]
        assert satellites_payload(snap) == _satellites_general(snap)
        assert summary_payload(snap) == _summary_general(snap)
    assert n > 300


def test_satellites_payload_equals_previous_code_on_invented_snapshots():
    """satellites_payload gives the previous code's bytes without satellites, with a large value
    (the digit path) and past 1e8 (the per-column path)."""
    for n, big in ((0, None), (3, None), (5, 12345.678), (5, 3e8)):
        snap = make_snapshot(t=T0, n=n)
        if big is not None:
            stec = snap.satellites.stec_tecu.copy()
            stec[1] = big
            snap = dataclasses.replace(
                snap, satellites=dataclasses.replace(snap.satellites, stec_tecu=stec)
            )
        assert satellites_payload(snap) == _satellites_previous(snap) == _satellites_general(snap)


def test_table_words_spell_every_integer_and_decimal():
    """The lookup tables hold ``-``/digits right-aligned in 8 bytes and "." with the decimals
    (trailing zeros dropped, the first kept), the separator at byte 5."""
    ints = fmt._INT_WORDS.tobytes()
    fracs = fmt._FRAC_WORDS.tobytes()
    for i in (0, 7, 10, 999, 9999):
        assert ints[8 * i : 8 * i + 8].strip() == str(i).encode()
        assert ints[8 * (i + 10_000) : 8 * (i + 10_001)].strip() == f"-{i}".encode()
    for f, text in ((0, b".0"), (5, b".0005"), (1200, b".12"), (9999, b".9999"), (10, b".001")):
        word = fracs[8 * f : 8 * f + 8]
        assert word[:5].rstrip() == text
        assert word[5:6] == b","
