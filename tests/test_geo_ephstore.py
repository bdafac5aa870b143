"""EphemerisStore: validity windows, rejection reasons, dedupe, bounded memory, cached selection."""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.geo import EphemerisStore, kepler_state
from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris, sat_id, utc_to_gps
from tests._geo_support import load_gps_nav

WEEK_S = 604800.0


@pytest.fixture(scope="module")
def nav(real_data: Path) -> list[KeplerEphemeris]:
    return load_gps_nav(real_data)


def _toe(e: KeplerEphemeris) -> float:
    return e.week * WEEK_S + e.toe_s


def _healthy_g01(nav):
    return sorted((e for e in nav if e.sat == 1), key=_toe)


def test_ephemeris_store_selects_closest_toe_within_two_hours(nav):
    """EphemerisStore.select picks the G01 set whose toe is closest to t (brdc0010.19n)."""
    # Validity ±2 h around toe (SCIENCE.md §6, common practice); data brdc0010.19n.
    store = EphemerisStore(keep_per_sat=30)
    for e in nav:
        store.add(e)
    g01 = _healthy_g01(nav)
    for t in (_toe(g01[3]) + 10.0, _toe(g01[3]) + 3599.0, _toe(g01[3]) + 3601.0):
        sel = store.select([1], t)
        assert sel.valid.tolist() == [True]
        expect = min(g01, key=lambda e, t=t: abs(_toe(e) - t))
        assert sel.kepler.toe_gps_s[0] == _toe(expect)


def test_ephemeris_store_rejects_year_old_ephemeris_as_stale(nav):
    """EphemerisStore.select rejects a 52-week-old set (like RTK134's stale 1019s) and counts it."""
    # PROVENANCE.md: RTK134 carries 1019s up to a year old for satellites not in view.
    old = dataclasses.replace(nav[0], week=nav[0].week - 52)
    store = EphemerisStore()
    store.add(old)
    sel = store.select([old.sat], _toe(nav[0]))
    assert sel.valid.tolist() == [False]
    assert len(sel.kepler) == 0
    assert store.statistics().stale == 1


def test_ephemeris_store_rejects_future_unhealthy_and_missing(nav):
    """EphemerisStore.select counts future, unhealthy and missing satellites separately."""
    g04 = next(e for e in nav if e.sat == 4 and e.health != 0)  # brdc0010.19n: G04 health 63
    store = EphemerisStore()
    store.add(nav[0])
    store.add(g04)
    t = _toe(g04)
    sel = store.select([nav[0].sat, 4, 9], _toe(nav[0]) - 3 * 3600.0)
    assert sel.valid.tolist() == [False, False, False]
    sel = store.select([4, 9], t)
    assert sel.valid.tolist() == [False, False]
    stats = store.statistics()
    assert (stats.future, stats.unhealthy, stats.missing) == (2, 1, 2)


def test_ephemeris_store_refuses_iode_iodc_mismatch(nav):
    """EphemerisStore.add refuses a GPS set with IODE ≠ IODC mod 256 (IS-GPS-200 §20.3.3.4.1, from memory)."""
    store = EphemerisStore()
    bad = dataclasses.replace(nav[0], iodc=nav[0].iode + 1)
    assert store.add(bad) is False
    assert store.add(dataclasses.replace(nav[0], iodc=nav[0].iode + 256)) is True
    assert store.statistics().inconsistent == 1


def test_ephemeris_store_dedupes_by_sat_toe_iode(nav):
    """EphemerisStore.add ignores the same sat + toe + IODE repeated, keeps a new IODE."""
    store = EphemerisStore()
    assert store.add(nav[0]) is True
    assert store.add(nav[0]) is False
    assert store.add(dataclasses.replace(nav[0], iode=99, iodc=99, af0=1e-4)) is True
    s = store.statistics()
    assert (s.added, s.duplicates, s.stored) == (2, 1, 2)
    # Same toe, new upload: the later IODE wins the tie.
    sel = store.select([nav[0].sat], _toe(nav[0]))
    assert sel.kepler.iode[0] == 99


def test_ephemeris_store_keeps_only_newest_per_satellite(nav):
    """EphemerisStore keeps at most keep_per_sat sets per satellite, dropping the oldest."""
    store = EphemerisStore(keep_per_sat=2)
    g01 = _healthy_g01(nav)
    for e in g01:
        store.add(e)
    assert store.statistics().stored == 2
    assert store.select([1], _toe(g01[0])).valid.tolist() == [False]
    assert store.select([1], _toe(g01[-1])).valid.tolist() == [True]


