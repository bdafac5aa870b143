"""Real-data loaders for the geo tests (georinex as the reference RINEX reader)."""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np

from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris, sat_id

if TYPE_CHECKING:
    from pathlib import Path

#: ../shared/data/real files (PROVENANCE.md): IGS merged GPS broadcast + P433 RINEX 3.03 obs.
C_MPS = 299_792_458.0
NAV = "rinex/brdc0010.19n"
OBS = "rinex/P43300USA_R_20190012056_17M_15S_MO.rnx"


def load_gps_nav(real_data: Path) -> list[KeplerEphemeris]:
    """Every GPS record of the brdc file as KeplerEphemeris (georinex as the loader)."""
    import georinex as gr

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nav = gr.load(real_data / NAV)
    out = []
    for sv in nav.sv.values:
        d = nav.sel(sv=sv).dropna("time", how="all")
        for i in range(d.time.size):
            r = d.isel(time=i)
            t = np.datetime64(r.time.values, "s").astype(object)
            toc = (t.weekday() + 1) % 7 * 86400 + t.hour * 3600 + t.minute * 60 + t.second
            out.append(
                KeplerEphemeris(
                    sat=sat_id("G", int(sv[1:])),
                    week=int(r.GPSWeek),
                    toe_s=float(r.Toe),
                    toc_s=float(toc),
                    sqrt_a=float(r.sqrtA),
                    e=float(r.Eccentricity),
                    i0=float(r.Io),
                    omega0=float(r.Omega0),
                    omega=float(r.omega),
                    m0=float(r.M0),
                    delta_n=float(r.DeltaN),
                    idot=float(r.IDOT),
                    omega_dot=float(r.OmegaDot),
                    cuc=float(r.Cuc),
                    cus=float(r.Cus),
                    crc=float(r.Crc),
                    crs=float(r.Crs),
                    cic=float(r.Cic),
                    cis=float(r.Cis),
                    af0=float(r.SVclockBias),
                    af1=float(r.SVclockDrift),
                    af2=float(r.SVclockDriftRate),
                    iode=int(r.IODE),
                    iodc=int(r.IODC),
                    tgd_s=(float(r.TGD), math.nan),
                    health=int(r.health),
                    fit_interval_h=float(r.FitIntvl),
                    accuracy_m=float(r.SVacc),
                    source="RINEX",
                )
            )
    return out


def load_p433_c1c(real_data: Path) -> Any:
    """P433 GPS C1C pseudoranges as an xarray Dataset (georinex; its FutureWarning silenced)."""
    import georinex as gr

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return gr.load(real_data / OBS, meas=["C1C"], use="G")


# --- RTCM 3 (pyrtcm as the reference decoder; RTCM 10403.3 field numbers) ---------------------
# pyrtcm scales most fields; Keplerian angles arrive in semicircles (× π here), GLONASS positions
# in km, γ_n (DF121, 2⁻⁴⁰) and τ_n (DF124, 2⁻³⁰ s) as raw integers.
_PI = math.pi


def _kepler(
    system: str, prn: int, week: int, v: dict[str, float], ts: str, src: int
) -> KeplerEphemeris:
    return KeplerEphemeris(
        sat=sat_id(system, prn), week=week, toe_s=v["toe"], toc_s=v["toc"], sqrt_a=v["sqrt_a"],
        e=v["e"], i0=v["i0"] * _PI, omega0=v["om0"] * _PI, omega=v["om"] * _PI,
        m0=v["m0"] * _PI, delta_n=v["dn"] * _PI, idot=v["idot"] * _PI,
        omega_dot=v["omd"] * _PI, cuc=v["cuc"], cus=v["cus"], crc=v["crc"], crs=v["crs"],
        cic=v["cic"], cis=v["cis"], af0=v["af0"], af1=v["af1"], af2=v["af2"],
        iode=int(v["iode"]), iodc=int(v["iodc"]), tgd_s=(v["tgd1"], v["tgd2"]),
        health=int(v["health"]), fit_interval_h=4.0, accuracy_m=math.nan, time_system=ts,
        source=src,
    )  # fmt: skip


