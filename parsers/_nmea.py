"""NMEA 0183 sentences to typed, immutable values, through pynmeagps; GSV group assembly.

:func:`decode_sentence` takes one ``$...*hh`` sentence. It checks the checksum itself (NMEA 0183
§5.2.1: XOR of the bytes between ``$`` and ``*``, two hex digits), so a bad checksum is a
:class:`ParseError`, unless the caller says it was checked already (``checked=True``: the stream
decoder, for sentences our framer verified). Sentences we use (GGA, RMC, GSA, GSV, GST, GNS, VTG, ZDA,
and the Unicore high-precision ``…H`` variants that pynmeagps reads with the same fields) are parsed
by ``pynmeagps.NMEAReader.parse`` (GGA, GST, GSV, RMC and GSA, decoded every second, first
through the lean builders of ``_nmea_fast``, which give the same values); every other sentence
passes through raw as :class:`NmeaOther` without calling pynmeagps (it costs tens of µs per
sentence), or, from :func:`decode_wanted`, is only checked and gives ``None`` (for callers that
drop those sentences anyway). pynmeagps exceptions become :class:`ParseError` (``raise … from
exc``).

Units are in field names; absent numeric fields are NaN (floats) or ``None`` (integers, times).
Satellite numbers become our satellite ids (``parsers._signals``) through :func:`nmea_sat_id`.
"""

# size: ~460 lines: every NMEA 0183 sentence we read, typed, plus GSV group assembly;
# one module per talker family would scatter the shared checksum and field parsing.
from __future__ import annotations

import datetime as dt
import functools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

from pynmeagps import NMEAReader
from pynmeagps import exceptions as nmea_exc
from pynmeagps.nmeatypes_core import VALNONE

from ._errors import ParseError
from ._nmea_fast import FAST_BUILDERS
from ._twin import slots_twin

if TYPE_CHECKING:
    from collections.abc import Container
from ._nmea_gsv import (
    SYSTEM_ID,
    TALKER_SYSTEM,
    GsvAssembler,
    GsvPart,
    SatellitesInView,
    nmea_sat_id,
)

__all__ = [
    "GgaFix",
    "GnsFix",
    "GsaDop",
    "GstErrors",
    "GsvAssembler",
    "GsvPart",
    "NmeaMessage",
    "NmeaOther",
    "RmcFix",
    "SatellitesInView",
    "VtgVelocity",
    "ZdaTime",
    "decode_sentence",
    "decode_wanted",
    "nmea_checksum",
    "nmea_sat_id",
    "skipped_sentence",
]

NAN = math.nan
KNOT_MPS = 1852.0 / 3600.0  # international knot (NMEA 0183 speeds are in knots and km/h)
#: Longest sentence we accept: NMEA 0183 §5.3 allows 82 characters; vendor variants (Unicore
#: "H" sentences, PUBX) run longer, so allow a margin.
MAX_SENTENCE_BYTES = 256
#: Distinct address fields whose naming (talker, formatter, builder) is cached (see ``_address``).
_ADDRESS_CACHE_SIZE = 256


@dataclass(frozen=True, slots=True, kw_only=True)
class GgaFix:
    """GGA: time, position and fix quality (NMEA 0183 §6.3 GGA)."""

    talker: str
    time_utc: dt.time | None
    lat_deg: float
    lon_deg: float
    quality: int  # 0 invalid, 1 GPS, 2 DGPS, 4 RTK fixed, 5 RTK float, 6 dead reckoning
    n_sats_used: int | None
    hdop: float
    alt_msl_m: float
    geoid_sep_m: float
    dgps_age_s: float
    dgps_station: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class RmcFix:
    """RMC: recommended minimum data (NMEA 0183 §6.3 RMC); speed converted from knots."""

    talker: str
    time_utc: dt.time | None
    date_utc: dt.date | None
    valid: bool  # status "A"
    lat_deg: float
    lon_deg: float
    speed_mps: float
    course_deg: float
    mag_var_deg: float  # east positive
    mode: str
    nav_status: str


