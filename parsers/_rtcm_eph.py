"""RTCM 3 broadcast ephemeris messages 1019, 1020, 1042, 1044, 1045, 1046 ⇄ SI-unit ephemerides.

One field table per message drives both the decoder (here) and the encoder (``_rtcm_eph_encode``):
``(key, bits, kind, scale)`` in transmission order, where ``kind`` is ``U`` (uintN), ``S`` (intN,
two's complement) or ``M`` (intSN, sign-magnitude: RTCM 10403.3 Table 3.3-1), and ``scale`` turns the
integer into SI units (``None``: the integer is kept). Angles are broadcast in semicircles; their
scales include ``π`` so the table yields radians directly.

Week numbers become the full GPS week (contract of :mod:`._ephemeris`): GPS DF076 / QZSS DF452 are
10-bit and resolved against ``DecodeContext.reference_time`` (nearest week), or with ``None`` taken
as week + 2048 (the 1024-week era 2019-04-07 … 2038-11-20); Galileo DF289 is the GST week
(GPS week − 1024); BeiDou DF489 is the BDT week (GPS week − 1356), with toe/toc left in BDT seconds.
The broadcast week is the week of *transmission*: with a reference time within a week of it, a toe
more than half a week away from the reference moves to the adjacent week (end-of-week uploads).
Stale (year-old) ephemerides decode normally: the estimator decides what is stale.
"""

# size: ~530 lines: six ephemeris messages (1019, 1020, 1042, 1044, 1045, 1046) as field
# tables and their decoders, sharing the bit reader and the scale conventions.
from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from ._bitio import BitReader
from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._errors import ParseError
from ._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime

__all__ = [
    "EPHEMERIS_LAYOUTS",
    "DecodeContext",
    "EphemerisDecoder",
    "decode_1019",
    "decode_1020",
    "decode_1042",
    "decode_1044",
    "decode_1045",
    "decode_1046",
    "galileo_sisa_m",
    "ura_m",
]


@dataclass(frozen=True, slots=True, kw_only=True)
class DecodeContext:
    """What a decoder may need beyond the message bytes.

    ``reference_time`` (GPS time, e.g. the latest MSM epoch) resolves truncated week numbers
    (10-bit GPS DF076 / QZSS DF452) to the full GPS week nearest to it. With ``None`` the current
    1024-week era is assumed: 10-bit week + 2048 (valid 2019-04-07 … 2038-11-20).
    """

    reference_time: GpsTime | None = None


EphemerisDecoder = Callable[[bytes, DecodeContext], object]

U, S, M = "u", "s", "m"
Field = tuple[str, int, str, float | None]

_PI = math.pi
_W = SECONDS_PER_WEEK
#: Full GPS week of GST week 0 (Galileo OS SIS ICD §5.1.2: GST week 0 began at GPS week 1024).
GST_WEEK_OFFSET = 1024
#: Full GPS week of BDT week 0 (BDS-SIS-ICD-B1I §5.1.3: BDT week 0 began 2006-01-01 = GPS week 1356).
BDT_WEEK_OFFSET = 1356
#: 10-bit GPS/QZSS weeks without a reference time: the 1024-week era that began 2019-04-07.
DEFAULT_GPS_ERA_WEEKS = 2048


def _sc(exp: int) -> float:
    """Scale of a semicircle field with LSB 2^exp, expressed in radians."""
    return 2.0**exp * _PI


