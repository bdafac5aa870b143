"""RTCM 3 station messages: 1005/1006 antenna reference point, 1007/1008/1033 descriptors.

Layouts from RTCM 10403.3 §3.5.3: Table 3.5-9 (1005), 3.5-10 (1006), 3.5-11 (1007), 3.5-12 (1008)
and 3.5-13 (1033) (table numbers from memory: verify against the standard).
"""

from __future__ import annotations

from dataclasses import dataclass

from ._bitio import BitReader
from ._errors import ParseError

__all__ = [
    "ReceiverDescriptor",
    "StationReference",
    "decode_1005",
    "decode_1006",
    "decode_descriptor",
]

#: DF025–DF027 LSB, m; DF028 LSB, m (RTCM 10403.3 Table 3.4-1 data fields).
ECEF_LSB_M = 0.0001
HEIGHT_LSB_M = 0.0001


@dataclass(frozen=True, slots=True, kw_only=True)
class StationReference:
    """Antenna reference point (ARP) of a reference station in ECEF (ITRF), metres.

    ``antenna_height_m`` (1006 only, DF028) is the ARP height above the marker; ``None`` for 1005.
    ``non_physical`` is DF141 (1 = non-physical / computed reference station).
    """

    message: int
    station_id: int
    itrf_year: int
    gps: bool
    glonass: bool
    galileo: bool
    non_physical: bool
    single_oscillator: bool
    quarter_cycle: int
    x_m: float
    y_m: float
    z_m: float
    antenna_height_m: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class ReceiverDescriptor:
    """Antenna and receiver descriptors (1007, 1008, 1033); fields absent from the message are ""."""

    message: int
    station_id: int
    antenna_descriptor: str
    antenna_setup_id: int
    antenna_serial: str = ""
    receiver_type: str = ""
    receiver_firmware: str = ""
    receiver_serial: str = ""


def _reader(body: bytes, message_id: int, min_bits: int) -> BitReader:
    if len(body) * 8 < min_bits:
        raise ParseError(
            f"message too short: {len(body)} bytes, need {(min_bits + 7) // 8}",
            message_id=message_id,
        )
    r = BitReader(body)
    msg = r.u(12)  # DF002
    if msg != message_id:
        raise ParseError(f"DF002 is {msg}, expected {message_id}", message_id=message_id)
    return r


def _station(body: bytes, message_id: int, nbits: int) -> StationReference:
    r = _reader(body, message_id, nbits)
    station_id = r.u(12)  # DF003
    itrf_year = r.u(6)  # DF021
    gps, glo, gal = r.u(1), r.u(1), r.u(1)  # DF022, DF023, DF024
    non_physical = r.u(1)  # DF141
    x = r.s(38) * ECEF_LSB_M  # DF025
    single_osc = r.u(1)  # DF142
    r.skip(1)  # DF001 reserved
    y = r.s(38) * ECEF_LSB_M  # DF026
    quarter = r.u(2)  # DF364
    z = r.s(38) * ECEF_LSB_M  # DF027
    height = r.u(16) * HEIGHT_LSB_M if message_id == 1006 else None  # DF028
    return StationReference(
        message=message_id,
        station_id=station_id,
        itrf_year=itrf_year,
        gps=bool(gps),
        glonass=bool(glo),
        galileo=bool(gal),
        non_physical=bool(non_physical),
        single_oscillator=bool(single_osc),
        quarter_cycle=quarter,
        x_m=x,
        y_m=y,
        z_m=z,
        antenna_height_m=height,
    )


def decode_1005(body: bytes, ctx: object = None) -> StationReference:
    """Stationary RTK reference station ARP (152 bits)."""
    return _station(body, 1005, 152)


def decode_1006(body: bytes, ctx: object = None) -> StationReference:
    """Stationary RTK reference station ARP with antenna height (168 bits)."""
    return _station(body, 1006, 168)


def _string(r: BitReader, body: bytes, message_id: int, what: str) -> str:
    n = r.u(8)  # DF029 / DF032 / DF227 / DF229 / DF231 character counter
    start = r.pos // 8  # counters keep the string byte-aligned in 1007/1008/1033
    if r.pos % 8 or start + n > len(body):
        raise ParseError(f"{what}: {n} characters overrun the message", message_id=message_id)
    r.pos += 8 * n
    # DF030/DF033/DF228/DF230/DF232 are ASCII characters (RTCM 10403.3 Table 3.3-1 "char8");
    # latin-1 never fails, so non-ASCII vendor bytes are kept, not raised.
    return body[start : start + n].decode("latin-1").strip()


def decode_descriptor(body: bytes, ctx: object = None) -> ReceiverDescriptor:
    """1007 (antenna descriptor), 1008 (+ serial) or 1033 (+ receiver type, firmware, serial)."""
    if len(body) < 2:
        raise ParseError("message too short for DF002", message_id=None)
    message_id = (body[0] << 4) | (body[1] >> 4)
    if message_id not in (1007, 1008, 1033):
        raise ParseError(f"DF002 {message_id} is not a descriptor message", message_id=message_id)
    r = _reader(body, message_id, 40)
    try:
        station_id = r.u(12)  # DF003
        antenna = _string(r, body, message_id, "DF030 antenna descriptor")
        setup = r.u(8)  # DF031
        fields = {}
        if message_id in (1008, 1033):
            fields["antenna_serial"] = _string(r, body, message_id, "DF033 antenna serial")
        if message_id == 1033:
            fields["receiver_type"] = _string(r, body, message_id, "DF228 receiver type")
            fields["receiver_firmware"] = _string(r, body, message_id, "DF230 firmware")
            fields["receiver_serial"] = _string(r, body, message_id, "DF232 receiver serial")
    except EOFError as exc:
        raise ParseError(f"message truncated: {exc}", message_id=message_id) from exc
    return ReceiverDescriptor(
        message=message_id,
        station_id=station_id,
        antenna_descriptor=antenna,
        antenna_setup_id=setup,
        **fields,
    )