@dataclass(frozen=True, slots=True, kw_only=True)
class GsaDop:
    """GSA: satellites used and DOPs (NMEA 0183 §6.3 GSA; ``system_id`` from NMEA 4.10+)."""

    talker: str
    selection: str  # "M" manual, "A" automatic 2D/3D
    fix_type: int  # 1 none, 2 2D, 3 3D (0 if absent)
    svids: tuple[int, ...]  # NMEA satellite numbers as sent
    sats: tuple[int, ...]  # our satellite ids (numbers we cannot place are left out)
    pdop: float
    hdop: float
    vdop: float
    system_id: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class GstErrors:
    """GST: pseudorange error statistics (NMEA 0183 §6.3 GST), 1σ in metres."""

    talker: str
    time_utc: dt.time | None
    rms_m: float
    major_m: float
    minor_m: float
    orient_deg: float
    lat_sigma_m: float
    lon_sigma_m: float
    alt_sigma_m: float


@dataclass(frozen=True, slots=True, kw_only=True)
class GnsFix:
    """GNS: multi-constellation fix (NMEA 0183 §6.3 GNS); ``mode`` has one letter per system."""

    talker: str
    time_utc: dt.time | None
    lat_deg: float
    lon_deg: float
    mode: str
    n_sats_used: int | None
    hdop: float
    alt_msl_m: float
    geoid_sep_m: float
    dgps_age_s: float
    dgps_station: int | None
    nav_status: str


@dataclass(frozen=True, slots=True, kw_only=True)
class VtgVelocity:
    """VTG: course and speed over ground (NMEA 0183 §6.3 VTG); speed from knots (else km/h)."""

    talker: str
    course_true_deg: float
    course_mag_deg: float
    speed_mps: float
    mode: str


@dataclass(frozen=True, slots=True, kw_only=True)
class ZdaTime:
    """ZDA: UTC date and time with local zone (NMEA 0183 §6.3 ZDA)."""

    talker: str
    time_utc: dt.time | None
    date_utc: dt.date | None
    zone_hours: int | None
    zone_minutes: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class NmeaOther:
    """A valid sentence of a type we do not decode, passed through raw (checksum verified)."""

    talker: str
    sentence_id: str
    raw: bytes


NmeaMessage = (
    GgaFix | RmcFix | GsaDop | GsvPart | GstErrors | GnsFix | VtgVelocity | ZdaTime | NmeaOther
)

#: Plain twins of the two values built every second (see ``_twin``): the lean GGA/GST builders of
#: ``_nmea_fast`` store the fields into one and set its class, without the frozen ``__init__``'s
#: ``object.__setattr__`` per field (~19k → ~4k instructions for a GgaFix). Same type, same
#: fields, equal values: tests/test_nmea_fast.py compares them with the pynmeagps path's.
GGA_TWIN = slots_twin(GgaFix)
GST_TWIN = slots_twin(GstErrors)

# --- helpers over pynmeagps attribute values ("" when the field is empty) -----------------------


def _f(v: Any) -> float:
    return NAN if v == "" or v is None else float(v)


def _i(v: Any) -> int | None:
    return None if v == "" or v is None else int(v)


def _t(v: Any) -> dt.time | None:
    return v if isinstance(v, dt.time) else None


def _d(v: Any) -> dt.date | None:
    return v if isinstance(v, dt.date) else None


def _s(v: Any) -> str:
    return "" if v is None else str(v)


# --- builders: pynmeagps message → our value --------------------------------------------------


def _gga(t: str, m: Any) -> GgaFix:
    return GgaFix(
        talker=t,
        time_utc=_t(m.time),
        lat_deg=_f(m.lat),
        lon_deg=_f(m.lon),
        quality=_i(m.quality) or 0,
        n_sats_used=_i(m.numSV),
        hdop=_f(m.HDOP),
        alt_msl_m=_f(m.alt),
        geoid_sep_m=_f(m.sep),
        dgps_age_s=_f(m.diffAge),
        dgps_station=_i(m.diffStation),
    )