# GPS 1019: RTCM 10403.3 Table 3.5-21; scale factors IS-GPS-200 Table 20-I (clock) and 20-III
# (ephemeris). Total 488 bits (61 bytes).
LAYOUT_1019: tuple[Field, ...] = (
    ("msg", 12, U, None),  # DF002
    ("prn", 6, U, None),  # DF009
    ("week", 10, U, None),  # DF076 GPS week mod 1024
    ("ura", 4, U, None),  # DF077 URA index
    ("code_l2", 2, U, None),  # DF078
    ("idot", 14, S, _sc(-43)),  # DF079 semicircles/s
    ("iode", 8, U, None),  # DF071
    ("toc", 16, U, 16.0),  # DF081 2^4 s
    ("af2", 8, S, 2.0**-55),  # DF082 s/s²
    ("af1", 16, S, 2.0**-43),  # DF083 s/s
    ("af0", 22, S, 2.0**-31),  # DF084 s
    ("iodc", 10, U, None),  # DF085
    ("crs", 16, S, 2.0**-5),  # DF086 m
    ("delta_n", 16, S, _sc(-43)),  # DF087 semicircles/s
    ("m0", 32, S, _sc(-31)),  # DF088 semicircles
    ("cuc", 16, S, 2.0**-29),  # DF089 rad
    ("e", 32, U, 2.0**-33),  # DF090
    ("cus", 16, S, 2.0**-29),  # DF091 rad
    ("sqrt_a", 32, U, 2.0**-19),  # DF092 √m
    ("toe", 16, U, 16.0),  # DF093 2^4 s
    ("cic", 16, S, 2.0**-29),  # DF094 rad
    ("omega0", 32, S, _sc(-31)),  # DF095 semicircles
    ("cis", 16, S, 2.0**-29),  # DF096 rad
    ("i0", 32, S, _sc(-31)),  # DF097 semicircles
    ("crc", 16, S, 2.0**-5),  # DF098 m
    ("omega", 32, S, _sc(-31)),  # DF099 semicircles
    ("omega_dot", 24, S, _sc(-43)),  # DF100 semicircles/s
    ("tgd", 8, S, 2.0**-31),  # DF101 s
    ("health", 6, U, None),  # DF102
    ("l2p", 1, U, None),  # DF103
    ("fit", 1, U, None),  # DF137 fit interval flag
)

# QZSS 1044: RTCM 10403.3 Table 3.5-xx (QZSS ephemeris, DF429–DF457; table number from memory);
# scales IS-QZSS-PNT §5.2 (same as IS-GPS-200 Table 20-III). Total 485 bits (61 bytes).
LAYOUT_1044: tuple[Field, ...] = (
    ("msg", 12, U, None),  # DF002
    ("prn", 4, U, None),  # DF429 QZSS satellite id 1…10 (PRN 193…202)
    ("toc", 16, U, 16.0),  # DF430
    ("af2", 8, S, 2.0**-55),  # DF431
    ("af1", 16, S, 2.0**-43),  # DF432
    ("af0", 22, S, 2.0**-31),  # DF433
    ("iode", 8, U, None),  # DF434
    ("crs", 16, S, 2.0**-5),  # DF435
    ("delta_n", 16, S, _sc(-43)),  # DF436
    ("m0", 32, S, _sc(-31)),  # DF437
    ("cuc", 16, S, 2.0**-29),  # DF438
    ("e", 32, U, 2.0**-33),  # DF439
    ("cus", 16, S, 2.0**-29),  # DF440
    ("sqrt_a", 32, U, 2.0**-19),  # DF441
    ("toe", 16, U, 16.0),  # DF442
    ("cic", 16, S, 2.0**-29),  # DF443
    ("omega0", 32, S, _sc(-31)),  # DF444
    ("cis", 16, S, 2.0**-29),  # DF445
    ("i0", 32, S, _sc(-31)),  # DF446
    ("crc", 16, S, 2.0**-5),  # DF447
    ("omega", 32, S, _sc(-31)),  # DF448
    ("omega_dot", 24, S, _sc(-43)),  # DF449
    ("idot", 14, S, _sc(-43)),  # DF450
    ("code_l2", 2, U, None),  # DF451
    ("week", 10, U, None),  # DF452 week mod 1024
    ("ura", 4, U, None),  # DF453
    ("health", 6, U, None),  # DF454
    ("tgd", 8, S, 2.0**-31),  # DF455
    ("iodc", 10, U, None),  # DF456
    ("fit", 1, U, None),  # DF457
)

