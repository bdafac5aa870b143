"""satellite_geometry: light time, Sagnac, clocks and az/el against oracles and the P433 capture."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.geo import (
    EphemerisStore,
    KeplerBatch,
    az_el,
    kepler_state,
    sagnac_rotate,
    satellite_geometry,
)
from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris, sat_id
from tests._geo_support import load_gps_nav, load_p433_c1c

C = 299792458.0
WEEK_S = 604800.0
GPS_EPOCH = np.datetime64("1980-01-06T00:00:00")


@pytest.fixture(scope="module")
def nav(real_data: Path) -> list[KeplerEphemeris]:
    return load_gps_nav(real_data)


@pytest.fixture(scope="module")
def obs(real_data: Path):
    return load_p433_c1c(real_data)


@pytest.fixture
def store(nav) -> EphemerisStore:
    s = EphemerisStore(keep_per_sat=30)
    for e in nav:
        s.add(e)
    return s


def _epochs(obs):
    rx = np.array(obs.attrs["position"])
    for ti in range(obs.time.size):
        row = obs.C1C.isel(time=ti)
        t = float((row.time.values - GPS_EPOCH) / np.timedelta64(1, "s"))
        sats = np.array([sat_id("G", int(s[1:])) for s in row.sv.values], dtype=np.int16)
        yield t, rx, sats, row.values


def test_satellite_geometry_residuals_match_p433_pseudoranges(store, obs):
    """satellite_geometry ranges + clocks fit P433 C1C to < 5 m scatter above 15° elevation."""
    # Source: P43300USA_R_20190012056_17M_15S_MO.rnx (header position) + brdc0010.19n; residual
    # = P − (ρ − c·(dt_sv − T_GD)) minus its per-epoch median (the common receiver clock).
    # Left over: troposphere, ionosphere, multipath and broadcast orbit/clock errors.
    scatter = []
    for t, rx, sats, pr in _epochs(obs):
        geo = satellite_geometry(t, rx, sats, store, pseudorange_m=pr)
        sel = store.select(sats, t)
        tgd = np.append(sel.kepler.tgd_s[:, 0], np.nan)[sel.gather_index]  # GPS only here
        res = pr - (geo.range_m - C * (geo.clock_s - tgd))
        keep = geo.valid & np.isfinite(pr) & (geo.el_rad > np.radians(15.0))
        assert keep.sum() >= 5
        res = res[keep] - np.median(res[keep])
        scatter.append(res)
    allres = np.concatenate(scatter)
    print(
        f"P433 C1C residuals above 15°: std {np.std(allres):.2f} m, max {np.abs(allres).max():.2f} m"
    )
    assert np.std(allres) < 5.0
    assert np.max(np.abs(allres)) < 20.0


def test_satellite_geometry_all_p433_satellites_are_above_horizon(store, obs):
    """satellite_geometry puts every satellite P433 tracked above −1° elevation."""
    # Source: P43300USA_R_20190012056_17M_15S_MO.rnx (tracked ⇒ visible).
    for t, rx, sats, pr in _epochs(obs):
        ok = np.isfinite(pr)
        geo = satellite_geometry(t, rx, sats[ok], store)
        assert np.all(geo.valid)
        assert np.all(geo.el_rad > np.radians(-1.0))
        assert np.all((geo.range_m > 19e6) & (geo.range_m < 26e6))


def test_satellite_geometry_light_time_matches_full_iteration(store, obs):
    """satellite_geometry without pseudoranges equals a fully iterated light-time solution (< 1 mm)."""
    # Oracle: re-evaluate the orbit at each iterate until t_tx converges (common practice).
    t, rx, sats, pr = next(iter(_epochs(obs)))
    sats = sats[np.isfinite(pr)]
    geo = satellite_geometry(t, rx, sats, store)
    sel = store.select(sats, t)
    tau = np.full(sats.shape, 0.07)
    for _ in range(10):
        pos, _, _ = kepler_state(sel.kepler, t - tau)
        tau = np.linalg.norm(sagnac_rotate(pos, tau) - rx, axis=1) / C
    pos, _, clk = kepler_state(sel.kepler, t - tau)
    ref = sagnac_rotate(pos, tau)
    np.testing.assert_allclose(geo.pos_ecef_m, ref, rtol=0, atol=1e-3)
    np.testing.assert_allclose(geo.t_tx_gps_s, t - tau, rtol=0, atol=1e-11)
    np.testing.assert_allclose(geo.clock_s, clk, rtol=0, atol=1e-12)
    az, el = az_el(rx, ref)
    np.testing.assert_allclose(geo.el_rad, el, rtol=0, atol=1e-9)
    np.testing.assert_allclose(geo.az_rad, az, rtol=0, atol=1e-9)


def test_satellite_geometry_pseudorange_sets_transmit_time(store, obs):
    """satellite_geometry with a pseudorange uses t_tx = t_rx − P/c − dt_sv (IS-GPS-200 §20.3.3.3.3.1)."""
    t, rx, sats, pr = next(iter(_epochs(obs)))
    ok = np.isfinite(pr)
    geo = satellite_geometry(t, rx, sats[ok], store, pseudorange_m=pr[ok])
    np.testing.assert_allclose(geo.t_tx_gps_s, t - pr[ok] / C - geo.clock_s, rtol=0, atol=1e-9)
    # Row by row equals a single-satellite call (batched = per-entity, STYLE rule 23).
    for k in range(int(ok.sum())):
        one = satellite_geometry(t, rx, sats[ok][k : k + 1], store, pseudorange_m=pr[ok][k : k + 1])
        np.testing.assert_allclose(one.pos_ecef_m[0], geo.pos_ecef_m[k], rtol=0, atol=1e-6)


def test_satellite_geometry_masks_missing_and_mixes_glonass(store, obs):
    """satellite_geometry returns NaN rows for satellites without ephemeris, next to GLONASS rows."""
    t, rx, sats, _ = next(iter(_epochs(obs)))
    g = store.select(sats[:1], t).kepler
    pos, vel, _ = kepler_state(g, t - 0.07)
    glo = GlonassEphemeris(
        sat=sat_id("R", 9), channel=-2, tb_s=0.0, day_number=-1, four_year=-1,
        x_m=pos[0, 0], y_m=pos[0, 1], z_m=pos[0, 2],
        vx_mps=vel[0, 0], vy_mps=vel[0, 1], vz_mps=vel[0, 2],
        ax_mps2=0.0, ay_mps2=0.0, az_mps2=0.0, tau_n_s=1e-5, gamma_n=0.0, health=0,
    )  # fmt: skip
    # Place t_b at t: GLONASS day starts at 21:00 UTC = 21:00:18 GPS on 2018-12-31 (leap 18 s).
    day_start = np.floor((t - 18.0 + 10800.0) / 86400.0) * 86400.0 + 18.0 - 10800.0
    glo = dataclasses.replace(glo, tb_s=float(t - 0.07 - day_start))
    store.add(glo, t_received_gps_s=t)
    want = np.array([sats[0], sat_id("R", 9), sat_id("E", 11), sats[1]], dtype=np.int16)
    geo = satellite_geometry(t, rx, want, store)
    assert geo.valid.tolist() == [True, True, False, True]
    assert np.all(np.isnan(geo.pos_ecef_m[2]))
    assert np.isnan(geo.el_rad[2])
    assert np.all(np.isfinite(geo.pos_ecef_m[[0, 1, 3]]))
    assert geo.clock_s[1] == pytest.approx(-1e-5, abs=1e-15)
    # The GLONASS row flies the GPS satellite's state from t − 70 ms: same place within 0.5 m.
    same = satellite_geometry(t, rx, sats[:1], store)
    np.testing.assert_allclose(geo.pos_ecef_m[1], same.pos_ecef_m[0], rtol=0, atol=0.5)


def _mixed_store(nav, t):
    """brdc GPS sets + an eccentric Galileo copy (e = 0.16) + a GLONASS set flying a GPS orbit."""
    store = EphemerisStore(keep_per_sat=30)
    for e in nav:
        store.add(e)
    near = min((e for e in nav if e.sat == 1), key=lambda e: abs(e.week * WEEK_S + e.toe_s - t))
    store.add(dataclasses.replace(near, sat=sat_id("E", 14), e=0.16, m0=near.m0 + 1.0))
    pos, vel, _ = kepler_state(KeplerBatch.from_ephemerides([near]), t)
    day_start = np.floor((t - 18.0 + 10800.0) / 86400.0) * 86400.0 + 18.0 - 10800.0
    glo = GlonassEphemeris(
        sat=sat_id("R", 9), channel=-2, tb_s=float(t - day_start), day_number=-1, four_year=-1,
        x_m=pos[0, 0], y_m=pos[0, 1], z_m=pos[0, 2],
        vx_mps=vel[0, 0], vy_mps=vel[0, 1], vz_mps=vel[0, 2],
        ax_mps2=0.0, ay_mps2=0.0, az_mps2=1e-7, tau_n_s=1e-5, gamma_n=1e-11, health=0,
    )  # fmt: skip
    store.add(glo, t_received_gps_s=t)
    return store


def test_satellite_geometry_grid_interpolation_matches_exact_model(nav, obs):
    """satellite_geometry on its 30 s node grid equals exact=True within 0.5 mm across nodes."""
    # Oracle: the broadcast model evaluated directly (exact=True); the difference is the cubic
    # Hermite error h⁴/384·|x⁗| (common practice), largest for the e = 0.16 Galileo row.
    t_first, rx, sats, _ = next(iter(_epochs(obs)))
    store = _mixed_store(nav, t_first)
    want = np.array([*sats.tolist(), sat_id("E", 14), sat_id("R", 9), sat_id("E", 1)], np.int16)
    for t in t_first + np.arange(0.0, 95.0, 0.7):
        grid = satellite_geometry(t, rx, want, store)
        exact = satellite_geometry(t, rx, want, store, exact=True)
        np.testing.assert_array_equal(grid.valid, exact.valid)
        ok = exact.valid
        assert ok.sum() == len(want) - 1  # E01 has no ephemeris
        np.testing.assert_allclose(grid.pos_ecef_m[ok], exact.pos_ecef_m[ok], rtol=0, atol=5e-4)
        np.testing.assert_allclose(grid.vel_ecef_mps[ok], exact.vel_ecef_mps[ok], rtol=0, atol=1e-4)
        np.testing.assert_allclose(grid.clock_s[ok], exact.clock_s[ok], rtol=0, atol=1e-12)
        np.testing.assert_allclose(grid.el_rad[ok], exact.el_rad[ok], rtol=0, atol=1e-10)
        assert np.all(np.isnan(grid.pos_ecef_m[~ok]))


def test_satellite_geometry_is_independent_of_call_history(nav, obs):
    """satellite_geometry gives bit-identical results whatever epochs were asked before."""
    # The node grid is fixed in GPS time, so the estimator and the simulator agree exactly.
    t_first, rx, sats, _ = next(iter(_epochs(obs)))
    t = t_first + 47.3
    fresh = satellite_geometry(t, rx, sats, _mixed_store(nav, t_first))
    used_store = _mixed_store(nav, t_first)
    for t_other in (t_first + 500.0, t_first - 31.0, t_first + 61.0):
        satellite_geometry(t_other, rx, sats, used_store)
    used = satellite_geometry(t, rx, sats, used_store)
    np.testing.assert_array_equal(fresh.pos_ecef_m, used.pos_ecef_m)
    np.testing.assert_array_equal(fresh.clock_s, used.clock_s)
    np.testing.assert_array_equal(fresh.el_rad, used.el_rad)


def test_satellite_geometry_handles_empty_and_unknown_satellites(store):
    """satellite_geometry returns empty arrays for no satellites and NaN rows for unknown ones."""
    rx = np.array([-2268682.11, -3949823.15, 4451278.86])
    empty = satellite_geometry(1.23e9, rx, np.array([], dtype=np.int16), store)
    assert empty.pos_ecef_m.shape == (0, 3)
    none = satellite_geometry(1.23e9, rx, [1, 105], store, pseudorange_m=[2e7, np.nan])
    assert none.valid.tolist() == [False, False]
    assert np.all(np.isnan(none.range_m))


def test_satellite_geometry_ignores_implausible_pseudoranges(store, obs):
    """satellite_geometry falls back to light time for pseudoranges outside 15,000–50,000 km."""
    # Common practice: MEO–GEO ranges are 19,000–42,000 km plus the receiver clock offset.
    t, rx, sats, pr = next(iter(_epochs(obs)))
    ok = np.isfinite(pr)
    sats, pr = sats[ok][:4], pr[ok][:4].copy()
    pr[[0, 1, 2]] = [-5.0, 1e9, np.inf]
    mixed = satellite_geometry(t, rx, sats, store, pseudorange_m=pr)
    geometric = satellite_geometry(t, rx, sats, store)
    np.testing.assert_allclose(mixed.t_tx_gps_s[:3], geometric.t_tx_gps_s[:3], rtol=0, atol=1e-12)
    assert mixed.t_tx_gps_s[3] == pytest.approx(t - pr[3] / C - mixed.clock_s[3], abs=1e-9)