def _rmc(t: str, m: Any) -> RmcFix:
    mv = _f(m.mv)
    return RmcFix(
        talker=t,
        time_utc=_t(m.time),
        date_utc=_d(m.date),
        valid=m.status == "A",
        lat_deg=_f(m.lat),
        lon_deg=_f(m.lon),
        speed_mps=_f(m.spd) * KNOT_MPS,
        course_deg=_f(m.cog),
        mag_var_deg=-mv if m.mvEW == "W" else mv,
        mode=_s(m.posMode),
        nav_status=_s(getattr(m, "navStatus", "")),
    )


def _gsa(t: str, m: Any) -> GsaDop:
    d = m.__dict__
    svids = tuple(int(v) for k in range(1, 13) if (v := d.get(f"svid_{k:02d}", "")) != "")
    raw_id = d.get("systemId", "")  # NMEA 4.10+: one hex digit
    sys_id = int(raw_id, 16) if raw_id != "" else None
    system = SYSTEM_ID.get(sys_id) if sys_id is not None else TALKER_SYSTEM.get(t)
    sats = tuple(s for n in svids if (s := nmea_sat_id(system, n)) is not None)
    return GsaDop(
        talker=t,
        selection=_s(m.opMode),
        fix_type=_i(m.navMode) or 0,
        svids=svids,
        sats=sats,
        pdop=_f(m.PDOP),
        hdop=_f(m.HDOP),
        vdop=_f(m.VDOP),
        system_id=sys_id,
    )


def _gsv(t: str, m: Any) -> GsvPart:
    d = m.__dict__  # pynmeagps stores fields as instance attributes: one dict, no getattr chain
    svids: list[int] = []
    elv: list[float] = []
    az: list[float] = []
    cn0: list[float] = []
    k = 1
    while (sv := d.get(f"svid_{k:02d}")) is not None:
        svids.append(int(sv) if sv != "" else 0)
        elv.append(_f(d[f"elv_{k:02d}"]))
        az.append(_f(d[f"az_{k:02d}"]))
        cn0.append(_f(d[f"cno_{k:02d}"]))
        k += 1
    sig = d.get("signalID", "")
    return GsvPart(
        talker=t,
        n_msgs=int(m.numMsg),
        msg_num=int(m.msgNum),
        n_in_view=_i(m.numSV) or 0,
        signal_id=str(sig).upper() if sig != "" else None,
        svids=tuple(svids),
        elevation_deg=tuple(elv),
        azimuth_deg=tuple(az),
        cn0_dbhz=tuple(cn0),
    )


def _gst(t: str, m: Any) -> GstErrors:
    return GstErrors(
        talker=t,
        time_utc=_t(m.time),
        rms_m=_f(m.rangeRms),
        major_m=_f(m.stdMajor),
        minor_m=_f(m.stdMinor),
        orient_deg=_f(m.orient),
        lat_sigma_m=_f(m.stdLat),
        lon_sigma_m=_f(m.stdLong),
        alt_sigma_m=_f(m.stdAlt),
    )


def _gns(t: str, m: Any) -> GnsFix:
    return GnsFix(
        talker=t,
        time_utc=_t(m.time),
        lat_deg=_f(m.lat),
        lon_deg=_f(m.lon),
        mode=_s(m.posMode),
        n_sats_used=_i(m.numSV),
        hdop=_f(m.HDOP),
        alt_msl_m=_f(m.alt),
        geoid_sep_m=_f(m.sep),
        dgps_age_s=_f(m.diffAge),
        dgps_station=_i(m.diffStation),
        nav_status=_s(getattr(m, "navStatus", "")),
    )


def _vtg(t: str, m: Any) -> VtgVelocity:
    knots, kmh = _f(m.sogn), _f(m.sogk)
    return VtgVelocity(
        talker=t,
        course_true_deg=_f(m.cogt),
        course_mag_deg=_f(m.cogm),
        speed_mps=knots * KNOT_MPS if not math.isnan(knots) else kmh / 3.6,
        mode=_s(getattr(m, "posMode", "")),
    )