# BeiDou 1042: RTCM 10403.3 (Amendment) Table 3.5-xx, DF488–DF515 (table number from memory);
# scales BDS-SIS-ICD-B1I-3.0 Table 5-11 (ephemeris) and §5.2.4.10 (clock a0/a1/a2).
# Total 511 bits (64 bytes).
LAYOUT_1042: tuple[Field, ...] = (
    ("msg", 12, U, None),  # DF002
    ("prn", 6, U, None),  # DF488
    ("week", 13, U, None),  # DF489 BDT week
    ("ura", 4, U, None),  # DF490 URAI
    ("idot", 14, S, _sc(-43)),  # DF491
    ("iode", 5, U, None),  # DF492 AODE
    ("toc", 17, U, 8.0),  # DF493 2^3 s (BDT)
    ("af2", 11, S, 2.0**-66),  # DF494
    ("af1", 22, S, 2.0**-50),  # DF495
    ("af0", 24, S, 2.0**-33),  # DF496
    ("iodc", 5, U, None),  # DF497 AODC
    ("crs", 18, S, 2.0**-6),  # DF498
    ("delta_n", 16, S, _sc(-43)),  # DF499
    ("m0", 32, S, _sc(-31)),  # DF500
    ("cuc", 18, S, 2.0**-31),  # DF501
    ("e", 32, U, 2.0**-33),  # DF502
    ("cus", 18, S, 2.0**-31),  # DF503
    ("sqrt_a", 32, U, 2.0**-19),  # DF504
    ("toe", 17, U, 8.0),  # DF505 2^3 s (BDT)
    ("cic", 18, S, 2.0**-31),  # DF506
    ("omega0", 32, S, _sc(-31)),  # DF507
    ("cis", 18, S, 2.0**-31),  # DF508
    ("i0", 32, S, _sc(-31)),  # DF509
    ("crc", 18, S, 2.0**-6),  # DF510
    ("omega", 32, S, _sc(-31)),  # DF511
    ("omega_dot", 24, S, _sc(-43)),  # DF512
    ("tgd1", 10, S, 1e-10),  # DF513 0.1 ns
    ("tgd2", 10, S, 1e-10),  # DF514 0.1 ns
    ("health", 1, U, None),  # DF515 SatH1
)

# Galileo F/NAV 1045 and I/NAV 1046: RTCM 10403.3 Tables 3.5-xx (DF252, DF286–DF317; table numbers
# from memory); scales Galileo OS SIS ICD 2.1 Table 60 (ephemeris), Table 63 (clock), BGD §5.1.5.
_GAL_COMMON: tuple[Field, ...] = (
    ("msg", 12, U, None),  # DF002
    ("prn", 6, U, None),  # DF252
    ("week", 12, U, None),  # DF289 GST week
    ("iode", 10, U, None),  # DF290 IODnav
    ("sisa", 8, U, None),  # DF291 (1045, E1/E5a) or DF286 (1046, E1/E5b)
    ("idot", 14, S, _sc(-43)),  # DF292
    ("toc", 14, U, 60.0),  # DF293 60 s
    ("af2", 6, S, 2.0**-59),  # DF294
    ("af1", 21, S, 2.0**-46),  # DF295
    ("af0", 31, S, 2.0**-34),  # DF296
    ("crs", 16, S, 2.0**-5),  # DF297
    ("delta_n", 16, S, _sc(-43)),  # DF298
    ("m0", 32, S, _sc(-31)),  # DF299
    ("cuc", 16, S, 2.0**-29),  # DF300
    ("e", 32, U, 2.0**-33),  # DF301
    ("cus", 16, S, 2.0**-29),  # DF302
    ("sqrt_a", 32, U, 2.0**-19),  # DF303
    ("toe", 14, U, 60.0),  # DF304 60 s
    ("cic", 16, S, 2.0**-29),  # DF305
    ("omega0", 32, S, _sc(-31)),  # DF306
    ("cis", 16, S, 2.0**-29),  # DF307
    ("i0", 32, S, _sc(-31)),  # DF308
    ("crc", 16, S, 2.0**-5),  # DF309
    ("omega", 32, S, _sc(-31)),  # DF310
    ("omega_dot", 24, S, _sc(-43)),  # DF311
    ("bgd_e5a", 10, S, 2.0**-32),  # DF312 BGD(E1,E5a)
)
# 1045 (F/NAV): total 496 bits (62 bytes).
LAYOUT_1045: tuple[Field, ...] = (
    *_GAL_COMMON,
    ("e5a_hs", 2, U, None),  # DF314 E5a signal health
    ("e5a_dvs", 1, U, None),  # DF315 E5a data validity
    ("reserved", 7, U, None),  # DF001
)
# 1046 (I/NAV): total 504 bits (63 bytes).
LAYOUT_1046: tuple[Field, ...] = (
    *_GAL_COMMON,
    ("bgd_e5b", 10, S, 2.0**-32),  # DF313 BGD(E1,E5b)
    ("e5b_hs", 2, U, None),  # DF316 E5b signal health
    ("e5b_dvs", 1, U, None),  # DF317 E5b data validity
    ("e1b_hs", 2, U, None),  # DF287 E1-B signal health
    ("e1b_dvs", 1, U, None),  # DF288 E1-B data validity
    ("reserved", 2, U, None),  # DF001
)

