"""Lean decoders for the per-second fix sentences (GGA, GST), equal to the pynmeagps path.

While ephemerides give every satellite's geometry, the only NMEA sentences decoded in full each
second are GGA and GST (``daemon.estimator`` asks for just those). pynmeagps spends ~60 µs on
each (generic attribute tables, ``strptime`` for the time); these builders read the same fields
straight from the comma-separated payload (NMEA 0183 §6.3 GGA / GST field order) and build the
same :class:`GgaFix` / :class:`GstErrors` values.

They follow pynmeagps 1.1.x's conversions exactly (``float``/``int`` of the field text, the
``(d)ddmm.mmmm`` → degrees rounding to 10 decimals, hemisphere signs applied with ``abs``) and
return ``None`` for anything off the plain path (missing fields, a time that is not
``hhmmss[.f…]`` in range, non-ASCII, conversion errors); the caller then takes the pynmeagps path,
so odd or broken sentences keep its exact values and errors. tests/test_nmea_fast.py checks both
paths give equal values on every GGA/GST sentence of the real captures.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import TYPE_CHECKING

from . import _nmea  # the value types (module reference: _nmea imports this module)

if TYPE_CHECKING:
    from collections.abc import Callable

    from ._nmea import GgaFix, GstErrors

__all__ = ["FAST_BUILDERS"]

NAN = math.nan
#: hhmmss with an optional 1–6 digit fraction: what ``strptime("%H%M%S.%f")`` reads in pynmeagps
#: (a bare hhmmss gets ".00" there); other shapes go to the pynmeagps path.
_TIME = re.compile(r"([0-9]{2})([0-9]{2})([0-9]{2})(?:\.([0-9]{1,6}))?")
_GGA_FIELDS = 14  # NMEA 0183 §6.3 GGA: time … diffStation
_GST_FIELDS = 8  # NMEA 0183 §6.3 GST: time, rms, major, minor, orient, σlat, σlon, σalt


class _OffPathError(Exception):
    """Not on the plain path: decode through pynmeagps instead."""


def _time(s: str) -> dt.time | None:
    if s == "":
        return None  # pynmeagps: strptime fails → "" → None
    m = _TIME.fullmatch(s)
    if m is None:
        raise _OffPathError
    h, mi, sec = int(m[1]), int(m[2]), int(m[3])
    if h > 23 or mi > 59 or sec > 59:  # strptime/datetime rules (leap second 60 → invalid)
        raise _OffPathError
    frac = m[4]
    return dt.time(h, mi, sec, int(frac.ljust(6, "0")) if frac else 0)


def _f(s: str) -> float:
    return NAN if s == "" else float(s)


def _i(s: str) -> int | None:
    return None if s == "" else int(s)


def _dmm(pos: str) -> float:
    """``(d)ddmm.mmmm`` → unsigned degrees as pynmeagps ``dmm2ddd`` (NaN where it gives "")."""
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
    return _nmea.GgaFix(
        talker=talker,
        time_utc=_time(f[0]),
        lat_deg=_signed(_dmm(f[1]), f[2], "S"),
        lon_deg=_signed(_dmm(f[3]), f[4], "W"),
        quality=_i(f[5]) or 0,
        n_sats_used=_i(f[6]),
        hdop=_f(f[7]),
        alt_msl_m=_f(f[8]),
        geoid_sep_m=_f(f[10]),
        dgps_age_s=_f(f[12]),
        dgps_station=_i(f[13]),
    )


def _gst(talker: str, f: list[str]) -> GstErrors:
    if len(f) < _GST_FIELDS:
        raise _OffPathError
    return _nmea.GstErrors(
        talker=talker,
        time_utc=_time(f[0]),
        rms_m=_f(f[1]),
        major_m=_f(f[2]),
        minor_m=_f(f[3]),
        orient_deg=_f(f[4]),
        lat_sigma_m=_f(f[5]),
        lon_sigma_m=_f(f[6]),
        alt_sigma_m=_f(f[7]),
    )


def _lean(
    builder: Callable[[str, list[str]], GgaFix | GstErrors],
) -> Callable[[str, bytes], GgaFix | GstErrors | None]:
    def decode(talker: str, payload: bytes) -> GgaFix | GstErrors | None:
        # ``payload``: the bytes between the address's comma and "*" (checksum already checked)
        if b"*" in payload or not payload.isascii():  # pynmeagps splits at the first "*"
            return None
        try:
            return builder(talker, payload.decode("ascii").split(","))
        except (_OffPathError, ValueError):
            return None

    return decode


#: Sentence formatter → lean decoder (``None`` = use the pynmeagps path).
FAST_BUILDERS: dict[str, Callable[[str, bytes], GgaFix | GstErrors | None]] = {
    "GGA": _lean(_gga),
    "GST": _lean(_gst),
}
