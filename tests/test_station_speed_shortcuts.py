"""The cheaper operations of the station figures and the geometry wrap equal the ones they replaced.

Oracles (STYLE rule 23): the replaced NumPy expressions themselves (``@``, boolean subscripts,
``np.fmax.reduce``, the one-call strided ``%=``), and for :func:`station_figures` the general
path ``_reference`` of tests/test_estimator_station_shortcuts.py. Inputs: random values with
NaN, ±inf and ±0.
"""

from __future__ import annotations

import copy
import math
import pickle
import struct

import numpy as np
import pytest

from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.estimator._station import (
    FitScratch,
    _columns,
    _max_abs,
    station_figures,
    station_values,
)
from tests.test_estimator_station_shortcuts import _FIELDS, _random_inputs, _reference


def _bits(x: float) -> bytes:
    return struct.pack("<d", x) if not math.isnan(x) else b"nan"


@pytest.mark.parametrize("k", [4, 5, 7, 8, 9, 16, 17, 20, 31, 33, 40, 64, 65])
def test_ndarray_dot_equals_matmul_bit_for_bit_in_the_plane_fit_layouts(k):
    """ndarray.dot gives the bits of ``@`` (same BLAS call) for the vector dot product and for the plane fit's matrix-vector and matrix-matrix products, in the C layout of all satellites and the Fortran layout of a column selection."""
    rng = np.random.default_rng(k)
    for _ in range(50):
        m = k + int(rng.integers(0, 5))
        pts = rng.normal(size=(3, m)) * 10.0 ** rng.integers(-3, 4)
        w = rng.uniform(0.0, 1.0, k)
        sel = np.zeros(m, np.bool_)
        sel[rng.choice(m, k, replace=False)] = True
        v = pts[2][sel]
        assert w.dot(v).tobytes() == (w @ v).tobytes()
        for xyv in (pts[:, sel], pts[:, :k]):  # Fortran (NumPy's subscript), C
            c = xyv - (xyv @ w / np.add.reduce(w))[:, None]
            assert xyv.dot(w).tobytes() == (xyv @ w).tobytes()
            assert (c * w).dot(c.T).tobytes() == ((c * w) @ c.T).tobytes()


def test_columns_equal_the_boolean_subscript_in_values_and_memory_order():
    """_columns(pts, idx) is pts[:, sel] with the same values, shape, strides and contiguity (the plane fit's BLAS calls depend on the layout)."""
    rng = np.random.default_rng(7)
    for m in (4, 5, 13, 40, 41):
        pts = rng.normal(size=(3, m))
        for _ in range(20):
            sel = rng.random(m) < 0.6
            sel[:4] = True
            got, expect = _columns(pts, sel.nonzero()[0]), pts[:, sel]
            assert got.tobytes("A") == expect.tobytes("A")
            assert (got.shape, got.strides) == (expect.shape, expect.strides)
            assert got.flags.f_contiguous == expect.flags.f_contiguous
            assert got.flags.c_contiguous == expect.flags.c_contiguous


def test_max_abs_equals_fmax_reduce_of_abs_bit_for_bit():
    """_max_abs (sorted values, the larger magnitude of both ends) equals float(np.fmax.reduce(np.abs(rot[sel]))) bit for bit, NaN when all are NaN or none is selected."""
    rng = np.random.default_rng(11)
    specials = [np.nan, 0.0, -0.0, np.inf, -np.inf, 1e-300, -1e300]
    for _ in range(3000):
        m = int(rng.integers(0, 12))
        rot = rng.normal(size=m)
        k = rng.random(m)
        rot[k < 0.4] = rng.choice(specials, int(np.count_nonzero(k < 0.4)))
        if rng.random() < 0.1:
            rot[:] = rng.choice(specials)
        sel = rng.random(m) < 0.7
        for idx, r in ((None, rot), (sel.nonzero()[0], rot[sel])):
            expect = float(np.fmax.reduce(np.abs(r))) if r.size else math.nan
            got = _max_abs(rot, idx)
            assert type(got) is float
            assert _bits(got) == _bits(expect), (rot, idx)


def test_station_figures_with_infinite_or_nan_vtec_above_the_mask_equal_the_general_path():
    """With known elevations, the VTEC finiteness check over all satellites (then ``use`` from it and the mask) gives the general path's figures bit for bit: NaN, ±inf VTEC above or below the mask, zero weights (elevation 0 at mask 0) and weighted sums that overflow."""
    rng = np.random.default_rng(3)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for _ in range(2000):
            m = int(rng.choice([1, 4, 6, 20, 40]))
            el = rng.uniform(-0.2, 1.5, m)
            el[rng.random(m) < 0.2] = 0.0
            pts = rng.normal(size=(3, m)) * 300.0
            pts[2] = np.abs(pts[2]) / 10.0
            k = rng.random(m)
            pts[2, k < 0.1] = rng.choice([np.nan, np.inf, -np.inf])
            if rng.random() < 0.05:
                pts[2] = 1e308  # finite values whose weighted sum overflows
            kw = {"el_rad": el, "sin_el": np.sin(el), "el_known": True, "pts": pts,
                  "rot": rng.normal(size=m), "roti": np.abs(rng.normal(size=m)),
                  "mask_rad": float(rng.choice([0.0, 0.2]))}  # fmt: skip
            got, expect = station_figures(**kw), _reference(**kw)  # type: ignore[arg-type]
            for name in _FIELDS:
                assert _bits(getattr(got, name)) == _bits(getattr(expect, name)), (name, kw)