# GLONASS 1020: RTCM 10403.3 Table 3.5-22; scales GLONASS ICD Ed. 5.1 Table 4.5 (string fields);
# coordinates are sign-magnitude km, converted to m here. Total 360 bits (45 bytes).
_KM = 1000.0
LAYOUT_1020: tuple[Field, ...] = (
    ("msg", 12, U, None),  # DF002
    ("slot", 6, U, None),  # DF038 slot number 1…24
    ("channel", 5, U, None),  # DF040 frequency channel k + 7
    ("alm_health", 1, U, None),  # DF104 C_n
    ("alm_health_avail", 1, U, None),  # DF105
    ("p1", 2, U, None),  # DF106
    ("tk", 12, U, None),  # DF107 hours(5) minutes(6) 30 s(1)
    ("bn_msb", 1, U, None),  # DF108 MSB of B_n (1 = malfunction)
    ("p2", 1, U, None),  # DF109
    ("tb", 7, U, 900.0),  # DF110 15 min
    ("vx", 24, M, 2.0**-20 * _KM),  # DF111 km/s
    ("x", 27, M, 2.0**-11 * _KM),  # DF112 km
    ("ax", 5, M, 2.0**-30 * _KM),  # DF113 km/s²
    ("vy", 24, M, 2.0**-20 * _KM),  # DF114
    ("y", 27, M, 2.0**-11 * _KM),  # DF115
    ("ay", 5, M, 2.0**-30 * _KM),  # DF116
    ("vz", 24, M, 2.0**-20 * _KM),  # DF117
    ("z", 27, M, 2.0**-11 * _KM),  # DF118
    ("az", 5, M, 2.0**-30 * _KM),  # DF119
    ("p3", 1, U, None),  # DF120
    ("gamma", 11, M, 2.0**-40),  # DF121 γ_n
    ("p", 2, U, None),  # DF122 GLONASS-M P
    ("ln3", 1, U, None),  # DF123 l_n (third string)
    ("tau", 22, M, 2.0**-30),  # DF124 τ_n s
    ("dtau", 5, M, 2.0**-30),  # DF125 Δτ_n s
    ("en", 5, U, None),  # DF126 E_n age, days
    ("p4", 1, U, None),  # DF127
    ("ft", 4, U, None),  # DF128 F_T accuracy index
    ("nt", 11, U, None),  # DF129 N_T day in four-year interval (0 = unknown)
    ("m", 2, U, None),  # DF130 satellite type (01 = GLONASS-M)
    ("add_avail", 1, U, None),  # DF131 fifth-string data valid
    ("na", 11, U, None),  # DF132 N^A
    ("tau_c", 32, M, 2.0**-31),  # DF133 τ_c s
    ("n4", 5, U, None),  # DF134 N4 four-year interval
    ("tau_gps", 22, M, 2.0**-30),  # DF135 τ_GPS s
    ("ln5", 1, U, None),  # DF136 l_n (fifth string)
    ("reserved", 7, U, None),  # DF001
)

