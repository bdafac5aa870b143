"""Real-data loaders for the geo tests (georinex as the reference RINEX reader)."""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np

from ionwarden.parsers import KeplerEphemeris, sat_id

if TYPE_CHECKING:
    from pathlib import Path

#: ../shared/data/real files (PROVENANCE.md): IGS merged GPS broadcast + P433 RINEX 3.03 obs.
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