def _wrap_one_call(geo: np.ndarray) -> None:
    """The wrap as it was: both rows' ``%`` in one call on the strided view."""
    lon = geo[3]
    lon += np.array(np.pi)
    geo[1::2] %= np.array(2.0 * np.pi)
    lon -= np.array(np.pi)


def test_geometry_wrap_row_by_row_equals_the_one_call_wrap():
    """Geometry._wrap (azimuth and longitude rows one at a time) equals the one-call strided wrap bit for bit, ±0, ±inf, NaN and the 2π boundary included."""
    rng = np.random.default_rng(5)
    for m in (0, 1, 7, 40):
        for _ in range(50):
            geo = rng.uniform(-10.0, 10.0, (4, m))
            geo[rng.random((4, m)) < 0.1] = rng.choice([np.nan, 0.0, -0.0, np.inf, 2 * np.pi])
            a, b = geo.copy(), geo.copy()
            with np.errstate(invalid="ignore"):
                Geometry._wrap(a)
                _wrap_one_call(b)
            assert a.tobytes() == b.tobytes()


@pytest.mark.parametrize("k", [0, 1, 2, 7, 8, 9, 15, 16, 17, 27, 34, 64, 127, 128, 129, 300])
def test_add_reduce_into_a_0d_array_equals_add_reduce_bit_for_bit(k):
    """np.add.reduce(w, 0, None, out=out) with a 0-d ``out`` (the station figures' weight sum) equals np.add.reduce(w) bit for bit and returns ``out`` (the oracle: the plain call; NumPy's pairwise summation must not start from w[0] when given an output)."""
    rng = np.random.default_rng(k)
    out = np.array(0.0)
    for _ in range(50):
        w = rng.uniform(0.0, 1.0, k) ** 2 * 10.0 ** rng.integers(-4, 4, k)
        assert np.add.reduce(w, 0, None, out=out) is out
        assert out.tobytes() == np.add.reduce(w).tobytes()


@pytest.mark.parametrize("k", [4, 5, 8, 9, 16, 17, 27, 33, 40])
def test_plane_fit_products_into_given_outputs_equal_new_arrays(k):
    """The plane fit's matrix-vector and matrix-matrix products written into given outputs (the weighted means into a column's flat view, the 3 × 3 sums) equal the products into new arrays bit for bit, in the C layout of all satellites and the Fortran layout of a column selection (the oracle: the same ndarray.dot without ``out``)."""
    rng = np.random.default_rng(100 + k)
    col = np.empty((3, 1))
    mean, sums = col[:, 0], np.empty((3, 3))
    for _ in range(50):
        m = k + int(rng.integers(0, 5))
        pts = rng.normal(size=(3, m)) * 10.0 ** rng.integers(-3, 4)
        w = rng.uniform(0.0, 1.0, k)
        sel = np.zeros(m, np.bool_)
        sel[rng.choice(m, k, replace=False)] = True
        for xyv in (pts[:, sel], pts[:, :k]):  # Fortran (NumPy's subscript), C
            assert xyv.dot(w, mean) is mean
            assert mean.tobytes() == xyv.dot(w).tobytes()
            mean /= np.add.reduce(w)
            c = xyv - col
            assert c.tobytes("A") == (xyv - mean[:, None]).tobytes("A")
            assert (c * w).dot(c.T, sums) is sums
            assert sums.tobytes() == (c * w).dot(c.T).tobytes()


def test_station_values_are_the_station_figures_fields_in_order():
    """station_values with one scratch kept over all calls (as an estimator keeps it, copied and pickled halfway) returns the fields of station_figures (a new scratch each call), in the record's field order, as floats (the oracle: station_figures on the same inputs)."""
    rng = np.random.default_rng(11)
    scratch = FitScratch()
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for i in range(300):
            if i in (100, 200):
                scratch = (
                    copy.deepcopy(scratch) if i == 100 else pickle.loads(pickle.dumps(scratch))
                )
                assert np.shares_memory(scratch.means, scratch.means_flat)
                assert np.shares_memory(scratch.sums, scratch.sums_flat)
            kw = _random_inputs(rng)
            got = station_values(**kw, scratch=scratch)  # type: ignore[arg-type]
            rec = station_figures(**kw)  # type: ignore[arg-type]
            assert [type(v) for v in got] == [float] * len(_FIELDS)
            assert [_bits(v) for v in got] == [_bits(getattr(rec, f)) for f in _FIELDS]


def test_station_figures_vtec_of_zero_weights_is_numpys_nan():
    """A zero weight sum (every selected elevation 0 at mask 0) gives the VTEC numpy's 0/0 gives, sign bit included (Python's float division would raise; the oracle: the general path's ``float(wu @ vu / wu_sum)``)."""
    el = np.zeros(5)
    pts = np.array([[0.0, 1.0, 0.0, 1.0, 2.0], [0.0, 0.0, 1.0, 1.0, 3.0], [20.0] * 5])
    kw = {"el_rad": el, "sin_el": np.sin(el), "el_known": True, "pts": pts, "rot": np.zeros(5),
          "roti": np.zeros(5), "mask_rad": 0.0}  # fmt: skip
    with np.errstate(invalid="ignore", divide="ignore"):
        got = station_figures(**kw)  # type: ignore[arg-type]
        w = np.sin(el) ** 2
        expect = float(w @ pts[2] / np.add.reduce(w))
    assert math.isnan(got.vtec_tecu)
    assert struct.pack("<d", got.vtec_tecu) == struct.pack("<d", expect)