EPHEMERIS_LAYOUTS: dict[int, tuple[Field, ...]] = {
    1019: LAYOUT_1019,
    1020: LAYOUT_1020,
    1042: LAYOUT_1042,
    1044: LAYOUT_1044,
    1045: LAYOUT_1045,
    1046: LAYOUT_1046,
}

#: GPS/QZSS URA index → nominal accuracy, m (IS-GPS-200 §20.3.3.3.1.3, upper bound of each class;
#: index 15 = no accuracy prediction → inf). BeiDou URAI uses the same table (BDS ICD §5.2.4.5).
URA_M: tuple[float, ...] = (
    2.4, 3.4, 4.85, 6.85, 9.65, 13.65, 24.0, 48.0,
    96.0, 192.0, 384.0, 768.0, 1536.0, 3072.0, 6144.0, math.inf,
)  # fmt: skip


def ura_m(index: int) -> float:
    return URA_M[index]


def _sisa_table() -> tuple[float, ...]:
    # Galileo OS SIS ICD 2.1 §5.1.12 (SISA index, from memory): 0–49 → 0…0.49 m by 1 cm, 50–74 →
    # 0.5…0.98 m by 2 cm, 75–99 → 1…1.96 m by 4 cm, 100–125 → 2…6 m by 16 cm, 126–254 spare,
    # 255 = no accuracy prediction available (both → inf).
    out = [n * 0.01 for n in range(50)]
    out += [0.5 + (n - 50) * 0.02 for n in range(50, 75)]
    out += [1.0 + (n - 75) * 0.04 for n in range(75, 100)]
    out += [2.0 + (n - 100) * 0.16 for n in range(100, 126)]
    out += [math.inf] * (256 - len(out))
    return tuple(out)


SISA_M = _sisa_table()


def galileo_sisa_m(index: int) -> float:
    return SISA_M[index]


def read_fields(body: bytes, layout: Sequence[Field], message_id: int) -> dict[str, float]:
    """Unpack ``body`` by ``layout``; ParseError if it is short or carries another DF002."""
    nbits = sum(f[1] for f in layout)
    if len(body) * 8 < nbits:
        raise ParseError(
            f"message too short: {len(body)} bytes, layout needs {(nbits + 7) // 8}",
            message_id=message_id,
        )
    r = BitReader(body)
    out: dict[str, float] = {}
    for key, bits, kind, scale in layout:
        v = r.u(bits) if kind == U else r.s(bits) if kind == S else r.sm(bits)
        out[key] = v if scale is None else v * scale
    if out["msg"] != message_id:
        raise ParseError(
            f"DF002 is {int(out['msg'])}, expected {message_id}", message_id=message_id
        )
    return out


def _near_week(low_bits: int, modulus: int, ref_week: int) -> int:
    """The full week ≡ ``low_bits`` (mod ``modulus``) nearest to ``ref_week``."""
    d = (low_bits - ref_week) % modulus
    if d >= modulus // 2:
        d -= modulus
    return ref_week + d


def _adjust_to_toe(week: int, toe_gps_s: float, ref: GpsTime | None) -> int:
    """Move a transmission week to the week of toe when the reference time shows a boundary crossing."""
    if ref is None or abs(week - ref.week) > 1:
        return week
    dt = week * _W + toe_gps_s - ref.total_s
    if dt > _W / 2:
        return week - 1
    if dt < -_W / 2:
        return week + 1
    return week


