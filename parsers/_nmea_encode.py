"""NMEA 0183 encoders for the simulator: GGA, RMC, GSV, GST with correct checksums.

Each returns complete sentences ``$<talker><id>,...*hh\\r\\n`` (NMEA 0183 §5.3) from the same typed
values :mod:`._nmea` decodes. Field precisions default to a common receiver layout (time to
0.01 s, latitude/longitude minutes to 5 decimals, HDOP 2, altitude 1) and can be changed per call.
Absent values (NaN / None) become empty fields.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from ._nmea import KNOT_MPS, nmea_checksum

if TYPE_CHECKING:
    import datetime as dt

    from ._nmea import GgaFix, GstErrors, RmcFix, SatellitesInView

__all__ = ["encode_gga", "encode_gst", "encode_gsv", "encode_rmc", "nmea_number", "sentence"]

#: GSV carries at most four satellites per sentence (NMEA 0183 §6.3 GSV).
GSV_SATS_PER_SENTENCE = 4


def sentence(address: str, fields: list[str]) -> bytes:
    """``$address,f1,f2,...*hh\\r\\n`` with the NMEA 0183 §5.2.1 checksum."""
    body = ",".join([address, *fields]).encode("ascii")
    return b"$%s*%02X\r\n" % (body, nmea_checksum(body))


def _num(v: float | None, decimals: int) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    return f"{v:.{decimals}f}"


def _time(t: dt.time | None, decimals: int = 2) -> str:
    if t is None:
        return ""
    frac = round(t.microsecond / 10 ** (6 - decimals)) if decimals else 0
    head = f"{t.hour:02d}{t.minute:02d}{t.second:02d}"
    return f"{head}.{frac:0{decimals}d}" if decimals else head


def _angle(value: float, deg_width: int, decimals: int, hemis: str) -> tuple[str, str]:
    """ddmm.mmmmm (or dddmm.mmmmm) and hemisphere letter (NMEA 0183 §6.2 lat/lon format)."""
    if math.isnan(value):
        return "", ""
    a = abs(value)
    deg = int(a)
    minutes = round((a - deg) * 60.0, decimals)
    if minutes >= 60.0:
        deg, minutes = deg + 1, 0.0
    letter = hemis[1] if value < 0 else hemis[0]
    return f"{deg:0{deg_width}d}{minutes:0{3 + decimals}.{decimals}f}", letter


def encode_gga(
    fix: GgaFix, *, time_decimals: int = 2, minute_decimals: int = 5, hdop_decimals: int = 2
) -> bytes:
    """GGA sentence for ``fix``."""
    lat, ns = _angle(fix.lat_deg, 2, minute_decimals, "NS")
    lon, ew = _angle(fix.lon_deg, 3, minute_decimals, "EW")
    return sentence(
        f"{fix.talker}GGA",
        [
            _time(fix.time_utc, time_decimals),
            lat,
            ns,
            lon,
            ew,
            str(fix.quality),
            "" if fix.n_sats_used is None else f"{fix.n_sats_used:02d}",
            _num(fix.hdop, hdop_decimals),
            _num(fix.alt_msl_m, 1),
            "M",
            _num(fix.geoid_sep_m, 1),
            "M",
            _num(fix.dgps_age_s, 1),
            "" if fix.dgps_station is None else f"{fix.dgps_station:04d}",
        ],
    )


def encode_rmc(fix: RmcFix, *, time_decimals: int = 2, minute_decimals: int = 5) -> bytes:
    """RMC sentence for ``fix`` (speed in knots to 0.001; nav status field only if set)."""
    lat, ns = _angle(fix.lat_deg, 2, minute_decimals, "NS")
    lon, ew = _angle(fix.lon_deg, 3, minute_decimals, "EW")
    d = fix.date_utc
    mv = fix.mag_var_deg
    fields = [
        _time(fix.time_utc, time_decimals),
        "A" if fix.valid else "V",
        lat,
        ns,
        lon,
        ew,
        _num(fix.speed_mps / KNOT_MPS, 3),
        _num(fix.course_deg, 2),
        "" if d is None else f"{d.day:02d}{d.month:02d}{d.year % 100:02d}",
        _num(abs(mv), 1),
        "" if math.isnan(mv) else ("W" if mv < 0 else "E"),
        fix.mode,
    ]
    if fix.nav_status:
        fields.append(fix.nav_status)
    return sentence(f"{fix.talker}RMC", fields)


def nmea_number(sat: int) -> int:
    """NMEA 4.11 satellite number of our satellite id (inverse of ``nmea_sat_id``)."""
    system, n = sat // 100, sat % 100
    return {1: n + 64, 5: n + 13}.get(system, n)  # GLONASS slot + 64; SBAS PRN − 87


def encode_gsv(view: SatellitesInView) -> list[bytes]:
    """The GSV group (one sentence per four satellites; an empty view is one sentence)."""
    n = len(view.sat)
    count = max(1, -(-n // GSV_SATS_PER_SENTENCE))
    out = []
    for k in range(count):
        fields = [str(count), str(k + 1), f"{n:02d}"]
        for i in range(k * GSV_SATS_PER_SENTENCE, min(n, (k + 1) * GSV_SATS_PER_SENTENCE)):
            e, a, c = (float(x[i]) for x in (view.elevation_deg, view.azimuth_deg, view.cn0_dbhz))
            fields += [
                f"{nmea_number(int(view.sat[i])):02d}",
                "" if math.isnan(e) else f"{round(e):02d}",
                "" if math.isnan(a) else f"{round(a):03d}",
                "" if math.isnan(c) else f"{round(c):02d}",
            ]
        if view.signal_id is not None:
            fields.append(view.signal_id)
        out.append(sentence(f"{view.talker}GSV", fields))
    return out


def encode_gst(errors: GstErrors, *, decimals: int = 3, time_decimals: int = 2) -> bytes:
    """GST sentence for ``errors``."""
    e = errors
    values = (
        e.rms_m, e.major_m, e.minor_m, e.orient_deg, e.lat_sigma_m, e.lon_sigma_m, e.alt_sigma_m,
    )  # fmt: skip
    return sentence(
        f"{e.talker}GST",
        [_time(e.time_utc, time_decimals), *(_num(v, decimals) for v in values)],
    )
