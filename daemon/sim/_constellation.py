"""Invented Walker-like constellations as broadcast ephemerides that the orbit code propagates.

Every value is built on the LSB grid of its RTCM field (RTCM 10403.3 Tables 3.5-21, -22, -19, -20;
on the coarsest LSB of each field across 1019/1045/1042), so the ephemeris a receiver decodes is the simulator's
truth to the last bit. Consecutive sets continue the same orbit: the per-set increments of M0, Ω0
and a_f0 are whole LSBs, by choosing √A (mean motion), Ω̇ and a_f1 on grids that make them so. BeiDou
GEO node terms and GLONASS state vectors cannot be kept on the grid across sets: their truth steps by
up to a few centimetres (GEO) or about 10 cm and 2 cm/s (GLONASS, after trading a few LSBs of
position against velocity, see :func:`_glonass_on_grid`) at set changes, exactly as the broadcast
orbits do. Across a week rollover Ω0 is re-referenced to the new week, which costs about 1 cm.

Validity windows (continuous GPS seconds, SCIENCE.md §6): GPS t_oe every 2 h, used ±1 h; Galileo
every hour, ±30 min; BeiDou every BDT hour (GPS + 14 s), ±30 min; GLONASS t_b every 30 min of
UTC(SU) (GPS + leap seconds), ±15 min.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon.geo import GlonassBatch, KeplerBatch, glonass_state
from ionwarden.daemon.geo._constants import (
    MU_BDS_M3PS2,
    MU_GAL_M3PS2,
    MU_GPS_M3PS2,
    OMEGA_E_BDS_RADPS,
    OMEGA_E_GAL_RADPS,
    OMEGA_E_GPS_RADPS,
)
from ionwarden.daemon.geo._glonass import rk4_propagate
from ionwarden.parsers import (
    BDS_GPS_OFFSET_S,
    SECONDS_PER_WEEK,
    GlonassEphemeris,
    GpsTime,
    KeplerEphemeris,
    gps_to_utc,
    leap_seconds_at,
    quantise_for_rtcm,
    sat_id,
)

if TYPE_CHECKING:
    import numpy.typing as npt

__all__ = ["Constellation", "EphemerisSeries", "build_constellation"]

_SC = math.pi  # semicircle → rad
_ANG = 2.0**-31  # M0, Ω0, i0, ω LSB (semicircles)
_RATE = 2.0**-43  # Δn, Ω̇, IDOT LSB (semicircles/s)
_ECC = 2.0**-33
_SQRT_A = 2.0**-19
_CXX = 2.0**-29  # Cuc, Cus, Cic, Cis (rad): multiples of the GPS LSB are multiples of BDS 2⁻³¹
_CRX = 2.0**-5  # Crc, Crs (m)
_AF0 = 2.0**-31  # a_f0 (s): the coarsest of GPS 2⁻³¹, Galileo 2⁻³⁴, BeiDou 2⁻³³
_AF1_STEP = 2.0**-35  # a_f1 grid making a_f1·Δt a whole a_f0 LSB for Δt = 3600 and 7200 s
_OMEGA_DOT_STEP = {7200.0: 2.0**-36, 3600.0: 2.0**-35}  # semicircles/s (see module docstring)
_TGD = 2.0**-31
#: GLONASS frequency channels of slots 1…24 (antipodal slots share a channel; invented mix).
_GLO_CHANNELS = (1, -4, 5, 6, 1, -4, 5, 6, -2, -7, 0, -1, -2, -7, 0, -1, 4, -3, 3, 2, 4, -3, 3, 2)
_MOSCOW_OFFSET_S = 10_800.0
_DAY_S = 86_400.0


@dataclass(frozen=True, slots=True)
class EphemerisSeries:
    """Ephemeris sets of one system: set ``k`` (epoch ``ref_gps_s[k]``) is the truth for
    ``start_gps_s[k] <= t < start_gps_s[k + 1]``; ``ephemerides[k]`` lists one per satellite."""

    system: str
    sats: npt.NDArray[np.int16]
    ref_gps_s: npt.NDArray[np.float64]
    start_gps_s: npt.NDArray[np.float64]
    ephemerides: tuple[tuple[KeplerEphemeris, ...] | tuple[GlonassEphemeris, ...], ...]
    batches: tuple[KeplerBatch | GlonassBatch, ...]

    def set_index(self, t_gps_s: float) -> int:
        k = int(np.searchsorted(self.start_gps_s, t_gps_s, side="right")) - 1
        return min(max(k, 0), len(self.ref_gps_s) - 1)


@dataclass(frozen=True, slots=True)
class Constellation:
    """All simulated satellites (ordered G, R, E, C as in ``sats``) and their ephemeris series."""

    sats: npt.NDArray[np.int16]
    series: dict[str, EphemerisSeries]
    glo_channel: npt.NDArray[np.int8]  # per entry of ``sats`` (0 for non-GLONASS)

    def boundaries(self) -> npt.NDArray[np.float64]:
        """Every set change (GPS s), sorted: blocks of epochs never straddle one."""
        return np.unique(np.concatenate([s.start_gps_s[1:] for s in self.series.values()]))


def _grid(x: float, step: float) -> float:
    return round(x / step) * step


def _wrap_int32(v: int) -> int:
    return (v + 2**31) % 2**32 - 2**31


def _sqrt_a_on_grid(a_nominal_m: float, mu: float, dt_s: float, offset_radps: float) -> float:
    """√A on its grid such that (n − offset)·Δt is (nearly) a whole number of M0 LSBs."""
    base = round(math.sqrt(a_nominal_m) / _SQRT_A)
    cand = (base + np.arange(-40_000, 40_001)) * _SQRT_A
    a = cand * cand
    n = np.sqrt(mu / (a * a * a))
    x = (n - offset_radps) * dt_s / (_ANG * _SC)
    best = int(np.argmin(np.abs(x - np.round(x))))
    return float(cand[best])


def _quantise(eph: KeplerEphemeris) -> KeplerEphemeris:
    return quantise_for_rtcm(eph)


def _kepler_series(
    system: str,
    prns: list[int],
    rng: np.random.Generator,
    t0_gps_s: float,
    t1_gps_s: float,
) -> EphemerisSeries:
    """Walker-like MEO (plus BeiDou GEO/IGSO) sets covering [t0, t1]."""
    mu, we, dt, shift = {
        "G": (MU_GPS_M3PS2, OMEGA_E_GPS_RADPS, 7200.0, 0.0),
        "E": (MU_GAL_M3PS2, OMEGA_E_GAL_RADPS, 3600.0, 0.0),
        "C": (MU_BDS_M3PS2, OMEGA_E_BDS_RADPS, 3600.0, BDS_GPS_OFFSET_S),
    }[system]
    k0 = math.floor((t0_gps_s - shift) / dt)
    k1 = math.ceil((t1_gps_s - shift) / dt) + 1
    refs = np.arange(k0, k1 + 1) * dt + shift  # continuous GPS seconds of each t_oe
    t_ref = float(refs[0])
    meo = {"G": (26_559_700.0, 55.0, 6), "E": (29_599_800.0, 56.0, 3), "C": (27_906_100.0, 55.0, 3)}
    a_meo, inc_meo, planes = meo[system]
    meo_prns = [p for p in prns if not (system == "C" and p <= 8)]
    per_plane = math.ceil(len(meo_prns) / planes)
    elements = []
    for prn in prns:
        if system == "C" and prn <= 5:  # GEO: 58.75°E … 160°E (invented slots)
            lon = math.radians((58.75, 80.0, 110.5, 140.0, 160.0)[prn - 1])
            elements.append(("geo", prn, 42_164_200.0, 5.0, 0.0, lon, 0.0))
            continue
        if system == "C" and prn <= 8:  # IGSO: three planes crossing the equator near 118°E
            node = math.radians(118.0 + (prn - 6) * 120.0)
            elements.append(("igso", prn, 42_164_200.0, 55.0, node, (prn - 6) * 2.1, 0.003))
            continue
        j = meo_prns.index(prn)
        plane, slot = divmod(j, per_plane)
        node = 2.0 * math.pi * plane / planes + 0.3
        u = 2.0 * math.pi * slot / per_plane + plane * 2.0 * math.pi / (per_plane * planes)
        elements.append(("meo", prn, a_meo, inc_meo, node, u, 0.001 + 0.01 * rng.random()))
    sats = np.array([sat_id(system, p) for p in prns], dtype=np.int16)
    per_set: list[list[KeplerEphemeris]] = [[] for _ in refs]
    toe_sow0 = (t_ref - shift) % SECONDS_PER_WEEK
    for kind, prn, a_nom, inc_deg, node_ecef, u0, ecc in elements:
        geo = kind == "geo"
        da = 0.0 if kind != "meo" else rng.uniform(-2000.0, 2000.0)
        sqrt_a = _sqrt_a_on_grid(a_nom + da, mu, dt, we if geo else 0.0)
        e = _grid(ecc, _ECC)  # GEO: circular, else ω would have to turn with the GK frame
        omega_int = round(rng.uniform(-1.0, 1.0) / _ANG)
        i0_int = round(inc_deg / 180.0 / _ANG)
        a = sqrt_a * sqrt_a
        n = math.sqrt(mu / (a * a * a))
        if geo:
            # GK frame: an equatorial orbit tilted by +5° about x has i = 5° and its ascending node
            # on −x (Ω_GK = π), so that the ICD's −5° tilt puts it back (BDS ICD §5.2.4.12).
            omega_dot = 0.0
            omega_int = 0
            m0_ref = u0 - math.pi  # node at −x of the GK frame
            m_step = round((n - we) * dt / (_ANG * _SC))
        else:
            step = _OMEGA_DOT_STEP[dt]
            omega_dot = round(-8.0e-9 / _SC / step) * step * _SC
            m0_ref = u0 - omega_int * _ANG * _SC
            m_step = round(n * dt / (_ANG * _SC))
        m0_int = round(m0_ref / _SC / _ANG)
        omega0_ref = node_ecef + we * toe_sow0  # Ω0 = Ω_ECEF(t_oe) + Ω̇e·t_oe
        omega0_int = _wrap_int32(round(omega0_ref / _SC / _ANG))
        o_step = round(omega_dot * dt / (_ANG * _SC))
        af1 = int(rng.integers(-2, 3)) * _AF1_STEP
        af0_int = round(rng.uniform(-2.0e-4, 2.0e-4) / _AF0)
        af0_step = round(af1 * dt / _AF0)
        tgd_lsb = 1e-10 if system == "C" else _TGD  # BDS TGD: 0.1 ns (BDS ICD §5.2.4.8)
        tgd = _grid(rng.uniform(-8e-9, 8e-9), tgd_lsb)
        tgd2 = _grid(rng.uniform(-8e-9, 8e-9), tgd_lsb) if system == "C" else math.nan
        harmonics = {
            "cuc": _grid(rng.normal(0.0, 2e-6), _CXX),
            "cus": _grid(rng.normal(0.0, 6e-6), _CXX),
            "crc": _grid(rng.normal(200.0, 40.0), _CRX),
            "crs": _grid(rng.normal(0.0, 30.0), _CRX),
            "cic": _grid(rng.normal(0.0, 5e-8), _CXX),
            "cis": _grid(rng.normal(0.0, 5e-8), _CXX),
        }
        if geo:
            harmonics = dict.fromkeys(harmonics, 0.0)
        for k, ref in enumerate(refs):
            toe_sow = (float(ref) - shift) % SECONDS_PER_WEEK
            week_sys = math.floor((float(ref) - shift) / SECONDS_PER_WEEK)
            if geo:
                om0_int = round((we * toe_sow + math.pi) / (_ANG * _SC))
            else:
                om0_int = omega0_int + k * o_step
                if toe_sow < toe_sow0:  # next week: Ω0 refers to the new week start
                    om0_int -= round(we * SECONDS_PER_WEEK / (_ANG * _SC))
            om0 = _wrap_int32(om0_int) * _ANG * _SC
            per_set[k].append(
                _quantise(
                    KeplerEphemeris(
                        sat=sat_id(system, prn),
                        week=week_sys,  # BDT week + 1356 is the GPS-numbered week
                        toe_s=toe_sow,
                        toc_s=toe_sow,
                        sqrt_a=sqrt_a,
                        e=e,
                        i0=i0_int * _ANG * _SC,
                        omega0=om0,
                        omega=omega_int * _ANG * _SC,
                        m0=_wrap_int32(m0_int + k * m_step) * _ANG * _SC,
                        delta_n=0.0,
                        idot=0.0,
                        omega_dot=omega_dot,
                        af0=(af0_int + k * af0_step) * _AF0,
                        af1=af1,
                        af2=0.0,
                        iode=(k0 + k) % {"G": 256, "E": 1024, "C": 32}[system],
                        iodc=(k0 + k) % {"G": 256, "E": 1024, "C": 32}[system],
                        tgd_s=(tgd, tgd2),
                        health=0,
                        fit_interval_h=4.0,
                        accuracy_m=2.0,
                        time_system="BDT" if system == "C" else "GPS",
                        source={"G": 1019, "E": 1045, "C": 1042}[system],
                        **harmonics,
                    )
                )
            )
    ephs = tuple(tuple(s) for s in per_set)
    return EphemerisSeries(
        system=system,
        sats=sats,
        ref_gps_s=refs.astype(np.float64),
        start_gps_s=(refs - dt / 2.0).astype(np.float64),
        ephemerides=ephs,
        batches=tuple(KeplerBatch.from_ephemerides(s) for s in ephs),
    )


def _glonass_series(
    slots: list[int], rng: np.random.Generator, t0_gps_s: float, t1_gps_s: float
) -> EphemerisSeries:
    """GLONASS: 3 planes × 8 slots, i = 64.8°, state vectors chained from one RK4 trajectory."""
    dt = 1800.0
    leap = float(leap_seconds_at(gps_to_utc(GpsTime.from_total(t0_gps_s))))
    k0 = math.floor((t0_gps_s - leap) / dt)
    k1 = math.ceil((t1_gps_s - leap) / dt) + 1
    refs = np.arange(k0, k1 + 1) * dt + leap
    a = 25_508_200.0
    n = math.sqrt(3.986004418e14 / a**3)
    w = 7.292115e-5
    states = []
    for slot in slots:
        plane = (slot - 1) // 8
        node = 2.0 * math.pi * plane / 3.0 + 0.7
        u = 2.0 * math.pi * ((slot - 1) % 8) / 8.0 + plane * math.pi / 12.0
        ci, si = math.cos(math.radians(64.8)), math.sin(math.radians(64.8))
        cu, su, co, so = math.cos(u), math.sin(u), math.cos(node), math.sin(node)
        r = np.array([cu * co - su * ci * so, cu * so + su * ci * co, su * si]) * a
        v = np.array([-su * co - cu * ci * so, -su * so + cu * ci * co, cu * si]) * a * n
        v = v - np.array([-w * r[1], w * r[0], 0.0])
        states.append(np.concatenate([r, v]))
    tau = [_grid(rng.uniform(-1e-4, 1e-4), 2.0**-30) for _ in slots]
    # Δτ_n (L2 − L1 equipment delay, GLONASS ICD Table 4.5): whole DF125 LSBs (2⁻³⁰ s), 1–8 of
    # either sign; slots ≡ 2 (mod 8) broadcast 0 ("not known", as some receivers send).
    dtau = [
        0.0 if slot % 8 == 2 else float(rng.integers(1, 9) * rng.choice((-1, 1))) * 2.0**-30
        for slot in slots
    ]
    per_set: list[list[GlonassEphemeris]] = []
    state = np.array(states)
    for ref in refs:
        moscow = float(ref) - leap + _MOSCOW_OFFSET_S
        days = math.floor(moscow / _DAY_S)  # days since 1980-01-06 (Moscow)
        tb = moscow - days * _DAY_S
        # N4 (four-year interval from 1996) and N_T (day in it): 1996-01-01 is day 5839 here.
        since96 = days - 5839
        row = []
        for j, slot in enumerate(slots):
            eph = GlonassEphemeris(
                sat=sat_id("R", slot),
                channel=_GLO_CHANNELS[slot - 1],
                tb_s=tb,
                day_number=since96 % 1461 + 1,
                four_year=since96 // 1461 + 1,
                x_m=float(state[j, 0]),
                y_m=float(state[j, 1]),
                z_m=float(state[j, 2]),
                vx_mps=float(state[j, 3]),
                vy_mps=float(state[j, 4]),
                vz_mps=float(state[j, 5]),
                ax_mps2=0.0,
                ay_mps2=0.0,
                az_mps2=0.0,
                tau_n_s=tau[j],
                gamma_n=0.0,
                health=0,
                source=1020,
                dtau_s=dtau[j],
            )
            row.append(quantise_for_rtcm(eph))
        per_set.append(row)
        batch = GlonassBatch.from_ephemerides(row)
        pos, vel, _ = glonass_state(batch, float(ref) + dt)
        switch, _, _ = glonass_state(batch, float(ref) + dt / 2.0)
        state = _glonass_on_grid(np.concatenate([pos, vel], axis=1), dt / 2.0, switch)
    ephs = tuple(tuple(s) for s in per_set)
    return EphemerisSeries(
        system="R",
        sats=np.array([sat_id("R", s) for s in slots], dtype=np.int16),
        ref_gps_s=refs.astype(np.float64),
        start_gps_s=(refs - dt / 2.0).astype(np.float64),
        ephemerides=ephs,
        batches=tuple(GlonassBatch.from_ephemerides(s) for s in ephs),
    )


#: GLONASS 1020 LSBs (RTCM 10403.3 Table 3.5-22 / GLONASS ICD Table 4.5): 2⁻¹¹ km and 2⁻²⁰ km/s.
_GLO_LSB = np.array([2.0**-11 * 1e3] * 3 + [2.0**-20 * 1e3] * 3)
_GLO_SEARCH = np.arange(-24, 25)


def _glonass_on_grid(
    x: npt.NDArray[np.float64], back_s: float, target: npt.NDArray[np.float64]
) -> npt.NDArray[np.float64]:
    """The on-grid state at t_b nearest in effect to ``x``: rounding x (up to 0.25 m and 0.5 mm/s)
    would make the orbit jump by ~1 m where this set takes over from the previous one (``back_s``
    earlier), so a few LSBs of position and velocity are traded per axis until the back-propagated
    position matches ``target`` (the previous set's position at the switch) to about a centimetre."""
    n = x.shape[0]
    acc = np.zeros((n, 3))
    dts = np.full(n, -back_s)
    steps = max(1, round(back_s / 60.0))
    q = np.round(x / _GLO_LSB) * _GLO_LSB
    base = rk4_propagate(q, acc, dts, steps)[:, :3]
    jac = np.empty((n, 3, 6))
    for c in range(6):
        d = np.zeros(6)
        d[c] = _GLO_LSB[c]
        jac[:, :, c] = rk4_propagate(q + d, acc, dts, steps)[:, :3] - base
    r0 = base - target
    off = np.zeros((n, 6))
    a_grid, b_grid = (g.ravel() for g in np.meshgrid(_GLO_SEARCH, _GLO_SEARCH))
    for _ in range(3):
        for i in range(3):
            rest = r0 + np.einsum("nkc,nc->nk", jac, off)
            rest -= jac[:, :, i] * off[:, i : i + 1] + jac[:, :, 3 + i] * off[:, 3 + i : 4 + i]
            cand = (
                rest[:, None, :]
                + a_grid[None, :, None] * jac[:, None, :, i]
                + b_grid[None, :, None] * jac[:, None, :, 3 + i]
            )
            best = np.argmin(np.einsum("nmk,nmk->nm", cand, cand), axis=1)
            off[:, i] = a_grid[best]
            off[:, 3 + i] = b_grid[best]
    return np.asarray(q + off * _GLO_LSB, dtype=np.float64)


#: PRNs per system: GPS 32, GLONASS 24 slots, Galileo 24, BeiDou 5 GEO + 3 IGSO + 18 MEO.
DEFAULT_PRNS: dict[str, list[int]] = {
    "G": list(range(1, 33)),
    "R": list(range(1, 25)),
    "E": [*range(1, 6), *range(7, 16), 18, 19, 21, *range(24, 28), 30, 31, 33],
    "C": [*range(1, 9), *range(19, 37)],
}


def build_constellation(systems: str, seed: int, t0_gps_s: float, t1_gps_s: float) -> Constellation:
    """Ephemeris series for ``systems`` (subset of "GREC") covering GPS seconds [t0, t1]."""
    series: dict[str, EphemerisSeries] = {}
    for system in "GREC":
        if system not in systems:
            continue
        rng = np.random.default_rng([seed, ord(system)])
        prns = DEFAULT_PRNS[system]
        if system == "R":
            series[system] = _glonass_series(prns, rng, t0_gps_s, t1_gps_s)
        else:
            series[system] = _kepler_series(system, prns, rng, t0_gps_s, t1_gps_s)
    sats = np.concatenate([s.sats for s in series.values()]).astype(np.int16)
    channel = np.zeros(sats.shape[0], dtype=np.int8)
    for i, s in enumerate(sats):
        if s // 100 == 1:
            channel[i] = _GLO_CHANNELS[s % 100 - 1]
    return Constellation(sats=sats, series=series, glo_channel=channel)
