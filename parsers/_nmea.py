"""NMEA 0183 sentences (through pynmeagps) to typed, immutable values; GSV group assembly."""

from __future__ import annotations

__all__ = ["GsvAssembler", "NmeaMessage", "decode_sentence"]

NmeaMessage = object


def decode_sentence(raw: bytes) -> NmeaMessage:
    """Decode one ``$...*hh`` sentence (CRLF optional); ParseError on bad checksum or content."""
    raise NotImplementedError


class GsvAssembler:
    """Assembles multi-sentence GSV groups per talker and NMEA 4.11 signal id."""

    def push(self, msg: NmeaMessage) -> object | None:
        raise NotImplementedError
