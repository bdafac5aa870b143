"""RTCM 3 non-MSM messages: the decoder table the stream dispatches on.

``DECODERS`` maps an RTCM message number (DF002) to ``decoder(body, ctx)``; ``body`` is the message
as framed (after the 3-byte transport header, before the CRC, RTCM 10403.3 §4 Table 4-1), so it starts
with the 12-bit DF002. Decoders raise :class:`ParseError` (with ``message_id``) on bad content and
never any other exception. Types not in the table are the caller's to count and pass through raw.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ._rtcm_eph import (
    DecodeContext,
    decode_1019,
    decode_1020,
    decode_1042,
    decode_1044,
    decode_1045,
    decode_1046,
)
from ._rtcm_station import decode_1005, decode_1006, decode_descriptor

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["DECODERS", "DecodeContext"]

#: Message number → decoder (RTCM 10403.3 Table 3.5-1 message types).
DECODERS: dict[int, Callable[[bytes, DecodeContext], object]] = {
    1005: decode_1005,  # stationary reference station ARP
    1006: decode_1006,  # ARP + antenna height
    1007: decode_descriptor,  # antenna descriptor
    1008: decode_descriptor,  # antenna descriptor + serial number
    1019: decode_1019,  # GPS ephemeris
    1020: decode_1020,  # GLONASS ephemeris
    1033: decode_descriptor,  # receiver and antenna descriptors
    1042: decode_1042,  # BeiDou ephemeris
    1044: decode_1044,  # QZSS ephemeris
    1045: decode_1045,  # Galileo F/NAV ephemeris
    1046: decode_1046,  # Galileo I/NAV ephemeris
}
