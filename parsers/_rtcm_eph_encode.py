"""Encoders for RTCM 3 ephemeris and station messages (the simulator's output side).

Each encoder returns the message body (starting with DF002, no transport frame); wrap it with
:func:`ionwarden.parsers._crc.frame_rtcm`. Field layouts are the decoder's tables
(:data:`._rtcm_eph.EPHEMERIS_LAYOUTS`), so both sides cannot drift apart. Values are rounded to the
nearest LSB; a value that does not fit its field raises ``ValueError`` naming the field (a
programming error in the caller, not bad input bytes). :func:`quantise_for_rtcm` returns the
ephemeris a receiver would decode, so a simulator can use it as its truth.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, overload

from ._bitio import BitWriter
from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._gnsstime import GpsTime
from ._rtcm_eph import (
    BDT_WEEK_OFFSET,
    EPHEMERIS_LAYOUTS,
    GST_WEEK_OFFSET,
    SISA_M,
    URA_M,
    DecodeContext,
    Field,
    M,
    S,
    decode_1019,
    decode_1020,
    decode_1042,
    decode_1044,
    decode_1045,
    decode_1046,
)
from ._rtcm_station import ECEF_LSB_M, HEIGHT_LSB_M, StationReference

if TYPE_CHECKING:
    from collections.abc import Sequence

__all__ = [
    "encode_1005",
    "encode_1019",
    "encode_1020",
    "encode_1042",
    "encode_1044",
    "encode_1045",
    "encode_1046",
    "encode_ephemeris",
    "quantise_for_rtcm",
]

_KEPLER_KEYS = (
    "sqrt_a", "e", "i0", "omega0", "omega", "m0", "delta_n", "idot", "omega_dot",
    "cuc", "cus", "crc", "crs", "cic", "cis", "af0", "af1", "af2",
)  # fmt: skip


def write_fields(layout: Sequence[Field], values: dict[str, float]) -> bytes:
    """Pack ``values`` by ``layout`` (rounding scaled fields to the nearest LSB)."""
    w = BitWriter()
    for key, bits, kind, scale in layout:
        value = values.get(key, 0)
        if not math.isfinite(value):
            raise ValueError(f"{key}: {value} cannot be encoded")
        raw = int(value) if scale is None else round(value / scale)
        try:
            if kind == S:
                w.s(bits, raw)
            elif kind == M:
                w.sm(bits, raw)
            else:
                w.u(bits, raw)
        except ValueError as exc:
            raise ValueError(f"{key}: {value} does not fit in {bits} bits") from exc
    return w.to_bytes()


def _index_at_least(table: Sequence[float], accuracy_m: float) -> int:
    """Smallest index whose nominal accuracy is not better than ``accuracy_m``."""
    for i, nominal in enumerate(table):
        if nominal >= accuracy_m * (1 - 1e-9):
            return i
    return len(table) - 1


def _kepler_values(eph: KeplerEphemeris, msg: int, prn: int, week: int) -> dict[str, float]:
    v: dict[str, float] = {k: getattr(eph, k) for k in _KEPLER_KEYS}
    v.update(
        msg=msg,
        prn=prn,
        week=week,
        toe=eph.toe_s,
        toc=eph.toc_s,
        iode=eph.iode,
        iodc=eph.iodc,
        health=eph.health,
    )
    return v


def _gps_like(eph: KeplerEphemeris, msg: int, prn: int) -> bytes:
    v = _kepler_values(eph, msg, prn, eph.week % 1024)
    v.update(
        ura=_index_at_least(URA_M, eph.accuracy_m),
        code_l2=1,  # DF078 01 = P code on L2 (IS-GPS-200 §20.3.3.3.1.2)
        tgd=eph.tgd_s[0],
        fit=1 if eph.fit_interval_h > (2.0 if msg == 1044 else 4.0) else 0,
    )
    return write_fields(EPHEMERIS_LAYOUTS[msg], v)


def encode_1019(eph: KeplerEphemeris) -> bytes:
    """GPS ephemeris body (RTCM 10403.3 Table 3.5-21)."""
    return _gps_like(eph, 1019, eph.sat)


def encode_1044(eph: KeplerEphemeris) -> bytes:
    """QZSS ephemeris body."""
    return _gps_like(eph, 1044, eph.sat - 400)


def encode_1042(eph: KeplerEphemeris) -> bytes:
    """BeiDou ephemeris body (toe/toc in BDT seconds, week = GPS week − 1356)."""
    v = _kepler_values(eph, 1042, eph.sat - 300, (eph.week - BDT_WEEK_OFFSET) % 8192)
    v.update(
        ura=_index_at_least(URA_M, eph.accuracy_m),
        tgd1=eph.tgd_s[0],
        tgd2=eph.tgd_s[1],
        health=eph.health & 1,
    )
    return write_fields(EPHEMERIS_LAYOUTS[1042], v)


def _galileo_values(eph: KeplerEphemeris, msg: int) -> dict[str, float]:
    v = _kepler_values(eph, msg, eph.sat - 200, (eph.week - GST_WEEK_OFFSET) % 4096)
    v.update(sisa=_index_at_least(SISA_M, eph.accuracy_m), bgd_e5a=eph.tgd_s[0])
    return v


def encode_1045(eph: KeplerEphemeris) -> bytes:
    """Galileo F/NAV ephemeris body (health bits 3–5 as RINEX 3.05 Table A8)."""
    v = _galileo_values(eph, 1045)
    v.update(e5a_dvs=(eph.health >> 3) & 1, e5a_hs=(eph.health >> 4) & 3)
    return write_fields(EPHEMERIS_LAYOUTS[1045], v)


def encode_1046(eph: KeplerEphemeris) -> bytes:
    """Galileo I/NAV ephemeris body (health bits 0–2 and 6–8 as RINEX 3.05 Table A8)."""
    v = _galileo_values(eph, 1046)
    h = eph.health
    bgd_e5b = eph.tgd_s[1]
    v.update(
        bgd_e5b=bgd_e5b if math.isfinite(bgd_e5b) else 0.0,
        e1b_dvs=h & 1,
        e1b_hs=(h >> 1) & 3,
        e5b_dvs=(h >> 6) & 1,
        e5b_hs=(h >> 7) & 3,
    )
    return write_fields(EPHEMERIS_LAYOUTS[1046], v)


def encode_1020(eph: GlonassEphemeris) -> bytes:
    """GLONASS ephemeris body (RTCM 10403.3 Table 3.5-22), as a GLONASS-M satellite.

    t_k (frame start, DF107) is set to t_b; the almanac and P-flags are zero.
    """
    tk = int(eph.tb_s) % 86400
    v: dict[str, float] = {
        "msg": 1020,
        "slot": eph.sat - 100,
        "channel": eph.channel + 7,
        "tk": ((tk // 3600) << 7) | ((tk % 3600 // 60) << 1) | (1 if tk % 60 >= 30 else 0),
        "bn_msb": 1 if eph.health else 0,
        "tb": eph.tb_s,
        "x": eph.x_m,
        "y": eph.y_m,
        "z": eph.z_m,
        "vx": eph.vx_mps,
        "vy": eph.vy_mps,
        "vz": eph.vz_mps,
        "ax": eph.ax_mps2,
        "ay": eph.ay_mps2,
        "az": eph.az_mps2,
        "gamma": eph.gamma_n,
        "tau": eph.tau_n_s,
        "dtau": eph.dtau_s,  # DF125 (0 = not known)
        "en": eph.age_days,
        "nt": max(eph.day_number, 0),
        "m": 1,  # DF130 01 = GLONASS-M
        "add_avail": 1 if eph.four_year > 0 else 0,
        "n4": max(eph.four_year, 0),
    }
    return write_fields(EPHEMERIS_LAYOUTS[1020], v)


def encode_1005(station: StationReference) -> bytes:
    """Station ARP body: 1005, or 1006 when ``station.antenna_height_m`` is not None."""
    msg = 1005 if station.antenna_height_m is None else 1006
    w = BitWriter()
    w.u(12, msg).u(12, station.station_id).u(6, station.itrf_year)  # DF002, DF003, DF021
    w.u(1, int(station.gps)).u(1, int(station.glonass)).u(1, int(station.galileo))  # DF022–024
    w.u(1, int(station.non_physical))  # DF141
    w.s(38, round(station.x_m / ECEF_LSB_M))  # DF025
    w.u(1, int(station.single_oscillator)).u(1, 0)  # DF142, DF001
    w.s(38, round(station.y_m / ECEF_LSB_M))  # DF026
    w.u(2, station.quarter_cycle)  # DF364
    w.s(38, round(station.z_m / ECEF_LSB_M))  # DF027
    if station.antenna_height_m is not None:
        w.u(16, round(station.antenna_height_m / HEIGHT_LSB_M))  # DF028
    return w.to_bytes()


def encode_ephemeris(eph: KeplerEphemeris | GlonassEphemeris, message: int | None = None) -> bytes:
    """Encode with the natural message for the satellite's system (Galileo: 1046 if
    ``eph.source == 1046`` else 1045), or with ``message`` when given."""
    if isinstance(eph, GlonassEphemeris):
        return encode_1020(eph)
    msg = message or _default_message(eph)
    return _ENCODERS[msg](eph)


def _default_message(eph: KeplerEphemeris) -> int:
    system = eph.sat // 100
    if system == 2:
        return 1046 if eph.source == 1046 else 1045
    return {0: 1019, 3: 1042, 4: 1044}[system]


_ENCODERS = {
    1019: encode_1019,
    1042: encode_1042,
    1044: encode_1044,
    1045: encode_1045,
    1046: encode_1046,
}
_DECODERS = {
    1019: decode_1019,
    1042: decode_1042,
    1044: decode_1044,
    1045: decode_1045,
    1046: decode_1046,
}


@overload
def quantise_for_rtcm(eph: KeplerEphemeris, message: int | None = None) -> KeplerEphemeris: ...
@overload
def quantise_for_rtcm(eph: GlonassEphemeris, message: int | None = None) -> GlonassEphemeris: ...
def quantise_for_rtcm(
    eph: KeplerEphemeris | GlonassEphemeris, message: int | None = None
) -> KeplerEphemeris | GlonassEphemeris:
    """The ephemeris a decoder returns after ``eph`` went through its RTCM message.

    Every field is rounded to its LSB, indices (URA, SISA) and flags take the value the message can
    carry, and fields the message lacks take the decoder's value (e.g. BGD E1/E5b → nan in 1045).
    """
    if isinstance(eph, GlonassEphemeris):
        return decode_1020(encode_1020(eph), DecodeContext())
    msg = message or _default_message(eph)
    ref = GpsTime(eph.week, min(max(eph.toe_s, 0.0), 604_799.0))
    return _DECODERS[msg](_ENCODERS[msg](eph), DecodeContext(reference_time=ref))
