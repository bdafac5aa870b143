"""RTCM 3 non-MSM messages: decoder table for the stream (ephemerides, station, descriptors).

``DECODERS`` maps an RTCM message number (DF002) to ``decoder(body, ctx)``; ``body`` is the message
as framed (after the 3-byte transport header, before the CRC, RTCM 10403.3 §4 Table 4-1), so it starts
with the 12-bit DF002. Decoders raise :class:`ParseError` (with ``message_id``) on bad content and
never any other exception.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from ._gnsstime import GpsTime

__all__ = ["DECODERS", "DecodeContext"]


@dataclass(frozen=True, slots=True, kw_only=True)
class DecodeContext:
    """What a decoder may need beyond the message bytes.

    ``reference_time`` resolves truncated week numbers (10-bit GPS DF076 / QZSS DF452) to the full
    GPS week nearest to it. With ``None`` the current 1024-week era is assumed: 10-bit week + 2048
    (valid from 2019-04-07 to 2038-11-20).
    """

    reference_time: GpsTime | None = None


DECODERS: dict[int, Callable[[bytes, DecodeContext], object]] = {}