def _zda(t: str, m: Any) -> ZdaTime:
    day, month, year = _i(m.day), _i(m.month), _i(m.year)
    try:
        date = dt.date(year, month, day) if day and month and year else None
    except ValueError as exc:
        raise ParseError(f"ZDA date {year}-{month}-{day} does not exist", message_id="ZDA") from exc
    return ZdaTime(
        talker=t,
        time_utc=_t(m.time),
        date_utc=date,
        zone_hours=_i(m.ltzh),
        zone_minutes=_i(m.ltzn),
    )


#: Sentence formatter → builder (NMEA 0183 §6.3); "…H" are Unicore high-precision variants with
#: the same fields in pynmeagps.
BUILDERS: dict[str, Any] = {
    "GGA": _gga,
    "RMC": _rmc,
    "GSA": _gsa,
    "GSV": _gsv,
    "GST": _gst,
    "GNS": _gns,
    "VTG": _vtg,
    "ZDA": _zda,
}
BUILDERS.update({k + "H": v for k, v in list(BUILDERS.items())})

_PYNMEAGPS_ERRORS = (
    nmea_exc.NMEAParseError,
    nmea_exc.NMEAMessageError,
    nmea_exc.NMEATypeError,
    ValueError,
    TypeError,
    IndexError,
    KeyError,
    AttributeError,
)


def nmea_checksum(body: bytes) -> int:
    """XOR of the bytes between ``$`` and ``*`` (NMEA 0183 §5.2.1)."""
    c = 0
    for b in body:
        c ^= b
    return c


@functools.lru_cache(maxsize=_ADDRESS_CACHE_SIZE)
def _address(field: bytes) -> tuple[str, str, str, Any]:
    """(name, talker, formatter, builder or None) of an address field.

    NMEA 0183 §5.3.2: two talker characters then the sentence formatter; §5.3.3: "P" then the
    manufacturer's code (talker "P", the rest as formatter, never decoded). Cached: a receiver uses
    a dozen addresses, and naming a sentence we do not decode is then one lookup.
    """
    if not field.isalnum() or not field.isascii():
        raise ParseError(f"bad address field {field[:16]!r}", message_id="NMEA")
    name = field.decode("ascii")
    if name[:1] == "P":  # proprietary: "P" + manufacturer (NMEA 0183 §5.3.3)
        return name, "P", name[1:], None
    return name, name[:2], name[2:], BUILDERS.get(name[2:])


def decode_sentence(
    raw: bytes, wanted: Container[str] | None = None, *, checked: bool = False
) -> NmeaMessage:
    """Decode one ``$...*hh`` sentence (CRLF optional); ParseError on bad checksum or content.

    ``wanted``: sentence formatters ("GGA", "GSV", …) to decode in full; any other valid sentence
    comes back as :class:`NmeaOther` after its checksum is checked, without the (slow) field parse.
    ``None`` decodes every type we know. ``checked``: the checksum was verified already (the raw
    bytes of an ``NmeaFrame`` from our framer), so it is not computed again; every other check
    stays.
    """
    return cast("NmeaMessage", _decode(raw, wanted, checked, True))  # keep_other: never None


def decode_wanted(
    raw: bytes,
    wanted: Container[str] | None = None,
    *,
    checked: bool = False,
    keep_other: bool = False,
) -> NmeaMessage | None:
    """:func:`decode_sentence`, but ``None`` where it returns :class:`NmeaOther` (a valid sentence
    outside ``wanted`` or of a type we do not decode), without building that value: for callers
    that would drop it anyway. Same checks, same errors, same values otherwise. ``keep_other``
    returns the :class:`NmeaOther` after all (exactly :func:`decode_sentence`)."""
    return _decode(raw, wanted, checked, keep_other)