def test_ephemeris_store_reuses_selection_until_it_changes(nav):
    """EphemerisStore.select returns the same cached selection while the choice is unchanged."""
    store = EphemerisStore(keep_per_sat=30)
    for e in nav:
        store.add(e)
    sats = np.array(sorted({e.sat for e in nav}), dtype=np.int16)
    t0 = _toe(nav[0]) + 1000.0
    first = store.select(sats, t0)
    assert store.select(sats, t0 + 1.0) is first
    assert store.select(sats, t0 + 60.0).kepler is first.kepler
    rebuilds = store.statistics().rebuilds
    assert rebuilds == 1
    store.select(sats, t0 + 2.5 * 3600.0)
    assert store.statistics().rebuilds == 2


def test_ephemeris_store_cached_selection_equals_fresh_selection(nav):
    """EphemerisStore.select over a time sweep equals a fresh store's answer at every step."""
    # Oracle (STYLE rule 23): cache hits must not change results.
    store = EphemerisStore(keep_per_sat=30)
    for e in nav:
        store.add(e)
    sats = np.array(sorted({e.sat for e in nav}), dtype=np.int16)
    t_start = _toe(nav[0]) - 3 * 3600.0
    for t in np.arange(t_start, t_start + 30 * 3600.0, 397.0):
        cached = store.select(sats, float(t))
        fresh = EphemerisStore(keep_per_sat=30)
        for e in nav:
            fresh.add(e)
        ref = fresh.select(sats, float(t))
        np.testing.assert_array_equal(cached.valid, ref.valid)
        np.testing.assert_array_equal(cached.kepler.toe_gps_s, ref.kepler.toe_gps_s)
        np.testing.assert_array_equal(cached.kepler_index, ref.kepler_index)
    assert store.statistics().rebuilds < 120  # 272 steps


def test_ephemeris_store_beidou_window_is_one_hour(nav):
    """EphemerisStore gives BeiDou sets ±1 h around toe, with toe in BDT (GPST − 14 s)."""
    # SCIENCE.md §6 (BeiDou ±1 h, common practice); BDT = GPST − 14 s (BDS-SIS-ICD-B1I §5.1.3).
    bds = dataclasses.replace(nav[0], sat=sat_id("C", 23), time_system="BDT", iodc=0, iode=0)
    store = EphemerisStore()
    store.add(bds)
    toe_gps = _toe(bds) + 14.0
    assert store.select([bds.sat], toe_gps + 3599.0).valid.tolist() == [True]
    assert store.select([bds.sat], toe_gps + 3600.0).valid.tolist() == [False]
    assert store.select([bds.sat], toe_gps - 3600.0).valid.tolist() == [True]


def test_ephemeris_store_glonass_window_is_fifteen_minutes():
    """EphemerisStore gives GLONASS sets ±15 min around t_b placed by the reception time."""
    # SCIENCE.md §6 (±15 min, common practice); GLONASS time = UTC(SU) + 3 h (ICD Ed. 5.1 §3.3.3).
    t_rx = utc_to_gps(dt.datetime(2019, 1, 1, 9, 0, tzinfo=dt.UTC)).total_s  # 12:00 Moscow
    eph = GlonassEphemeris(
        sat=sat_id("R", 5), channel=1, tb_s=12 * 3600.0 + 15 * 60.0, day_number=-1,
        four_year=-1, x_m=7e6, y_m=-12e6, z_m=21e6, vx_mps=780.0, vy_mps=2800.0, vz_mps=1350.0,
        ax_mps2=0.0, ay_mps2=0.0, az_mps2=0.0, tau_n_s=0.0, gamma_n=0.0, health=0,
    )  # fmt: skip
    store = EphemerisStore()
    store.add(eph, t_received_gps_s=t_rx)
    assert store.select([eph.sat], t_rx).valid.tolist() == [True]
    assert store.select([eph.sat], t_rx + 1799.0).valid.tolist() == [True]
    assert store.select([eph.sat], t_rx + 1800.0).valid.tolist() == [False]
    # One day later the same t_b is stale: the reception time pinned the day.
    assert store.select([eph.sat], t_rx + 86400.0).valid.tolist() == [False]
    assert store.statistics().stale == 2


