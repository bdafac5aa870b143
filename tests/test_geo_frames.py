"""Earth frames and the thin-shell model against pymap3d and the SCIENCE.md §6 figures."""

from __future__ import annotations

import math

import numpy as np
import pymap3d as pm
import pytest

from ionwarden.daemon.geo import (
    az_el,
    ecef_to_geodetic,
    geodetic_to_ecef,
    mapping_factor,
    pierce_point,
    sagnac_rotate,
)

RNG_SEED = 20261202


def test_geodetic_to_ecef_matches_pymap3d():
    """geodetic_to_ecef equals pymap3d.geodetic2ecef for random points from −500 m to GEO height."""
    rng = np.random.default_rng(RNG_SEED)
    lat = rng.uniform(-np.pi / 2, np.pi / 2, 500)
    lon = rng.uniform(-np.pi, np.pi, 500)
    h = rng.uniform(-500.0, 36e6, 500)
    ours = geodetic_to_ecef(lat, lon, h)
    ref = np.stack(pm.geodetic2ecef(lat, lon, h, deg=False), axis=-1)  # pymap3d
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-6)


def test_ecef_to_geodetic_matches_pymap3d_near_the_ground():
    """ecef_to_geodetic agrees with pymap3d.ecef2geodetic from −500 m to 100 km height."""
    rng = np.random.default_rng(RNG_SEED + 1)
    lat = rng.uniform(-np.pi / 2, np.pi / 2, 500)
    lon = rng.uniform(-np.pi, np.pi, 500)
    h = rng.uniform(-500.0, 100e3, 500)
    xyz = geodetic_to_ecef(lat, lon, h)
    la, lo, hh = ecef_to_geodetic(xyz)
    rla, rlo, rh = pm.ecef2geodetic(xyz[:, 0], xyz[:, 1], xyz[:, 2], deg=False)  # pymap3d
    np.testing.assert_allclose(la, rla, rtol=0, atol=1e-12)
    np.testing.assert_allclose(lo, rlo, rtol=0, atol=1e-12)
    np.testing.assert_allclose(hh, rh, rtol=0, atol=1e-6)


def test_ecef_to_geodetic_inverts_geodetic_to_ecef_up_to_geo_height():
    """ecef_to_geodetic round-trips geodetic_to_ecef to 1e-12 rad / 0.1 mm up to 36,000 km."""
    # Self-consistency: pymap3d 3.2's ecef2geodetic itself drifts to ~2e-6 rad at GNSS heights.
    rng = np.random.default_rng(RNG_SEED + 5)
    lat = rng.uniform(-np.pi / 2, np.pi / 2, 500)
    lon = rng.uniform(-np.pi, np.pi, 500)
    h = rng.uniform(-500.0, 36e6, 500)
    la, lo, hh = ecef_to_geodetic(geodetic_to_ecef(lat, lon, h))
    np.testing.assert_allclose(la, lat, rtol=0, atol=1e-12)
    np.testing.assert_allclose(lo, lon, rtol=0, atol=1e-12)
    np.testing.assert_allclose(hh, h, rtol=0, atol=1e-4)


def test_az_el_matches_pymap3d_for_random_geometries():
    """az_el equals pymap3d.ecef2aer for random receivers and satellites."""
    rng = np.random.default_rng(RNG_SEED + 2)
    for _ in range(20):
        rx = geodetic_to_ecef(
            rng.uniform(-1.5, 1.5), rng.uniform(-np.pi, np.pi), rng.uniform(0, 3e3)
        )
        sat = geodetic_to_ecef(
            rng.uniform(-1.5, 1.5, 30), rng.uniform(-np.pi, np.pi, 30), rng.uniform(19e6, 36e6, 30)
        )
        az, el = az_el(rx, sat)
        lat, lon, h = ecef_to_geodetic(rx)
        raz, rel, _ = pm.ecef2aer(
            sat[:, 0], sat[:, 1], sat[:, 2], float(lat), float(lon), float(h), deg=False
        )  # pymap3d
        np.testing.assert_allclose(el, rel, rtol=0, atol=1e-9)
        daz = (az - raz + np.pi) % (2 * np.pi) - np.pi
        np.testing.assert_allclose(daz, 0.0, rtol=0, atol=1e-9)
        assert np.all((az >= 0) & (az < 2 * np.pi))


