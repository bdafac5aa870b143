"""Lean decoders for the sentences decoded every second (GGA, GST, GSV, RMC, GSA).

While ephemerides give every satellite's geometry, the only NMEA sentences decoded in full each
second are GGA and GST (``daemon.estimator`` asks for just those); until then (start-up,
NMEA-only receivers) the GSV groups give the fallback elevations, 10–16 sentences a second, with
RMC and GSA beside them. pynmeagps spends 60–100 µs on each (generic attribute tables,
``strptime`` for times and dates); these builders read the same fields straight from the
comma-separated payload (NMEA 0183 §6.3 field order) and build the same :class:`GgaFix`,
:class:`GstErrors`, :class:`GsvPart`, :class:`RmcFix` and :class:`GsaDop` values. The Unicore
high-precision ``…H`` variants of GSV, RMC and GSA have the same fields in pynmeagps and share them.

They follow pynmeagps 1.1.x's conversions exactly (``float``/``int`` of the field text, the
``(d)ddmm.mmmm`` → degrees rounding to 10 decimals, hemisphere signs applied with ``abs``, how
many GSV satellite groups a sentence holds) and return ``None`` for anything off the plain path
(missing fields, a time or date that is not ``hhmmss[.f…]`` / ``ddmmyy`` in range, non-ASCII,
conversion errors); the caller then takes the pynmeagps path, so odd or broken sentences keep its
exact values and errors. tests/test_nmea_fast.py checks both paths give equal values on every
GGA/GST/GSV/RMC/GSA sentence of the real captures and on generated ones.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import TYPE_CHECKING, TypeAlias

from . import _nmea  # the value types (module reference: _nmea imports this module)
from ._nmea_gsv import SYSTEM_ID, TALKER_SYSTEM, GsvPart, nmea_sat_id

if TYPE_CHECKING:
    from collections.abc import Callable

    from ._nmea import GgaFix, GsaDop, GstErrors, RmcFix

    _Lean: TypeAlias = GgaFix | GstErrors | GsvPart | RmcFix | GsaDop

__all__ = ["FAST_BUILDERS"]

NAN = math.nan
#: hhmmss with an optional 1–6 digit fraction: what ``strptime("%H%M%S.%f")`` reads in pynmeagps
#: (a bare hhmmss gets ".00" there); other shapes go to the pynmeagps path.
_TIME = re.compile(r"([0-9]{2})([0-9]{2})([0-9]{2})(?:\.([0-9]{1,6}))?")
#: ddmmyy with a day 01–31 and a month 01–12: where ``strptime("%d%m%y")`` in pynmeagps takes two
#: digits each (its %d/%m also take one, which shifts the fields); other shapes go to pynmeagps.
_DATE = re.compile(r"(0[1-9]|[12][0-9]|3[01])(0[1-9]|1[0-2])([0-9]{2})")
_GGA_FIELDS = 14  # NMEA 0183 §6.3 GGA: time … diffStation
_GST_FIELDS = 8  # NMEA 0183 §6.3 GST: time, rms, major, minor, orient, σlat, σlon, σalt
_GSV_HEAD = 3  # NMEA 0183 §6.3 GSV: number of sentences, sentence number, satellites in view
_GSV_GROUP = 4  # … then per satellite: number, elevation, azimuth, SNR (C/N0)
#: NMEA 0183 §6.3 RMC: time … mag. variation E/W, mode (NMEA 2.3+); navigational status (4.10+)
#: may be absent. The pynmeagps path reads the first 12, so fewer go to it (and its error).
_RMC_FIELDS = 12
#: NMEA 0183 §6.3 GSA: mode, fix type, 12 satellite numbers, PDOP, HDOP, VDOP; system id (4.10+)
#: may be absent. The pynmeagps path reads the first 17, so fewer go to it (and its error).
_GSA_FIELDS = 17
_GSA_SVIDS = slice(2, 14)


class _OffPathError(Exception):
    """Not on the plain path: decode through pynmeagps instead."""


def _time(s: str) -> dt.time | None:
    global _last_time  # noqa: PLW0603 - a one-entry cache, replaced whole
    last = _last_time
    if s == last[0]:
        return last[1]
    if s == "":
        return None  # pynmeagps: strptime fails → "" → None
    m = _TIME.fullmatch(s)
    if m is None:
        raise _OffPathError
    h, mi, sec = int(m[1]), int(m[2]), int(m[3])
    if h > 23 or mi > 59 or sec > 59:  # strptime/datetime rules (leap second 60 → invalid)
        raise _OffPathError
    frac = m[4]
    t = dt.time(h, mi, sec, int(frac.ljust(6, "0")) if frac else 0)
    _last_time = (s, t)
    return t


#: The last time text read and its value: a second's GGA, GST (and RMC) carry the same text, and
#: so do the other stations' sentences of that second (receivers align to the GPS second).
_last_time: tuple[str, dt.time | None] = ("", None)


def _date(s: str) -> dt.date | None:
    if s == "":
        return None  # pynmeagps: strptime fails → "" → None
    m = _DATE.fullmatch(s)
    if m is None:
        raise _OffPathError
    yy = int(m[3])
    # strptime %y: 69–99 → 19yy, 00–68 → 20yy (POSIX); a day past the month's end is a
    # ValueError here, so it goes to the pynmeagps path (which gives no date)
    return dt.date(yy + (1900 if yy >= 69 else 2000), int(m[2]), int(m[1]))


def _f(s: str) -> float:
    return NAN if s == "" else float(s)


def _i(s: str) -> int | None:
    return None if s == "" else int(s)


#: Degrees of recent latitude/longitude texts: a fixed station sends the same ones every second,
#: and ``round(x, 10)`` is the dearest step of a GGA. Cleared when full.
_DMM_CACHE: dict[str, float] = {}
_DMM_CACHE_SIZE = 512  # two texts per station: ample for a process of stations


def _dmm(pos: str) -> float:
    """``(d)ddmm.mmmm`` → unsigned degrees as pynmeagps ``dmm2ddd`` (NaN where it gives "")."""
    deg = _DMM_CACHE.get(pos)
    if deg is None:
        deg = _dmm_uncached(pos)
        if len(_DMM_CACHE) >= _DMM_CACHE_SIZE:
            _DMM_CACHE.clear()
        _DMM_CACHE[pos] = deg
    return deg


def _dmm_uncached(pos: str) -> float:
    dp = pos.find(".")
    if dp < 4:
        return NAN
    try:
        return round(abs(float(pos[0 : dp - 2])) + float(pos[dp - 2 :]) / 60, 10)
    except ValueError:
        return NAN


def _signed(value: float, hemisphere: str, negative: str) -> float:
    # pynmeagps applies the hemisphere to numeric values only: -abs if S/W, else abs
    if math.isnan(value):
        return value
    return -abs(value) if hemisphere == negative else abs(value)


def _gga(talker: str, f: list[str]) -> GgaFix:
    if len(f) < _GGA_FIELDS:
        raise _OffPathError
    # GgaFix(talker=…, …) field by field into its twin (see _nmea.GGA_TWIN), in the same order
    o = _nmea.GGA_TWIN()
    o.talker = talker
    o.time_utc = _time(f[0])
    o.lat_deg = _signed(_dmm(f[1]), f[2], "S")
    o.lon_deg = _signed(_dmm(f[3]), f[4], "W")
    o.quality = _i(f[5]) or 0
    o.n_sats_used = _i(f[6])
    o.hdop = _f(f[7])
    o.alt_msl_m = _f(f[8])
    o.geoid_sep_m = _f(f[10])
    o.dgps_age_s = _f(f[12])
    o.dgps_station = _i(f[13])
    o.__class__ = _nmea.GgaFix
    gga: GgaFix = o
    return gga


def _gst(talker: str, f: list[str]) -> GstErrors:
    if len(f) < _GST_FIELDS:
        raise _OffPathError
    o = _nmea.GST_TWIN()  # GstErrors(talker=…, …), as _gga builds its value
    o.talker = talker
    o.time_utc = _time(f[0])
    o.rms_m = _f(f[1])
    o.major_m = _f(f[2])
    o.minor_m = _f(f[3])
    o.orient_deg = _f(f[4])
    o.lat_sigma_m = _f(f[5])
    o.lon_sigma_m = _f(f[6])
    o.alt_sigma_m = _f(f[7])
    o.__class__ = _nmea.GstErrors
    gst: GstErrors = o
    return gst


def _gsv_svids(texts: list[str]) -> tuple[int, ...]:
    return tuple([int(v) if v else 0 for v in texts])  # empty satellite number → 0


def _gsv_degrees(texts: list[str]) -> tuple[float, ...]:
    return tuple([float(int(v)) if v else NAN for v in texts])


def _gsv(talker: str, f: list[str]) -> GsvPart:
    # pynmeagps 1.1.x (NMEAMessage._calc_num_repeats): the satellite group repeats
    # int((fields − 3) / 4) times, whatever "number of satellites" says; the field after the
    # last whole group, if any, is the signal id (NMEA 4.10+) and any further ones are ignored.
    # Its fields are integers there ("IN": ``int`` of the text, so "45.0" is an error); an empty
    # satellite number becomes 0 in our value, other empty fields NaN.
    n = len(f)
    if n < _GSV_HEAD:
        raise _OffPathError  # pynmeagps leaves attributes unset: its path raises our ParseError
    end = n - (n - _GSV_HEAD) % _GSV_GROUP
    sig = f[end] if end < n else ""
    return GsvPart(
        talker=talker,
        n_msgs=int(f[0]),
        msg_num=int(f[1]),
        n_in_view=int(f[2]) if f[2] else 0,
        signal_id=sig.upper() if sig else None,
        svids=_gsv_svids(f[3:end:_GSV_GROUP]),
        elevation_deg=_gsv_degrees(f[4:end:_GSV_GROUP]),
        azimuth_deg=_gsv_degrees(f[5:end:_GSV_GROUP]),
        cn0_dbhz=_gsv_degrees(f[6:end:_GSV_GROUP]),
    )


def _rmc(talker: str, f: list[str]) -> RmcFix:
    if len(f) < _RMC_FIELDS:
        raise _OffPathError
    mv = _f(f[9])
    return _nmea.RmcFix(
        talker=talker,
        time_utc=_time(f[0]),
        date_utc=_date(f[8]),
        valid=f[1] == "A",
        lat_deg=_signed(_dmm(f[2]), f[3], "S"),
        lon_deg=_signed(_dmm(f[4]), f[5], "W"),
        speed_mps=_f(f[6]) * _nmea.KNOT_MPS,
        course_deg=_f(f[7]),
        mag_var_deg=-mv if f[10] == "W" else mv,
        mode=f[11],
        nav_status=f[12] if len(f) > _RMC_FIELDS else "",
    )


def _gsa(talker: str, f: list[str]) -> GsaDop:
    if len(f) < _GSA_FIELDS:
        raise _OffPathError
    svids = tuple([int(v) for v in f[_GSA_SVIDS] if v])
    raw_id = f[_GSA_FIELDS] if len(f) > _GSA_FIELDS else ""  # NMEA 4.10+: one hex digit
    sys_id = int(raw_id, 16) if raw_id else None
    system = SYSTEM_ID.get(sys_id) if sys_id is not None else TALKER_SYSTEM.get(talker)
    return _nmea.GsaDop(
        talker=talker,
        selection=f[0],
        fix_type=int(f[1]) if f[1] else 0,
        svids=svids,
        sats=tuple([s for n in svids if (s := nmea_sat_id(system, n)) is not None]),
        pdop=_f(f[14]),
        hdop=_f(f[15]),
        vdop=_f(f[16]),
        system_id=sys_id,
    )


def _lean(builder: Callable[[str, list[str]], _Lean]) -> Callable[[str, bytes], _Lean | None]:
    def decode(talker: str, payload: bytes) -> _Lean | None:
        # ``payload``: the bytes between the address's comma and "*" (checksum already checked)
        if b"*" in payload or not payload.isascii():  # pynmeagps splits at the first "*"
            return None
        try:
            return builder(talker, payload.decode("ascii").split(","))
        except (_OffPathError, ValueError):
            return None

    return decode


#: Sentence formatter → lean decoder (``None`` = use the pynmeagps path); "…H": the Unicore
#: high-precision variants, which pynmeagps reads with the same fields.
FAST_BUILDERS: dict[str, Callable[[str, bytes], _Lean | None]] = {
    "GGA": _lean(_gga),
    "GST": _lean(_gst),
    "GSV": _lean(_gsv),
    "GSVH": _lean(_gsv),
    "RMC": _lean(_rmc),
    "RMCH": _lean(_rmc),
    "GSA": _lean(_gsa),
    "GSAH": _lean(_gsa),
}
