"""Broadcast ephemeris values in SI units, shared by the RTCM and RINEX decoders, the orbit code and
the simulator.

All angles in radians (semicircles × π already applied), times in seconds, distances in metres.
``week`` is the full, continuous GPS week of ``toe`` (BeiDou and Galileo weeks are converted to the
GPS week by the decoders: BDT week + 1356, GST week + 1024; BeiDou ``toe``/``toc`` stay in BDT seconds
of the BDT week, see ``time_system``).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["GlonassEphemeris", "KeplerEphemeris"]


@dataclass(frozen=True, slots=True, kw_only=True)
class KeplerEphemeris:
    """GPS/QZSS (IS-GPS-200 Table 20-III), Galileo (OS SIS ICD Table 60) and BeiDou (BDS ICD
    Table 5-11) Keplerian broadcast ephemeris and clock model.

    ``time_system`` is "GPS" (GPS, QZSS, Galileo: toe/toc are seconds of the GPS/GST week) or "BDT"
    (BeiDou: seconds of the BDT week; BDT = GPST − 14 s). ``tgd_s`` holds the broadcast group delays:
    GPS/QZSS (T_GD, nan); Galileo (BGD E1/E5a, BGD E1/E5b); BeiDou (TGD1 B1I/B3I, TGD2 B2I/B3I).
    ``source`` names the message: 1019, 1044, 1045, 1046, 1042 or "RINEX".
    """

    sat: int
    week: int
    toe_s: float
    toc_s: float
    sqrt_a: float  # √m
    e: float
    i0: float
    omega0: float
    omega: float
    m0: float
    delta_n: float  # rad/s
    idot: float  # rad/s
    omega_dot: float  # rad/s
    cuc: float
    cus: float
    crc: float  # m
    crs: float  # m
    cic: float
    cis: float
    af0: float  # s
    af1: float  # s/s
    af2: float  # s/s²
    iode: int
    iodc: int
    tgd_s: tuple[float, float]
    health: int
    fit_interval_h: float
    accuracy_m: float
    time_system: str = "GPS"
    source: int | str = ""


@dataclass(frozen=True, slots=True, kw_only=True)
class GlonassEphemeris:
    """GLONASS FDMA broadcast ephemeris (GLONASS ICD Ed. 5.1 Table 4.5), PZ-90 state vector at t_b.

    ``tb_s`` is the time of day of the reference epoch in GLONASS time (UTC(SU) + 3 h);
    ``day_number`` (N_T, or -1) and ``four_year`` (N4, or -1) place it in time when broadcast;
    decoders that only know a reference time leave them at -1 and the orbit code resolves t_b
    against the observation time. ``tau_n_s`` is the satellite clock offset (t_GLO − t_SV,
    so the SV clock correction is −τ_n + γ_n·(t − t_b)), ``gamma_n`` the relative frequency offset.
    ``dtau_s`` is Δτ_n (GLONASS ICD Ed. 5.1 Table 4.5, RTCM 10403.3 DF125), the time difference
    between the satellite's L2 and L1 sub-band signals, Δτ_n = t_f2 − t_f1 (equipment delays),
    as broadcast; 0 means "not known" (what many receivers send, and the value when the source
    has no such field, e.g. RINEX 3 navigation files).
    """

    sat: int
    channel: int  # frequency channel number k, −7…+6
    tb_s: float
    day_number: int
    four_year: int
    x_m: float
    y_m: float
    z_m: float
    vx_mps: float
    vy_mps: float
    vz_mps: float
    ax_mps2: float
    ay_mps2: float
    az_mps2: float
    tau_n_s: float
    gamma_n: float
    health: int
    age_days: int = 0
    source: int | str = ""
    dtau_s: float = 0.0
