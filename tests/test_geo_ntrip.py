"""GLONASS, Galileo and BeiDou (incl. GEO and IGSO) broadcast orbits against a real MSM7 stream.

../shared/data/real/rtcm/pygnssutils_ntrip_encode_none.bin (PROVENANCE.md: UK station, week 2328,
1020/1042/1046 ephemerides with 1087/1097/1127 MSM7). pyrtcm is the reference decoder.
Residual = P − (ρ − c·(dt_sv − group delay)) minus the per-epoch median of the system.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.geo import EphemerisStore, resolve_glonass_tb, satellite_geometry
from ionwarden.parsers import sat_id
from tests._geo_support import ephemeris_from_rtcm, msm_pseudoranges, read_rtcm

NTRIP = "rtcm/pygnssutils_ntrip_encode_none.bin"
C = 299792458.0
WEEK = 2328  # PROVENANCE.md
ARP = np.array([3811965.67, -175800.07, 5093615.56])  # 1006 (PROVENANCE.md)


@pytest.fixture(scope="module")
def ntrip(real_data: Path):
    """Store filled as a receiver would (GLONASS t_b placed by the reception time), plus MSMs."""
    msgs = read_rtcm(real_data / NTRIP, 10_000)
    store = EphemerisStore()
    t_rx = None
    for m in msgs:
        if m.identity == "1077":
            t_rx = WEEK * 604800.0 + m.DF004 / 1000.0
        eph = ephemeris_from_rtcm(m)
        if eph is not None and t_rx is not None:
            store.add(eph, t_received_gps_s=t_rx)
    return store, msgs, t_rx


def _residuals(store, msgs, ident, system, signal, to_gps, group_delay):
    out, els = [], []
    for msm in (m for m in msgs if m.identity == ident):
        t = to_gps(msm)
        sats, pr = msm_pseudoranges(msm, system, signal)
        geo = satellite_geometry(t, ARP, sats, store, pseudorange_m=pr)
        sel = store.select(sats, t)
        res = pr - (geo.range_m - C * (geo.clock_s - group_delay(sel)))
        keep = geo.valid & (geo.el_rad > np.radians(5.0))
        assert keep.sum() >= 4
        out.append(res[keep] - np.median(res[keep]))
        els.append(geo.el_rad[keep])
    return np.concatenate(out), np.concatenate(els), sats, geo


def _kepler_delay(column):
    def delay(sel):
        return np.append(sel.kepler.tgd_s[:, column], np.nan)[sel.gather_index]

    return delay


def test_satellite_geometry_fits_beidou_b1i_ranges_including_geo(ntrip):
    """BeiDou 1042 orbits (MEO, IGSO C40 and GEO C05) fit B1I ranges: < 5 m scatter above 10°."""
    # BDS-SIS-ICD-B1I §5.2.4 (BDT = GPST − 14 s, GEO −5° rotation, B1I clock Δt − T_GD1);
    # a wrong GEO rotation would put C05 thousands of km off.
    store, msgs, _ = ntrip
    res, el, sats, geo = _residuals(
        store, msgs, "1127", "C", "2I",
        lambda m: WEEK * 604800.0 + m.DF427 / 1000.0 + 14.0,  # DF427: BDT ms of week
        _kepler_delay(0),
    )  # fmt: skip
    assert {sat_id("C", 5), sat_id("C", 40)} <= set(sats[geo.valid].tolist())
    geo_row = sats.tolist().index(sat_id("C", 5))
    assert 41_000e3 > geo.range_m[geo_row] > 36_000e3  # geostationary distance
    assert np.std(res[el > np.radians(10.0)]) < 5.0
    assert np.max(np.abs(res)) < 30.0  # C05 at 6° carries ~20 m of troposphere


def test_satellite_geometry_fits_galileo_e1_ranges(ntrip):
    """Galileo 1046 I/NAV orbits fit E1 ranges (clock − BGD E1/E5b) with < 5 m scatter."""
    # Galileo OS SIS ICD §5.1.1 (orbit) and §5.1.5 (BGD); data time system GST ≈ GPST.
    store, msgs, _ = ntrip
    res, _, _, _ = _residuals(
        store, msgs, "1097", "E", "1X",
        lambda m: WEEK * 604800.0 + m.DF248 / 1000.0,
        _kepler_delay(1),
    )  # fmt: skip
    assert np.std(res) < 5.0
    assert np.max(np.abs(res)) < 15.0


def test_satellite_geometry_fits_glonass_l1_ranges_with_reception_time(ntrip):
    """GLONASS 1020 sets without N4 (t_b placed by reception time) fit L1 ranges (< 5 m above 10°)."""
    # GLONASS ICD Ed. 5.1 §A.3.1.2 and §3.3.3 (GLONASS time = UTC(SU) + 3 h).
    store, msgs, t_rx = ntrip
    res, el, _, _ = _residuals(
        store, msgs, "1087", "R", "1C",
        lambda m: resolve_glonass_tb(m.DF034 / 1000.0, t_rx),  # DF034: GLONASS ms of day
        lambda sel: np.zeros(sel.sat.shape),
    )  # fmt: skip
    assert np.std(res[el > np.radians(10.0)]) < 5.0
    assert np.max(np.abs(res)) < 30.0  # R02 at 6° elevation


def test_ephemeris_store_keeps_every_ntrip_set_usable(ntrip):
    """EphemerisStore accepts the stream's 1020/1042/1046 sets and counts the repeats as duplicates."""
    store, _, _ = ntrip
    s = store.statistics()
    assert s.added >= 20
    assert s.duplicates > 0
    assert (s.inconsistent, s.implausible) == (0, 0)