# Field map per message: our name → RTCM data field (RTCM 10403.3 Tables 3.5-21, -99, -100, -109).
_KEPLER_FIELDS = {
    ident: dict(pair.split("=") for pair in spec.split())
    for ident, spec in {
        "1019": "toe=DF093 toc=DF081 sqrt_a=DF092 e=DF090 i0=DF097 om0=DF095 om=DF099 m0=DF088 "
        "dn=DF087 idot=DF079 omd=DF100 cuc=DF089 cus=DF091 crc=DF098 crs=DF086 cic=DF094 "
        "cis=DF096 af0=DF084 af1=DF083 af2=DF082 iode=DF071 iodc=DF085 tgd1=DF101 health=DF102",
        "1045": "toe=DF304 toc=DF293 sqrt_a=DF303 e=DF301 i0=DF308 om0=DF306 om=DF310 m0=DF299 "
        "dn=DF298 idot=DF292 omd=DF311 cuc=DF300 cus=DF302 crc=DF309 crs=DF297 cic=DF305 "
        "cis=DF307 af0=DF296 af1=DF295 af2=DF294 iode=DF290 iodc=DF290 tgd1=DF312",
        "1042": "toe=DF505 toc=DF493 sqrt_a=DF504 e=DF502 i0=DF509 om0=DF507 om=DF511 m0=DF500 "
        "dn=DF499 idot=DF491 omd=DF512 cuc=DF501 cus=DF503 crc=DF510 crs=DF498 cic=DF506 "
        "cis=DF508 af0=DF496 af1=DF495 af2=DF494 iode=DF492 iodc=DF497 health=DF515",
    }.items()
}
_KEPLER_FIELDS["1046"] = {**_KEPLER_FIELDS["1045"], "tgd2": "DF313"}


def ephemeris_from_rtcm(msg: Any) -> KeplerEphemeris | GlonassEphemeris | None:
    """Our ephemeris types from a pyrtcm 1019/1020/1042/1045/1046 message (else None)."""
    ident = msg.identity
    if ident == "1020":
        return GlonassEphemeris(
            sat=sat_id("R", int(msg.DF038)), channel=int(msg.DF040) - 7,
            tb_s=int(msg.DF110) * 900.0,  # t_b in 15 min units
            day_number=int(msg.DF129), four_year=int(msg.DF134),  # N_T, N4 (0: not sent)
            x_m=msg.DF112 * 1e3, y_m=msg.DF115 * 1e3, z_m=msg.DF118 * 1e3,
            vx_mps=msg.DF111 * 1e3, vy_mps=msg.DF114 * 1e3, vz_mps=msg.DF117 * 1e3,
            ax_mps2=msg.DF113 * 1e3, ay_mps2=msg.DF116 * 1e3, az_mps2=msg.DF119 * 1e3,
            tau_n_s=int(msg.DF124) * 2.0**-30, gamma_n=int(msg.DF121) * 2.0**-40,
            health=int(msg.DF108), source=1020,
        )  # fmt: skip
    fields = _KEPLER_FIELDS.get(ident)
    if fields is None:
        return None
    v = {name: float(getattr(msg, df)) for name, df in fields.items()}
    v.setdefault("tgd2", math.nan)
    if ident == "1019":
        return _kepler("G", int(msg.DF009), 2048 + int(msg.DF076), v, "GPS", 1019)
    if ident == "1042":  # TGD1/TGD2 arrive in ns; BDT week + 1356 = GPS week
        v["tgd1"], v["tgd2"] = float(msg.DF513) * 1e-9, float(msg.DF514) * 1e-9
        return _kepler("C", int(msg.DF488), int(msg.DF489) + 1356, v, "BDT", 1042)
    health = (
        int(msg.DF314) | int(msg.DF315)  # F/NAV: E5a health, data validity
        if ident == "1045"
        else int(msg.DF287) | int(msg.DF288) | int(msg.DF316) | int(msg.DF317)  # I/NAV
    )
    v["health"] = health
    return _kepler("E", int(msg.DF252), int(msg.DF289) + 1024, v, "GPS", int(ident))


def msm_pseudoranges(msg: Any, system: str, signal: str) -> tuple[np.ndarray, np.ndarray]:
    """(sat ids, pseudoranges m) of one signal in an MSM4–7 message (RTCM 10403.3 §3.5.6:
    rough range DF397 + DF398 ms, fine DF400 (MSM4/5) or DF405 (MSM6/7) ms; × c/1000)."""
    fine = "DF405" if msg.identity[-1] in "67" else "DF400"
    index = {int(getattr(msg, f"PRN_{i:02d}")): i for i in range(1, msg.NSat + 1)}
    sats, pr = [], []
    for c in range(1, msg.NCell + 1):
        if getattr(msg, f"CELLSIG_{c:02d}") != signal:
            continue
        prn = int(getattr(msg, f"CELLPRN_{c:02d}"))
        i = index[prn]
        ms = getattr(msg, f"DF397_{i:02d}") + getattr(msg, f"DF398_{i:02d}")
        sats.append(sat_id(system, prn))
        pr.append((ms + getattr(msg, f"{fine}_{c:02d}")) * C_MPS / 1000.0)
    return np.array(sats, dtype=np.int16), np.array(pr)


def read_rtcm(path: Path, frames: int) -> list[Any]:
    """The first ``frames`` messages pyrtcm decodes (None for unknown frames dropped)."""
    from pyrtcm import RTCMReader

    out = []
    with open(path, "rb") as f:
        for n, (_, msg) in enumerate(RTCMReader(f, quitonerror=0)):
            if n >= frames:
                break
            if msg is not None:
                out.append(msg)
    return out