def _gps_week(raw: float, toe: float, ctx: DecodeContext) -> int:
    ref = ctx.reference_time
    week = DEFAULT_GPS_ERA_WEEKS + int(raw) if ref is None else _near_week(int(raw), 1024, ref.week)
    return _adjust_to_toe(week, toe, ref)


def _fit_hours_gps(flag: float) -> float:
    # IS-GPS-200 §20.3.4.4: flag 0 = 4 h; 1 = more than 4 h (6 h is the usual value, Table 20-XII
    # gives longer intervals only for special IODC ranges after extended operations).
    return 6.0 if flag else 4.0


def _kepler(v: dict[str, float], **kw: object) -> KeplerEphemeris:
    return KeplerEphemeris(
        toe_s=v["toe"],
        toc_s=v["toc"],
        sqrt_a=v["sqrt_a"],
        e=v["e"],
        i0=v["i0"],
        omega0=v["omega0"],
        omega=v["omega"],
        m0=v["m0"],
        delta_n=v["delta_n"],
        idot=v["idot"],
        omega_dot=v["omega_dot"],
        cuc=v["cuc"],
        cus=v["cus"],
        crc=v["crc"],
        crs=v["crs"],
        cic=v["cic"],
        cis=v["cis"],
        af0=v["af0"],
        af1=v["af1"],
        af2=v["af2"],
        iode=int(v["iode"]),
        iodc=int(v["iodc"]),
        health=int(v["health"]),
        **kw,  # type: ignore[arg-type]
    )


def decode_1019(body: bytes, ctx: DecodeContext) -> KeplerEphemeris:
    """GPS ephemeris (RTCM 10403.3 Table 3.5-21)."""
    v = read_fields(body, LAYOUT_1019, 1019)
    prn = int(v["prn"])
    if prn == 0:
        raise ParseError("DF009 GPS satellite id 0 is not a satellite", message_id=1019)
    return _kepler(
        v,
        sat=prn,
        week=_gps_week(v["week"], v["toe"], ctx),
        tgd_s=(v["tgd"], math.nan),
        fit_interval_h=_fit_hours_gps(v["fit"]),
        accuracy_m=URA_M[int(v["ura"])],
        time_system="GPS",
        source=1019,
    )


def decode_1044(body: bytes, ctx: DecodeContext) -> KeplerEphemeris:
    """QZSS ephemeris (RTCM 10403.3 QZSS table; IS-QZSS-PNT). Satellite id 1…10 → J01…J10."""
    v = read_fields(body, LAYOUT_1044, 1044)
    prn = int(v["prn"])
    if prn == 0:
        raise ParseError("DF429 QZSS satellite id 0 is not a satellite", message_id=1044)
    return _kepler(
        v,
        sat=400 + prn,
        week=_gps_week(v["week"], v["toe"], ctx),
        tgd_s=(v["tgd"], math.nan),
        # IS-QZSS-PNT §4.1.2 (from memory): flag 0 = 2 h fit, 1 = more than 2 h (taken as 4 h).
        fit_interval_h=4.0 if v["fit"] else 2.0,
        accuracy_m=URA_M[int(v["ura"])],
        time_system="GPS",
        source=1044,
    )


def decode_1042(body: bytes, ctx: DecodeContext) -> KeplerEphemeris:
    """BeiDou ephemeris; week → GPS week (BDT week + 1356), toe/toc stay BDT seconds."""
    v = read_fields(body, LAYOUT_1042, 1042)
    prn = int(v["prn"])
    if prn == 0:
        raise ParseError("DF488 BDS satellite id 0 is not a satellite", message_id=1042)
    week = BDT_WEEK_OFFSET + int(v["week"])
    week = _adjust_to_toe(week, v["toe"] + BDS_GPS_OFFSET_S, ctx.reference_time)
    return _kepler(
        v,
        sat=300 + prn,
        week=week,
        tgd_s=(v["tgd1"], v["tgd2"]),
        fit_interval_h=0.0,  # not broadcast (BDS ICD)
        accuracy_m=URA_M[int(v["ura"])],
        time_system="BDT",
        source=1042,
    )


