"""Keplerian broadcast orbits (GPS, QZSS, NavIC, Galileo, BeiDou), vectorised over satellites.

Axes: ``n`` ephemerides (one per satellite) along the leading axis of every array of a
:class:`KeplerBatch`. Symbols follow IS-GPS-200 Table 20-IV: A semi-major axis, n mean motion,
M mean anomaly, E eccentric anomaly, ν true anomaly, Φ argument of latitude, Ω longitude of the
ascending node, t_k time from the ephemeris reference epoch.

One formulation serves every system: the orbit is first placed in the frame that coincides with
ECEF at t_k = 0 (Ω_k = Ω0 + Ω̇·t_k − Ω̇e·t_oe), then tilted about x (−5° for BeiDou GEO,
BDS-SIS-ICD-B1I §5.2.4.12; 0 otherwise) and rotated about z by Ω̇e·t_k. For tilt 0 this is
algebraically IS-GPS-200 Table 20-IV (Ω_k = Ω0 + (Ω̇ − Ω̇e)·t_k − Ω̇e·t_oe), so no satellite takes a
Python branch.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, KeplerEphemeris

from ._constants import (
    BDS_GEO_PRNS,
    BDS_GEO_TILT_RAD,
    HALF_WEEK_S,
    MU_BDS_M3PS2,
    MU_GAL_M3PS2,
    MU_GPS_M3PS2,
    OMEGA_E_BDS_RADPS,
    OMEGA_E_GAL_RADPS,
    OMEGA_E_GPS_RADPS,
    relativistic_f,
)

if TYPE_CHECKING:
    from collections.abc import Sequence

__all__ = ["KeplerBatch", "is_bds_geo", "kepler_state", "orbit_constants"]

F64 = npt.NDArray[np.float64]


def _newton_steps(e_max: float) -> int:
    """Newton steps for Kepler's equation started from M + e·sin M (error ≈ e²/2): each step
    squares the error (times ≈ e/2), so 2 steps reach double precision up to e ≈ 0.1 (GPS,
    BeiDou, QZSS IGSO e ≈ 0.075) and 3 steps up to e ≈ 0.3 (Galileo E14/E18: e ≈ 0.16)."""
    if e_max < 0.1:
        return 2
    if e_max < 0.3:
        return 3
    return 6


# System index (parsers._signals.SYSTEMS "GRECJSI") → (μ, Ω̇e).
_CONSTANTS_BY_SYSTEM: dict[int, tuple[float, float]] = {
    0: (MU_GPS_M3PS2, OMEGA_E_GPS_RADPS),  # GPS: IS-GPS-200 Table 20-IV
    2: (MU_GAL_M3PS2, OMEGA_E_GAL_RADPS),  # Galileo: OS SIS ICD §5.1.1
    3: (MU_BDS_M3PS2, OMEGA_E_BDS_RADPS),  # BeiDou: BDS-SIS-ICD-B1I §5.2.4.12
    4: (MU_GPS_M3PS2, OMEGA_E_GPS_RADPS),  # QZSS: IS-QZSS-PNT (IS-GPS-200 algorithm)
    6: (MU_GPS_M3PS2, OMEGA_E_GPS_RADPS),  # NavIC: SPS ICD (WGS 84 values)
}
_BDS = 3


def orbit_constants(sat: int) -> tuple[float, float]:
    """(μ m³/s², Ω̇e rad/s) of the Keplerian model of a satellite id; ValueError for GLONASS/SBAS."""
    try:
        return _CONSTANTS_BY_SYSTEM[sat // 100]
    except KeyError:
        raise ValueError(f"satellite {sat} has no Keplerian broadcast orbit") from None


def is_bds_geo(sat: int) -> bool:
    """BeiDou GEO satellite (C01–C05, C59–C63)?"""
    return sat // 100 == _BDS and sat % 100 in BDS_GEO_PRNS


@dataclass(frozen=True, slots=True, kw_only=True)
class KeplerBatch:
    """Structure of arrays over n Keplerian ephemerides (float64 unless noted; read-only).

    ``toe_gps_s``/``toc_gps_s`` are continuous GPS seconds (BeiDou BDT values shifted by +14 s);
    ``toe_sow_s`` is the broadcast t_oe in its own system's seconds of week (it enters Ω_k).
    Derived per-satellite terms of Table 20-IV that do not depend on t are precomputed.
    """

    sat: npt.NDArray[np.int16]
    iode: npt.NDArray[np.int32]
    is_bds_geo: npt.NDArray[np.bool_]
    toe_gps_s: F64
    toe_sow_s: F64
    toc_gps_s: F64
    a_m: F64
    e: F64
    sqrt_1me2: F64
    n_radps: F64  # corrected mean motion n0 + Δn
    m0: F64
    omega: F64
    i0: F64
    idot: F64
    omega_gk0: F64  # Ω0 − Ω̇e·t_oe
    omega_dot: F64
    omega_e_radps: F64
    cos_tilt: F64
    sin_tilt: F64
    cuc: F64
    cus: F64
    crc: F64
    crs: F64
    cic: F64
    cis: F64
    af0: F64
    af1: F64
    af2: F64
    rel_coef_s: F64  # F·e·√A, multiplies sin E
    tgd_s: F64  # (n, 2) broadcast group delays as in KeplerEphemeris.tgd_s (not applied here)
    harm_sin: F64  # (3, n) rows C_us, C_rs, C_is: the sin 2Φ harmonic corrections
    harm_cos: F64  # (3, n) rows C_uc, C_rc, C_ic: the cos 2Φ harmonic corrections
    toc_minus_toe_s: F64  # t_oc − t_oe folded into ±half a week
    kepler_iterations: int = 3  # Newton steps needed for the largest e of the batch

    def __len__(self) -> int:
        return int(self.sat.shape[0])

    @classmethod
    def from_ephemerides(cls, ephemerides: Sequence[KeplerEphemeris]) -> KeplerBatch:
        """Batch of the given ephemerides, in order. ValueError for a non-Keplerian system."""
        n = len(ephemerides)
        sat = np.fromiter((e.sat for e in ephemerides), dtype=np.int16, count=n)
        consts = [orbit_constants(int(s)) for s in sat]
        mu = np.array([c[0] for c in consts], dtype=np.float64).reshape(n)
        omega_e = np.array([c[1] for c in consts], dtype=np.float64).reshape(n)
        geo = np.fromiter((is_bds_geo(int(s)) for s in sat), dtype=np.bool_, count=n)

        def col(name: str) -> F64:
            return np.fromiter(
                (float(getattr(e, name)) for e in ephemerides), dtype=np.float64, count=n
            )

        # BeiDou toe/toc are BDT seconds of the BDT week; ``week`` is already the GPS week
        # (BDT week + 1356), and BDT = GPST − 14 s (BDS-SIS-ICD-B1I §5.1.3).
        shift = np.fromiter(
            (BDS_GPS_OFFSET_S if e.time_system == "BDT" else 0.0 for e in ephemerides),
            dtype=np.float64,
            count=n,
        )
        week_s = col("week") * SECONDS_PER_WEEK
        sqrt_a = col("sqrt_a")
        a = sqrt_a * sqrt_a
        e = col("e")
        toe = col("toe_s")
        rel_f = np.array([relativistic_f(float(m)) for m in mu], dtype=np.float64).reshape(n)
        tilt = np.where(geo, BDS_GEO_TILT_RAD, 0.0)
        batch = cls(
            sat=sat,
            iode=np.fromiter((x.iode for x in ephemerides), dtype=np.int32, count=n),
            is_bds_geo=geo,
            toe_gps_s=week_s + toe + shift,
            toe_sow_s=toe,
            toc_gps_s=week_s + col("toc_s") + shift,
            a_m=a,
            e=e,
            sqrt_1me2=np.sqrt(1.0 - e * e),
            n_radps=np.sqrt(mu / (a * a * a)) + col("delta_n"),
            m0=col("m0"),
            omega=col("omega"),
            i0=col("i0"),
            idot=col("idot"),
            omega_gk0=col("omega0") - omega_e * toe,
            omega_dot=col("omega_dot"),
            omega_e_radps=omega_e,
            cos_tilt=np.cos(tilt),
            sin_tilt=np.sin(tilt),
            cuc=col("cuc"),
            cus=col("cus"),
            crc=col("crc"),
            crs=col("crs"),
            cic=col("cic"),
            cis=col("cis"),
            af0=col("af0"),
            af1=col("af1"),
            af2=col("af2"),
            rel_coef_s=rel_f * e * sqrt_a,
            tgd_s=np.array([x.tgd_s for x in ephemerides], dtype=np.float64).reshape(n, 2),
            harm_sin=np.stack([col("cus"), col("crs"), col("cis")]).reshape(3, n),
            harm_cos=np.stack([col("cuc"), col("crc"), col("cic")]).reshape(3, n),
            toc_minus_toe_s=_fold_half_week(col("toc_s") - toe),
            kepler_iterations=_newton_steps(float(np.max(e, initial=0.0))),
        )
        for name in cls.__slots__:
            arr = getattr(batch, name)
            if isinstance(arr, np.ndarray):
                arr.setflags(write=False)
        return batch

    def take(self, index: npt.ArrayLike) -> KeplerBatch:
        """Sub-batch of the rows ``index`` (integer array or boolean mask)."""
        idx = np.asarray(index)
        parts: dict[str, Any] = {}
        for name in self.__slots__:
            value = getattr(self, name)
            if name in {"harm_sin", "harm_cos"}:
                value = value[:, idx]
            elif isinstance(value, np.ndarray):
                value = value[idx]
            parts[name] = value
        return KeplerBatch(**parts)


def _fold_half_week(dt_s: F64) -> F64:
    """t − t_ref folded into [−302 400, 302 400) s: the week crossover of Table 20-IV."""
    return np.asarray((dt_s + HALF_WEEK_S) % SECONDS_PER_WEEK - HALF_WEEK_S, dtype=np.float64)


def kepler_state(batch: KeplerBatch, t_gps_s: npt.ArrayLike) -> tuple[F64, F64, F64]:
    """ECEF position (n, 3) m, velocity (n, 3) m/s and satellite clock offset (n,) s at GPS time
    ``t_gps_s`` (continuous seconds, scalar or (n,)).

    Position: IS-GPS-200 Table 20-IV (Galileo OS SIS ICD §5.1.1, BDS-SIS-ICD-B1I §5.2.4.12 with
    their constants). Velocity: the analytic time derivative of the same formulas (includes the
    rotation of the Earth-fixed frame). Clock: a_f0 + a_f1·Δt + a_f2·Δt² about t_oc plus the
    relativistic term F·e·√A·sin E (IS-GPS-200 §20.3.3.3.3.1); group delays are not applied.
    """
    n = len(batch)
    t = np.asarray(t_gps_s, dtype=np.float64)
    assert t.ndim == 0 or t.shape == (n,), t.shape
    # Numpy calls on ~40-element arrays cost about a microsecond each whatever the size, so the
    # sin/cos of independent angles and the three harmonic corrections are evaluated stacked.
    tk = _fold_half_week(t - batch.toe_gps_s)
    e = batch.e
    m = batch.m0 + batch.n_radps * tk
    ek = m + e * np.sin(m)
    for _ in range(batch.kepler_iterations):
        ek -= (ek - e * np.sin(ek) - m) / (1.0 - e * np.cos(ek))
    sin_e = np.sin(ek)
    cos_e = np.cos(ek)
    one_m_ecos = 1.0 - e * cos_e
    phi = np.arctan2(batch.sqrt_1me2 * sin_e, cos_e - e) + batch.omega
    two_phi = 2.0 * phi
    s2 = np.sin(two_phi)
    c2 = np.cos(two_phi)
    corr = batch.harm_sin * s2 + batch.harm_cos * c2  # δu, δr, δi
    # Rates (derivatives of the lines above): dE/dt, dΦ/dt, then d(δu, δr, δi)/dt.
    e_dot = batch.n_radps / one_m_ecos
    phi_dot = batch.sqrt_1me2 * e_dot / one_m_ecos
    corr_dot = (2.0 * phi_dot) * (batch.harm_sin * c2 - batch.harm_cos * s2)
    u = phi + corr[0]
    r = batch.a_m * one_m_ecos + corr[1]
    inc = batch.i0 + corr[2] + batch.idot * tk
    u_dot = phi_dot + corr_dot[0]
    r_dot = batch.a_m * e * sin_e * e_dot + corr_dot[1]
    inc_dot = batch.idot + corr_dot[2]
    # Angles: u, i, Ω_k in the frame fixed at t_k = 0, and θ = Ω̇e·t_k of the Earth since t_oe.
    w = batch.omega_e_radps
    ang = np.stack((u, inc, batch.omega_gk0 + batch.omega_dot * tk, w * tk))
    cs = np.cos(ang)
    sn = np.sin(ang)
    cu, ci, co, cth = cs
    su, si, so, sth = sn
    # In-plane position and velocity.
    xp = r * cu
    yp = r * su
    xp_dot = r_dot * cu - yp * u_dot
    yp_dot = r_dot * su + xp * u_dot
    yci = yp * ci
    x0 = xp * co - yci * so
    y0 = xp * so + yci * co
    z0 = yp * si
    ys_idot = z0 * inc_dot
    yd_ci = yp_dot * ci
    vx0 = xp_dot * co - (yd_ci - ys_idot) * so - y0 * batch.omega_dot
    vy0 = xp_dot * so + (yd_ci - ys_idot) * co + x0 * batch.omega_dot
    vz0 = yp_dot * si + yci * inc_dot
    # Tilt about x (BDS GEO: −5°; identity otherwise).
    ct = batch.cos_tilt
    st = batch.sin_tilt
    y1 = ct * y0 + st * z0
    vy1 = ct * vy0 + st * vz0
    pos = np.empty((n, 3), dtype=np.float64)
    vel = np.empty((n, 3), dtype=np.float64)
    pos[:, 2] = ct * z0 - st * y0
    vel[:, 2] = ct * vz0 - st * vy0
    # Earth rotation since t_oe: frame rotation about z by θ.
    pos[:, 0] = cth * x0 + sth * y1
    pos[:, 1] = cth * y1 - sth * x0
    vel[:, 0] = cth * vx0 + sth * vy1 + w * pos[:, 1]
    vel[:, 1] = cth * vy1 - sth * vx0 - w * pos[:, 0]
    dtc = tk - batch.toc_minus_toe_s
    clock = batch.af0 + dtc * (batch.af1 + dtc * batch.af2) + batch.rel_coef_s * sin_e
    return pos, vel, clock
