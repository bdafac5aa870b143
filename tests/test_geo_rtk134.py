"""EphemerisStore + satellite_geometry on RTK134: stale 1019s rejected, fresh ones fit the MSM5 ranges.

../shared/data/real/rtcm/RTK134_202102051543.rtcm3 (PROVENANCE.md: many GPS 1019s are up to a year
old, kept by the receiver for satellites not in view). pyrtcm is the reference decoder.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.geo import EphemerisStore, resolve_glonass_tb, satellite_geometry
from ionwarden.parsers import KeplerEphemeris
from tests._geo_support import ephemeris_from_rtcm, msm_pseudoranges, read_rtcm

RTK134 = "rtcm/RTK134_202102051543.rtcm3"
C = 299792458.0
WEEK = 2143  # PROVENANCE.md: GPS week of the capture
#: ARP from the file's 1006 (PROVENANCE.md).
ARP = np.array([-1078805.67, -5874977.02, 2234281.59])
#: Frames read: one 1019/1020 per satellite and ~50 MSM epochs (PROVENANCE.md frame mix).
FRAMES = 400


@pytest.fixture(scope="module")
def rtk134(real_data: Path):
    msgs = read_rtcm(real_data / RTK134, FRAMES)
    ephs = [e for e in map(ephemeris_from_rtcm, msgs) if e is not None]
    return ephs, msgs


def _first(msgs, ident):
    return next(m for m in msgs if m.identity == ident)


def test_ephemeris_store_rejects_rtk134_stale_1019s(rtk134):
    """EphemerisStore keeps only week-2143 sets usable at the RTK134 epoch; old weeks are stale."""
    ephs, msgs = rtk134
    gps = [e for e in ephs if isinstance(e, KeplerEphemeris)]
    msm = _first(msgs, "1075")
    t = WEEK * 604800.0 + msm.DF004 / 1000.0
    sats, _ = msm_pseudoranges(msm, "G", "1C")
    store = EphemerisStore()
    for e in gps:
        store.add(e)
    every = np.array(sorted({e.sat for e in gps}), dtype=np.int16)
    sel = store.select(every, t)
    assert set(sel.kepler.toe_gps_s // 604800.0) == {float(WEEK)}
    only_old = {e.sat for e in gps} - {e.sat for e in gps if e.week == WEEK}
    assert only_old  # PROVENANCE.md: weeks 45…93 mod 1024 are present
    assert store.statistics().stale >= len(only_old)
    assert not sel.valid[np.isin(every, sorted(only_old))].any()
    # Every tracked satellite has a fresh set; G11's says health 63 (in the data) and is refused.
    before = store.statistics().unhealthy
    tracked = store.select(sats, t)
    assert tracked.valid.tolist() == [s != 11 for s in sats.tolist()]
    assert store.statistics().unhealthy == before + 1


def test_satellite_geometry_fits_rtk134_gps_ranges(rtk134):
    """satellite_geometry + fresh 1019s fit RTK134 L1 C/A ranges to < 10 m after the clock."""
    # Source: RTK134_202102051543.rtcm3 (1006 ARP, 1019, 1075), decoded by pyrtcm.
    ephs, msgs = rtk134
    store = EphemerisStore()
    for e in ephs:
        if isinstance(e, KeplerEphemeris):
            store.add(e)
    msm = _first(msgs, "1075")
    t = WEEK * 604800.0 + msm.DF004 / 1000.0
    sats, pr = msm_pseudoranges(msm, "G", "1C")
    geo = satellite_geometry(t, ARP, sats, store, pseudorange_m=pr)
    assert geo.valid.sum() == len(sats) - 1  # G11 unhealthy
    sel = store.select(sats, t)
    tgd = np.append(sel.kepler.tgd_s[:, 0], np.nan)[sel.gather_index]
    # L1 C/A clock: Δt_sv − T_GD (IS-GPS-200 §20.3.3.3.3.2).
    res = pr - (geo.range_m - C * (geo.clock_s - tgd))
    keep = geo.valid & (geo.el_rad > np.radians(15.0))
    res = res[keep] - np.median(res[keep])
    assert keep.sum() >= 6
    assert np.std(res) < 10.0


def test_satellite_geometry_fits_rtk134_glonass_ranges(rtk134):
    """glonass_state via 1020 (t_b placed by N4/N_T) fits RTK134 GLONASS L1 ranges (< 10 m)."""
    # Source: RTK134_202102051543.rtcm3 (1020, 1085; GLONASS ICD Ed. 5.1 §A.3.1.2 orbit and
    # clock −τ_n + γ_n·(t − t_b): a wrong τ_n sign would leave tens of km).
    ephs, msgs = rtk134
    store = EphemerisStore()
    for e in ephs:
        if not isinstance(e, KeplerEphemeris):
            assert e.four_year == 7  # 2020–2023
            store.add(e)  # no reception time: N4/N_T place t_b
    t_gps = WEEK * 604800.0 + _first(msgs, "1075").DF004 / 1000.0
    residuals = []
    for msm in (m for m in msgs if m.identity == "1085"):
        t = resolve_glonass_tb(msm.DF034 / 1000.0, t_gps)  # DF034: GLONASS time of day (ms)
        sats, pr = msm_pseudoranges(msm, "R", "1C")
        geo = satellite_geometry(t, ARP, sats, store, pseudorange_m=pr)
        res = pr - (geo.range_m - C * geo.clock_s)
        keep = geo.valid & (geo.el_rad > np.radians(10.0))
        if keep.sum() >= 3:
            residuals.append(res[keep] - np.median(res[keep]))
    allres = np.concatenate(residuals)
    assert allres.size >= 100
    assert np.std(allres) < 10.0