def test_sagnac_rotate_moves_satellite_by_earth_rotation():
    """sagnac_rotate turns positions by −Ω̇e·τ about z and keeps the radius when τ = 75 ms."""
    sat = np.array([[26_000e3, 0.0, 1e6], [0.0, 20_000e3, -5e6]])
    out = sagnac_rotate(sat, 0.075)
    theta = 7.2921151467e-5 * 0.075  # IS-GPS-200 §20.3.3.4.3.3.2 (WGS 84 Ω̇e)
    assert out[0, 1] == pytest.approx(-26_000e3 * math.sin(theta), rel=1e-12)
    assert out[1, 0] == pytest.approx(20_000e3 * math.sin(theta), rel=1e-12)
    np.testing.assert_allclose(np.linalg.norm(out, axis=1), np.linalg.norm(sat, axis=1), rtol=1e-15)


@pytest.mark.parametrize(
    ("el_deg", "expected"),
    [(90.0, 1.0), (30.0, 1.751), (15.0, 2.487), (5.0, 3.039)],  # SCIENCE.md §6 (verified here)
)
def test_mapping_factor_matches_science_table(el_deg, expected):
    """mapping_factor gives SCIENCE.md §6's values for h = 350 km, R = 6371 km."""
    assert float(mapping_factor(math.radians(el_deg))) == pytest.approx(expected, abs=5e-4)


def test_mapping_factor_follows_shell_height():
    """mapping_factor at 15° falls when the shell rises to 450 km (thin-shell formula)."""
    r, h = 6371e3, 450e3
    el = math.radians(15.0)
    ref = 1 / math.sqrt(1 - (r * math.cos(el) / (r + h)) ** 2)  # SCIENCE.md §6 formula
    assert float(mapping_factor(el, shell_height_m=h)) == pytest.approx(ref, rel=1e-14)
    assert ref < float(mapping_factor(el))


def test_pierce_point_matches_science_formula_at_mid_latitudes():
    """pierce_point equals SCIENCE.md §6's asin formulas where those are valid (|φ| ≤ 60°)."""
    rng = np.random.default_rng(RNG_SEED + 3)
    lat = rng.uniform(-1.0, 1.0, 400)
    lon = rng.uniform(-np.pi, np.pi, 400)
    az = rng.uniform(0, 2 * np.pi, 400)
    el = rng.uniform(math.radians(5), math.radians(90), 400)
    r, h = 6371e3, 350e3
    psi = np.pi / 2 - el - np.arcsin(r * np.cos(el) / (r + h))  # SCIENCE.md §6
    ref_lat = np.arcsin(np.sin(lat) * np.cos(psi) + np.cos(lat) * np.sin(psi) * np.cos(az))
    ref_lon = lon + np.arcsin(np.sin(psi) * np.sin(az) / np.cos(ref_lat))
    plat, plon = pierce_point(lat, lon, az, el)
    np.testing.assert_allclose(plat, ref_lat, rtol=0, atol=1e-12)
    dlon = (plon - ref_lon + np.pi) % (2 * np.pi) - np.pi
    np.testing.assert_allclose(dlon, 0.0, rtol=0, atol=1e-12)


def test_pierce_point_lies_on_line_of_sight_at_shell_height():
    """pierce_point is where the ray from the site meets the sphere R + h (geometric check)."""
    rng = np.random.default_rng(RNG_SEED + 4)
    r, h = 6371e3, 350e3
    lat = rng.uniform(-1.55, 1.55, 200)  # includes lines of sight over the pole
    lon = rng.uniform(-np.pi, np.pi, 200)
    az = rng.uniform(0, 2 * np.pi, 200)
    el = rng.uniform(0.05, 1.5, 200)
    plat, plon = pierce_point(lat, lon, az, el)

    def unit(la, lo):
        return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], -1)

    up = unit(lat, lon)
    east = np.stack([-np.sin(lon), np.cos(lon), np.zeros_like(lon)], -1)
    north = np.cross(up, east)
    los = np.cos(el)[:, None] * (np.sin(az)[:, None] * east + np.cos(az)[:, None] * north)
    los += np.sin(el)[:, None] * up
    site = r * up
    # Solve |site + s·los| = R + h for s > 0 (sphere intersection, common practice).
    b = np.sum(site * los, axis=1)
    s = -b + np.sqrt(b * b - (r * r - (r + h) ** 2))
    ipp = site + s[:, None] * los
    np.testing.assert_allclose(unit(plat, plon) * (r + h), ipp, rtol=0, atol=1e-3)