#: 7-byte heads ``$`` + five-character address + ``,`` → their formatter ("" where we decode no
#: such sentence), or _NOT_PLAIN (another head, or an address ``_address`` rejects). Cleared when
#: full: a receiver sends a dozen.
_HEADS: dict[bytes, str] = {}
_HEADS_SIZE = 256
_NOT_PLAIN = "\x00"  # no formatter: _address takes alphanumeric ASCII only


def _plain_head(head: bytes) -> str:
    if head[0] != 0x24 or head[6] != 0x2C:  # "$", ","
        return _NOT_PLAIN
    try:
        _, _, formatter, builder = _address(head[1:6])
    except ParseError:
        return _NOT_PLAIN
    return formatter if builder is not None else ""


def skipped_sentence(raw: bytes, wanted: Container[str] | None) -> bool:
    """Whether ``decode_wanted(raw, wanted, checked=True)`` returns ``None`` for a plain reason
    (a well-formed ``$`` sentence with a five-character address outside ``wanted`` or of a type
    we do not decode), found without its call chain: the same checks in the same outcome, from a
    cached head. False also where it would decode, raise, or the sentence is not that plain
    (``decode_wanted`` then decides). A receiver sends ~10 such sentences a second (GSV, RMC, …)
    while the estimator wants only GGA/GST (tests/test_nmea_wanted.py compares the two)."""
    s = raw.rstrip(b"\r\n")
    n = len(s)
    # _decode's checks: at most MAX_SENTENCE_BYTES, "$" first (the head), "*" 3 from the end;
    # with n ≥ 10 the head's comma (index 6) comes before the "*", so it is the first comma and
    # the address is s[1:6].
    if n < 10 or n > MAX_SENTENCE_BYTES or s[n - 3] != 0x2A:
        return False
    head = s[:7]
    try:
        formatter = _HEADS.get(head)
    except TypeError:  # a bytearray (unhashable) where bytes are expected: decode_wanted decides
        return False
    if formatter is None:
        if len(_HEADS) >= _HEADS_SIZE:
            _HEADS.clear()
        formatter = _HEADS[head] = _plain_head(head)
    if formatter is _NOT_PLAIN:
        return False
    return formatter == "" or (wanted is not None and formatter not in wanted)


def _decode(
    raw: bytes, wanted: Container[str] | None, checked: bool, keep_other: bool
) -> NmeaMessage | None:
    s = raw.rstrip(b"\r\n")
    if len(s) > MAX_SENTENCE_BYTES:
        raise ParseError(f"sentence longer than {MAX_SENTENCE_BYTES} bytes", message_id="NMEA")
    star = len(s) - 3
    if len(s) < 7 or s[0] != 0x24 or s[star] != 0x2A:  # "$" … "*"
        raise ParseError("not a $...*hh sentence", message_id="NMEA")
    comma = s.find(b",", 1, star)
    name, talker, formatter, builder = _address(bytes(s[1 : comma if comma >= 0 else star]))
    if not checked:
        try:
            sent = int(s[star + 1 :], 16)
        except ValueError as exc:
            raise ParseError(f"checksum {s[star + 1 :]!r} is not hex", message_id=name) from exc
        calc = nmea_checksum(s[1:star])
        if sent != calc:
            raise ParseError(f"bad checksum {sent:02X}, computed {calc:02X}", message_id=name)
    if builder is None or (wanted is not None and formatter not in wanted):
        return NmeaOther(talker=talker, sentence_id=formatter, raw=bytes(s)) if keep_other else None
    fast = FAST_BUILDERS.get(formatter)
    if fast is not None and comma >= 0:  # lean GGA/GST/GSV/RMC/GSA; None = off the plain path
        lean = fast(talker, bytes(s[comma + 1 : star]))
        if lean is not None:
            return lean
    try:
        msg = NMEAReader.parse(bytes(s), validate=VALNONE)
        if msg is None:
            raise ParseError(f"pynmeagps does not know {name}", message_id=name)
        out: NmeaMessage = builder(talker, msg)
    except _PYNMEAGPS_ERRORS as exc:
        raise ParseError(f"unparseable {name}: {exc}", message_id=name) from exc
    return out