def _galileo(v: dict[str, float], ctx: DecodeContext, msg: int, health: int) -> KeplerEphemeris:
    prn = int(v["prn"])
    if prn == 0:  # ids above 36 occur (test/spare satellites in RTK134): decoded, not judged
        raise ParseError("DF252 Galileo satellite id 0 is not a satellite", message_id=msg)
    week = _adjust_to_toe(GST_WEEK_OFFSET + int(v["week"]), v["toe"], ctx.reference_time)
    return _kepler(
        {**v, "iodc": v["iode"], "health": health},
        sat=200 + prn,
        week=week,
        tgd_s=(v["bgd_e5a"], v.get("bgd_e5b", math.nan)),
        fit_interval_h=0.0,  # not broadcast (Galileo OS SIS ICD)
        accuracy_m=SISA_M[int(v["sisa"])],
        time_system="GPS",
        source=msg,
    )


# Galileo health packed as in RINEX 3.05 Table A8 (SV health): bit 0 E1-B DVS, bits 1–2 E1-B HS,
# bit 3 E5a DVS, bits 4–5 E5a HS, bit 6 E5b DVS, bits 7–8 E5b HS.
def decode_1045(body: bytes, ctx: DecodeContext) -> KeplerEphemeris:
    """Galileo F/NAV ephemeris; week → GPS week (GST week + 1024); tgd_s = (BGD E1/E5a, nan)."""
    v = read_fields(body, LAYOUT_1045, 1045)
    health = (int(v["e5a_dvs"]) << 3) | (int(v["e5a_hs"]) << 4)
    return _galileo(v, ctx, 1045, health)


def decode_1046(body: bytes, ctx: DecodeContext) -> KeplerEphemeris:
    """Galileo I/NAV ephemeris; tgd_s = (BGD E1/E5a, BGD E1/E5b)."""
    v = read_fields(body, LAYOUT_1046, 1046)
    health = (
        int(v["e1b_dvs"])
        | (int(v["e1b_hs"]) << 1)
        | (int(v["e5b_dvs"]) << 6)
        | (int(v["e5b_hs"]) << 7)
    )
    return _galileo(v, ctx, 1046, health)


def decode_1020(body: bytes, ctx: DecodeContext) -> GlonassEphemeris:
    """GLONASS ephemeris (RTCM 10403.3 Table 3.5-22): PZ-90 state at t_b in m, m/s, m/s².

    ``health`` is non-zero when the MSB of B_n (DF108) or l_n of the third string (DF123) flags
    the satellite as unusable (GLONASS ICD §4.4). ``ctx`` is unused: t_b is resolved later.
    """
    del ctx
    v = read_fields(body, LAYOUT_1020, 1020)
    slot, channel = int(v["slot"]), int(v["channel"])
    if slot == 0:
        raise ParseError("DF038 GLONASS slot 0 is not a satellite", message_id=1020)
    if channel > 13:
        raise ParseError(
            f"DF040 frequency channel code {channel} out of range 0…13", message_id=1020
        )
    nt, n4 = int(v["nt"]), int(v["n4"])
    return GlonassEphemeris(
        sat=100 + slot,
        channel=channel - 7,
        tb_s=v["tb"],
        day_number=nt if nt else -1,
        four_year=n4 if v["add_avail"] and n4 else -1,
        x_m=v["x"],
        y_m=v["y"],
        z_m=v["z"],
        vx_mps=v["vx"],
        vy_mps=v["vy"],
        vz_mps=v["vz"],
        ax_mps2=v["ax"],
        ay_mps2=v["ay"],
        az_mps2=v["az"],
        tau_n_s=v["tau"],
        gamma_n=v["gamma"],
        health=int(v["bn_msb"]) | int(v["ln3"]),
        age_days=int(v["en"]),
        source=1020,
        dtau_s=v["dtau"],
    )
