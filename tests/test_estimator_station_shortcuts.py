"""Shortcuts of the station figures and the geometry cache give the general path's results bit for bit.

Oracles (STYLE rule 23): for :func:`station_figures`, the straightforward computation it replaced
(every mask applied before sorting, summing or fitting; weights sin²el of the module doc, common
practice), kept below as ``_reference``; for :meth:`Geometry.lookup`, the same geometry object
without its per-satellite-list cache. Inputs: random figures and our invented constellation
(``daemon.sim`` ephemerides over an invented site).
"""

from __future__ import annotations

import math
import struct

import numpy as np
import pytest

from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.estimator._station import (
    GPS_L1_M_PER_TECU,
    StationFigures,
    station_figures,
)
from ionwarden.daemon.geo import geodetic_to_ecef
from ionwarden.daemon.sim._constellation import build_constellation
from ionwarden.parsers import KeplerEphemeris

F = np.ndarray
_FIELDS = (
    "vtec_tecu", "roti_max", "roti_median", "rot_max_abs", "gradient_tecu_per_km",
    "gradient_mm_per_km", "gradient_azimuth_deg",
)  # fmt: skip


def _reference(
    *, el_rad: F, sin_el: F, el_known: bool, pts: F, rot: F, roti: F, mask_rad: float
) -> StationFigures:
    """The general path: the station figures as computed before the shortcuts."""
    m = el_rad.shape[0]
    known = None if el_known else np.isfinite(el_rad)
    n_known = m if known is None else np.count_nonzero(known)
    above = (el_rad >= np.array(mask_rad)) if n_known else np.ones(m, np.bool_)
    n_above = np.count_nonzero(above)
    w = np.maximum(sin_el, np.array(0.0))
    w *= w
    if known is not None and n_known < m:
        w[~known] = 1.0
    use = above & np.isfinite(pts[2])
    n_use = np.count_nonzero(use)
    vtec = pts[2]
    wu, vu = (w, vtec) if n_use == m else (w[use], vtec[use])
    wu_sum = np.add.reduce(wu)
    vtec_st = float(wu @ vu / wu_sum) if n_use else math.nan
    r = roti[above & np.isfinite(roti)] if n_above < m else roti[np.isfinite(roti)]
    r.sort()
    roti_max = float(r[-1]) if r.size else math.nan
    roti_med = float(0.5 * (r[(r.size - 1) // 2] + r[r.size // 2])) if r.size else math.nan
    rr = np.abs(rot[above] if n_above < m else rot)
    rot_max = float(np.fmax.reduce(rr)) if rr.size else math.nan
    g_t = g_mm = g_az = math.nan
    if el_known:
        fit, n_fit = use, n_use
    else:
        fit = use & np.isfinite(pts[0])
        n_fit = np.count_nonzero(fit)
    if n_fit >= 4:
        if n_fit == m:
            ge, gn = _reference_slopes(w, pts, wu_sum)
        elif fit is use:
            ge, gn = _reference_slopes(wu, pts[:, fit], wu_sum)
        else:
            ge, gn = _reference_slopes(w[fit], pts[:, fit], np.add.reduce(w[fit]))
        if math.isfinite(ge):
            g_t = math.hypot(ge, gn)
            g_mm = g_t * GPS_L1_M_PER_TECU * 1000.0
            g_az = math.degrees(math.atan2(ge, gn)) % 360.0
    return StationFigures(vtec_st, roti_max, roti_med, rot_max, g_t, g_mm, g_az)


def _reference_slopes(w: F, xyv: F, w_sum: np.float64) -> tuple[float, float]:
    c = xyv - (xyv @ w / w_sum)[:, None]
    (sxx, sxy, sxv), (_, syy, syv), _ = ((c * w) @ c.T).tolist()
    det = sxx * syy - sxy * sxy
    if not det > 1e-9 * sxx * syy:
        return math.nan, math.nan
    return (syy * sxv - sxy * syv) / det, (sxx * syv - sxy * sxv) / det


def _bits(x: float) -> bytes:
    return struct.pack("<d", x) if not math.isnan(x) else b"nan"


def _random_inputs(rng: np.random.Generator) -> dict[str, object]:
    m = int(rng.choice([0, 1, 3, 5, 8, 13, 40]))
    el = rng.uniform(-0.3, 1.6, m)
    el_known = bool(rng.random() < 0.4)
    if not el_known:
        el[rng.random(m) < rng.choice([0.0, 0.3, 1.0])] = np.nan
    pts = rng.normal(size=(3, m)) * 300.0
    pts[2] = np.abs(pts[2]) / 10.0
    for row in range(0 if not el_known else 2, 3):
        pts[row, rng.random(m) < rng.choice([0.0, 0.2])] = np.nan
    pts[1, np.isnan(pts[0])] = np.nan  # x and y come from the same pierce point
    if rng.random() < 0.1:
        pts[:2] = pts[:2, :1]  # all pierce points in one place: no plane
    rot = rng.normal(size=m)
    roti = np.abs(rng.normal(size=m))
    for arr in (rot, roti):
        k = rng.random(m)
        arr[k < 0.15] = np.nan
        if rng.random() < 0.2:
            arr[k > 0.85] = rng.choice([0.0, -0.0, np.inf, -np.inf])
        if rng.random() < 0.05:
            arr[:] = rng.choice([0.0, -0.0, np.nan])
    return {
        "el_rad": el, "sin_el": np.sin(el), "el_known": el_known, "pts": pts, "rot": rot,
        "roti": roti, "mask_rad": float(rng.choice([0.0, math.radians(15.0)])),
    }  # fmt: skip


def test_station_figures_equal_the_general_path_bit_for_bit():
    """station_figures (single finiteness pass, sorted-then-trimmed ROTI, shared plane-fit weights) equals the general path bit for bit over random inputs with NaN, ±inf, ±0, unknown elevations and degenerate planes."""
    rng = np.random.default_rng(2026)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for _ in range(4000):
            kw = _random_inputs(rng)
            got = station_figures(**kw)  # type: ignore[arg-type]
            expect = _reference(**kw)  # type: ignore[arg-type]
            for name in _FIELDS:
                assert type(getattr(got, name)) is float, name
                assert _bits(getattr(got, name)) == _bits(getattr(expect, name)), (name, kw)


def test_station_figures_roti_of_zeros_and_infinities_keeps_the_filtered_order():
    """ROTI max/median over values with ±0 and ±inf beside NaN equal the filter-then-sort result bit for bit (the trimmed sort falls back to it)."""
    el = np.full(6, 0.8)
    pts = np.array([[0.0, 1.0, 0.0, 1.0, 2.0, 3.0], [0.0, 0.0, 1.0, 1.0, 2.0, 5.0], [20.0] * 6])
    cases = (
        [0.0, -0.0, np.nan, 0.0, -0.0, 0.1],
        [np.inf, 0.2, np.nan, 0.1, 0.3, np.nan],
        [-np.inf, 0.2, np.nan, 0.1, 0.3, 0.4],
        [np.nan] * 6,
        [0.5, 0.1, 0.3, np.nan, 0.2, 0.4],
    )
    for roti in cases:
        kw = {"el_rad": el, "sin_el": np.sin(el), "el_known": True, "pts": pts,
              "rot": np.zeros(6), "roti": np.array(roti), "mask_rad": 0.2}  # fmt: skip
        got, expect = station_figures(**kw), _reference(**kw)  # type: ignore[arg-type]
        for name in ("roti_max", "roti_median"):
            assert _bits(getattr(got, name)) == _bits(getattr(expect, name)), (name, roti)
    got = station_figures(**{**kw, "roti": np.array(cases[4])})  # type: ignore[arg-type]
    assert got.roti_max == 0.5  # common practice: max and median of the finite values
    assert got.roti_median == 0.3


T0 = 2350 * 604800.0 + 200_000.0
RX = geodetic_to_ecef(np.radians(46.5), np.radians(7.5), 600.0)  # invented site


@pytest.fixture(scope="module")
def ephemerides() -> tuple[np.ndarray, list[object]]:
    cons = build_constellation("GER", 7, T0 - 3600.0, T0 + 3600.0)
    ephs = [e for s in cons.series.values() for group in s.ephemerides for e in group]
    near = [e for e in ephs if not isinstance(e, KeplerEphemeris)
            or abs(e.week * 604800.0 + e.toe_s - T0) < 7200.0]  # fmt: skip
    return cons.sats, near


def _geometry(ephs: list[object]) -> Geometry:
    g = Geometry(400, 30.0, shell_m=350e3, keep_per_sat=20)
    g.set_receiver_position(RX, "config")
    for e in ephs:
        g.add_ephemeris(e, T0)  # type: ignore[arg-type]
    return g


@pytest.mark.parametrize("case", ["some_without_orbit", "none_with_orbit", "gsv_for_one"])
def test_geometry_cache_with_satellites_without_orbit_equals_general_path(ephemerides, case):
    """Geometry.lookup with its per-satellite-list cache (NaN rows of satellites without an orbit kept in it) equals the uncached lookup bit for bit: rows, source and all_known, through refreshes and a GSV fallback."""
    sats_all, ephs = ephemerides
    missing = {int(s) for s in sats_all[::5]}
    if case == "none_with_orbit":
        sats = np.array(sorted(missing), np.intp)
    else:
        sats = np.asarray(sats_all, np.intp)
    sats.setflags(write=False)
    kept = [e for e in ephs if e.sat not in missing]  # type: ignore[attr-defined]
    fast, slow = _geometry(kept), _geometry(kept)
    used = 0
    sources = set()
    for k in range(200):
        t = T0 + k
        if case == "gsv_for_one" and k in {40, 41, 42, 120}:
            one = next(iter(missing))
            for g in (fast, slow):
                g.set_gsv(t - 0.5, [one, 9999], [35.0, 10.0], [120.0, 0.0])
        slow._same = None
        if fast._same is not None and fast._same[1] == fast.version:
            used += 1
        a, sa = fast.lookup(sats, t)
        b, sb = slow.lookup(sats, t)
        assert (sa, fast.all_known) == (sb, slow.all_known), k
        assert a.tobytes() == b.tobytes(), k
        sources.add(sa)
    assert not fast.all_known
    expect = {"none_with_orbit": {"none"}, "some_without_orbit": {"ephemeris"},
              "gsv_for_one": {"ephemeris", "ephemeris+gsv"}}  # fmt: skip
    assert sources == expect[case]
    if case == "gsv_for_one":
        assert 0 < used < 40  # cached before the first GSV only: its satellite keeps a GSV time
    else:
        assert used > 150  # the cache served the epochs between refreshes
