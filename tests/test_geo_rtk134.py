"""EphemerisStore + satellite_geometry on RTK134: stale 1019s rejected, fresh ones fit the MSM5 ranges.

../shared/data/real/rtcm/RTK134_202102051543.rtcm3 (PROVENANCE.md: many GPS 1019s are up to a year
old, kept by the receiver for satellites not in view). pyrtcm is the reference decoder.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.geo import EphemerisStore, satellite_geometry
from ionwarden.parsers import KeplerEphemeris, sat_id

RTK134 = "rtcm/RTK134_202102051543.rtcm3"
C = 299792458.0
#: ARP from the file's 1006 (PROVENANCE.md).
ARP = np.array([-1078805.67, -5874977.02, 2234281.59])
#: Frames read: enough for one 1019 per PRN and the first MSM epoch (PROVENANCE.md frame mix).
FRAMES = 400


def _eph_from_1019(msg) -> KeplerEphemeris:
    """RTCM 10403.3 message 1019 (pyrtcm scales the fields; angles arrive in semicircles)."""
    pi = math.pi
    return KeplerEphemeris(
        sat=sat_id("G", int(msg.DF009)), week=2048 + int(msg.DF076),  # DF076: week mod 1024
        toe_s=float(msg.DF093), toc_s=float(msg.DF081), sqrt_a=float(msg.DF092),
        e=float(msg.DF090), i0=float(msg.DF097) * pi, omega0=float(msg.DF095) * pi,
        omega=float(msg.DF099) * pi, m0=float(msg.DF088) * pi, delta_n=float(msg.DF087) * pi,
        idot=float(msg.DF079) * pi, omega_dot=float(msg.DF100) * pi, cuc=float(msg.DF089),
        cus=float(msg.DF091), crc=float(msg.DF098), crs=float(msg.DF086),
        cic=float(msg.DF094), cis=float(msg.DF096), af0=float(msg.DF084),
        af1=float(msg.DF083), af2=float(msg.DF082), iode=int(msg.DF071), iodc=int(msg.DF085),
        tgd_s=(float(msg.DF101), math.nan), health=int(msg.DF102),
        fit_interval_h=4.0, accuracy_m=math.nan, source=1019,
    )  # fmt: skip


@pytest.fixture(scope="module")
def rtk134(real_data: Path):
    from pyrtcm import RTCMReader

    ephs, msm = [], None
    with open(real_data / RTK134, "rb") as f:
        for n, (_, msg) in enumerate(RTCMReader(f)):
            if n >= FRAMES:
                break
            if msg is None:
                continue
            if msg.identity == "1019":
                ephs.append(_eph_from_1019(msg))
            elif msg.identity == "1075" and msm is None:
                msm = msg
    assert msm is not None
    return ephs, msm


def _c1c(msm) -> tuple[float, np.ndarray, np.ndarray]:
    """(t GPS s, sat ids, L1 C/A pseudoranges) of an MSM5 (RTCM 10403.3 §3.5, pyrtcm decode)."""
    t = 2143 * 604800.0 + msm.DF004 / 1000.0  # GPS week 2143 (PROVENANCE.md)
    rough = {int(getattr(msm, f"PRN_{i:02d}")): i for i in range(1, msm.NSat + 1)}
    sats, pr = [], []
    for c in range(1, msm.NCell + 1):
        if getattr(msm, f"CELLSIG_{c:02d}") != "1C":
            continue
        prn = int(getattr(msm, f"CELLPRN_{c:02d}"))
        i = rough[prn]
        ms = getattr(msm, f"DF397_{i:02d}") + getattr(msm, f"DF398_{i:02d}")
        ms += getattr(msm, f"DF400_{c:02d}")
        sats.append(sat_id("G", prn))
        pr.append(ms * C / 1000.0)
    return t, np.array(sats, dtype=np.int16), np.array(pr)


def test_ephemeris_store_rejects_rtk134_stale_1019s(rtk134):
    """EphemerisStore keeps only week-2143 sets usable at the RTK134 epoch; old weeks are stale."""
    ephs, msm = rtk134
    t, sats, _ = _c1c(msm)
    store = EphemerisStore()
    for e in ephs:
        store.add(e)
    every = np.array(sorted({e.sat for e in ephs}), dtype=np.int16)
    sel = store.select(every, t)
    assert set(sel.kepler.toe_gps_s // 604800.0) == {2143.0}
    only_old = {e.sat for e in ephs} - {e.sat for e in ephs if e.week == 2143}
    assert only_old  # PROVENANCE.md: weeks 45…93 mod 1024 are present
    assert store.statistics().stale >= len(only_old)
    assert not sel.valid[np.isin(every, sorted(only_old))].any()
    # Every tracked satellite has a fresh set; G11's says health 63 (in the data) and is refused.
    before = store.statistics().unhealthy
    tracked = store.select(sats, t)
    assert tracked.valid.tolist() == [s != 11 for s in sats.tolist()]
    assert store.statistics().unhealthy == before + 1


def test_satellite_geometry_fits_rtk134_msm5_ranges(rtk134):
    """satellite_geometry + fresh 1019s fit RTK134 L1 C/A ranges to < 10 m after the clock."""
    # Source: RTK134_202102051543.rtcm3 (1006 ARP, 1019, 1075), decoded by pyrtcm.
    ephs, msm = rtk134
    t, sats, pr = _c1c(msm)
    store = EphemerisStore()
    for e in ephs:
        store.add(e)
    geo = satellite_geometry(t, ARP, sats, store, pseudorange_m=pr)
    assert geo.valid.sum() == len(sats) - 1  # G11 unhealthy
    sel = store.select(sats, t)
    tgd = np.append(sel.kepler.tgd_s[:, 0], np.nan)[sel.gather_index]
    # L1 C/A clock: Δt_sv − T_GD (IS-GPS-200 §20.3.3.3.3.2).
    res = pr - (geo.range_m - C * (geo.clock_s - tgd))
    keep = geo.valid & (geo.el_rad > np.radians(15.0))
    res = res[keep] - np.median(res[keep])
    assert keep.sum() >= 6
    print(f"RTK134 C1C residuals above 15°: std {np.std(res):.2f} m, max {np.abs(res).max():.2f} m")
    assert np.std(res) < 10.0