def test_ephemeris_store_glonass_n4_nt_place_tb():
    """EphemerisStore places t_b from N4/N_T (GLONASS ICD Ed. 5.1 §4.5) without a reception time."""
    # N4 = 6 is 2016-2019 (N4 = 1 from 1996); 2019-01-01 is N_T = 366 + 365 + 365 + 1 = 1097.
    eph = GlonassEphemeris(
        sat=sat_id("R", 5), channel=1, tb_s=3 * 3600.0 + 900.0, day_number=1097, four_year=6,
        x_m=7e6, y_m=-12e6, z_m=21e6, vx_mps=780.0, vy_mps=2800.0, vz_mps=1350.0,
        ax_mps2=0.0, ay_mps2=0.0, az_mps2=0.0, tau_n_s=0.0, gamma_n=0.0, health=0,
    )  # fmt: skip
    store = EphemerisStore()
    store.add(eph)
    t = utc_to_gps(dt.datetime(2019, 1, 1, 0, 15, tzinfo=dt.UTC)).total_s  # 03:15 Moscow
    sel = store.select([eph.sat], t)
    assert sel.valid.tolist() == [True]
    assert store.select([eph.sat], t - 86400.0).valid.tolist() == [False]


def test_ephemeris_store_selection_feeds_kepler_state(nav):
    """EphemerisStore.select output drives kepler_state for the valid rows only."""
    store = EphemerisStore()
    for e in nav:
        store.add(e)
    t = _toe(nav[0]) + 600.0
    sel = store.select([1, 2, 77 % 33], t)
    pos, _, clk = kepler_state(sel.kepler, t)
    assert pos.shape == (len(sel.kepler), 3)
    assert np.all(np.isfinite(clk))
    assert not math.isnan(sel.t_hi_s)


def test_ephemeris_store_remembers_recent_satellite_sets(nav):
    """EphemerisStore.select reuses the selection of a satellite set seen a few epochs ago."""
    store = EphemerisStore()
    for e in nav:
        store.add(e)
    t = max(_toe(e) for e in nav) - 600.0
    a = store.select([1, 2, 3], t)
    assert a.valid.all()
    b = store.select([1, 3], t + 1.0)  # G02 dropped out for an epoch
    assert store.select([1, 2, 3], t + 2.0) is a
    assert store.select([1, 3], t + 3.0) is b
    assert store.statistics().rebuilds == 2


def test_ephemeris_store_survives_pickle(nav):
    """EphemerisStore gives the same selection and counters after a pickle round trip."""
    # STYLE rule 23 (state survives pickle or copy).
    import pickle

    store = EphemerisStore()
    for e in nav:
        store.add(e)
    t = max(_toe(e) for e in nav) - 600.0
    first = store.select([1, 2, 3, 4], t)
    assert first.valid.tolist() == [True, True, True, False]  # G04 unhealthy in brdc0010.19n
    clone = pickle.loads(pickle.dumps(store))
    assert clone.statistics() == store.statistics()
    again = clone.select([1, 2, 3, 4], t)
    np.testing.assert_array_equal(again.valid, first.valid)
    np.testing.assert_array_equal(again.kepler.toe_gps_s, first.kepler.toe_gps_s)


def test_ephemeris_store_refuses_implausible_sets(nav):
    """EphemerisStore.add refuses NaN fields and impossible orbits and counts them (common practice)."""
    store = EphemerisStore()
    assert store.add(dataclasses.replace(nav[0], m0=math.nan)) is False
    assert store.add(dataclasses.replace(nav[0], sqrt_a=100.0)) is False
    assert store.add(dataclasses.replace(nav[0], e=1.2)) is False
    glo = GlonassEphemeris(
        sat=sat_id("R", 1), channel=0, tb_s=900.0, day_number=-1, four_year=-1,
        x_m=0.0, y_m=0.0, z_m=0.0, vx_mps=0.0, vy_mps=0.0, vz_mps=0.0,
        ax_mps2=0.0, ay_mps2=0.0, az_mps2=0.0, tau_n_s=0.0, gamma_n=0.0, health=0,
    )  # fmt: skip
    assert store.add(glo, t_received_gps_s=1.2e9) is False
    assert store.add(nav[0]) is True
    s = store.statistics()
    assert (s.implausible, s.added, s.stored) == (4, 1, 1)
