"""The cheaper operations of the station figures and the geometry wrap equal the ones they replaced.

Oracles (STYLE rule 23): the replaced NumPy expressions themselves (``@``, boolean subscripts,
``np.fmax.reduce``, the one-call strided ``%=``), and for :func:`station_figures` the general
path ``_reference`` of tests/test_estimator_station_shortcuts.py. Inputs: random values with
NaN, ±inf and ±0.
"""

from __future__ import annotations

import math
import struct

import numpy as np
import pytest

from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.estimator._station import _columns, _max_abs, station_figures
from tests.test_estimator_station_shortcuts import _FIELDS, _reference


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
    """With known elevations, the weighted VTEC sum that stands in for the finiteness check (finite only if every VTEC above the mask is) falls back correctly: NaN, ±inf VTEC and zero weights (elevation 0 at mask 0) give the general path's figures bit for bit."""
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
