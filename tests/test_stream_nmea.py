"""StreamDecoder's NMEA path: framed sentences are decoded without a second checksum, and every
sentence the decoder rejects is still counted."""

from __future__ import annotations

from unittest import mock

from ionwarden.parsers import NmeaOther
from ionwarden.parsers._nmea import GgaFix
from ionwarden.parsers._stream import StreamDecoder

from .conftest import REAL_DATA


def _sentence(body: bytes, start: bytes = b"$") -> bytes:
    """NMEA 0183 §5.3: start character, body, "*", XOR of the body as two hex digits, CR LF."""
    ck = 0
    for b in body:
        ck ^= b
    return start + body + b"*%02X\r\n" % ck


GGA = _sentence(b"GPGGA,092725.00,4717.11399,N,00833.91590,E,1,08,1.01,499.6,M,48.0,M,,")


def test_stream_nmea_framed_sentences_skip_the_second_checksum() -> None:
    """StreamDecoder decodes framed sentences without computing their checksum again (the framer did)."""
    data = (REAL_DATA / "nmea" / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes()
    dec = StreamDecoder()
    dec.nmea_wanted = frozenset({"GGA", "GST"})
    with mock.patch(
        "ionwarden.parsers._nmea.nmea_checksum", side_effect=AssertionError("checksum recomputed")
    ):
        msgs = dec.feed(data) + dec.feed(b"")
    stats = dec.statistics()
    assert stats.nmea_decoded == 4661  # every sentence of the extract (PROVENANCE.md)
    assert stats.nmea_errors == 0
    assert sum(isinstance(m, GgaFix) for m in msgs) == 157  # GNGGA×157 (PROVENANCE.md)
    assert {m.sentence_id for m in msgs if isinstance(m, NmeaOther)} == {
        "GLL", "VTG", "GSA", "GSV", "RMC"
    }  # fmt: skip


def test_stream_nmea_rejected_framed_sentences_are_counted() -> None:
    """StreamDecoder counts a framed sentence it cannot name (AIS "!", no address, bad address) as
    an NMEA error with its stream offset, and decodes the good ones around it (NMEA 0183 §5.3)."""
    ais = _sentence(b"AIVDM,1,1,,A,13u?etPv2;0n:dDPwUM1U1Cb069D,0", start=b"!")
    empty = _sentence(b"")
    bad_address = _sentence(b"GP-GA,1")
    stream = GGA + ais + GGA + empty + bad_address + GGA
    for wanted in (None, frozenset({"GGA", "GST"}), frozenset()):
        dec = StreamDecoder()
        dec.nmea_wanted = wanted
        msgs = dec.feed(stream) + dec.feed(b"")
        stats = dec.statistics()
        assert stats.framer.nmea_frames == 6
        assert stats.nmea_decoded == 3
        assert stats.nmea_errors == 3
        assert stats.last_error == (
            f"bad address field b'GP-GA' (message NMEA) at stream offset {stream.index(bad_address)}"
        )
        assert len(msgs) == 3
