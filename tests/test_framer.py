"""Framer: mixed NMEA 0183 / RTCM 3 / vendor-binary framing, resynchronisation and counters."""

from __future__ import annotations

import os

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers._crc import crc24q, frame_rtcm
from ionwarden.parsers._errors import ParseError
from ionwarden.parsers._framer import (
    MAX_INCOMPLETE_FRAME,
    NEED_DATA,
    Framer,
    NmeaFrame,
    RtcmFrame,
    crc24q_fast,
)

# NMEA 0183 §5.3 sentence with a valid XOR checksum (from the real capture
# nmea/pygnssutils_pygpsdata-nmea.log, first GNGGA line pattern; checksum computed by us below).
_GGA_BODY = b"GNGGA,103607.00,5327.03942,N,00214.42462,W,1,12,0.55,48.3,M,48.0,M,,"


def _nmea(body: bytes) -> bytes:
    ck = 0
    for b in body:
        ck ^= b
    return b"$" + body + b"*%02X\r\n" % ck


def _rtcm(msg_type: int, n: int = 10) -> bytes:
    payload = bytes(((msg_type >> 4) & 0xFF, (msg_type & 0xF) << 4)) + bytes(range(n))
    return frame_rtcm(payload)


def _feed_all(chunks) -> tuple[list, Framer]:
    framer = Framer()
    out = []
    for chunk in chunks:
        out += framer.feed(chunk)
    out += framer.feed(b"")
    return out, framer


def _key(frames):
    return [
        (type(f).__name__, getattr(f, "msg_type", None), getattr(f, "raw", None)) for f in frames
    ]


def test_framer_keepalive_frame_has_crc_zero():
    """crc24q_fast gives 0 over the caster keep-alive D3 00 00 47 EA 4B (RTCM 10403.3 §4.2, common practice)."""
    assert crc24q_fast(bytes.fromhex("D3000047EA4B")) == 0
    framer = Framer()
    assert framer.feed(bytes.fromhex("D3000047EA4B")) == []
    assert framer.statistics().rtcm_empty_frames == 1


@given(st.binary(min_size=0, max_size=1029))
def test_framer_crc_fast_equals_table_crc(data):
    """crc24q_fast equals the bytewise CRC-24Q of _crc (RTCM 10403.3 §4.2) for any bytes."""
    assert crc24q_fast(data) == crc24q(data)


def test_framer_need_data_is_a_named_sentinel():
    """Framer's incomplete-frame marker is the NEED_DATA enum member, never None (STYLE rule 4)."""
    assert NEED_DATA is not None
    assert repr(NEED_DATA).startswith("<NeedData.NEED_DATA")


def test_framer_finds_frames_between_vendor_binary():
    """Framer returns RTCM and NMEA frames and counts UBX bytes as discarded when they interleave."""
    ubx = bytes.fromhex("B5620107") + bytes(range(40))  # UBX header + junk (u-blox protocol)
    stream = ubx + _rtcm(1005) + _nmea(_GGA_BODY) + ubx + _rtcm(4072)
    frames, framer = _feed_all([stream])
    assert [type(f) for f in frames] == [RtcmFrame, NmeaFrame, RtcmFrame]
    assert [f.msg_type for f in frames if isinstance(f, RtcmFrame)] == [1005, 4072]
    stats = framer.statistics()
    assert stats.bytes_discarded == 2 * len(ubx)
    assert stats.bytes_total == len(stream)
    assert frames[1].offset == len(ubx) + len(_rtcm(1005))


def test_framer_false_preamble_does_not_swallow_next_frame():
    """Framer resyncs by one byte when a 0xD3 inside NMEA/binary fails CRC, keeping the next frame."""
    fake = b"\xd3\x00\x40" + b"\x11" * 3  # claims 64 bytes: would cover the real frame below
    stream = fake + _rtcm(1077, 30) + _nmea(_GGA_BODY)
    frames, framer = _feed_all([stream])
    assert _key(frames) == _key(
        [RtcmFrame(msg_type=1077, payload=b"", offset=0), NmeaFrame(raw=_nmea(_GGA_BODY), offset=0)]
    )
    assert framer.statistics().crc_failures == 1


def test_framer_bad_nmea_checksum_counted_and_next_kept():
    """Framer counts an NMEA checksum failure and still returns the following sentence."""
    bad = _nmea(_GGA_BODY)[:-4] + b"00\r\n"
    frames, framer = _feed_all([bad + _nmea(_GGA_BODY)])
    assert len(frames) == 1
    assert framer.statistics().nmea_checksum_failures == 1


def test_framer_truncated_frame_at_eof_counted():
    """Framer counts a frame cut by the end of the stream and discards its bytes."""
    whole = _rtcm(1019, 50)
    frames, framer = _feed_all([_nmea(_GGA_BODY) + whole[:-5]])
    assert len(frames) == 1
    stats = framer.statistics()
    assert stats.truncated_at_eof >= 1
    assert stats.bytes_discarded == len(whole) - 5


def test_framer_rejects_data_after_eof():
    """Framer raises ParseError when bytes arrive after feed(b"") and ignores a repeated EOF."""
    framer = Framer()
    framer.feed(b"")
    assert framer.feed(b"") == []
    with pytest.raises(ParseError):
        framer.feed(b"$")


def test_framer_buffer_bounded_by_max_incomplete():
    """Framer never holds more than one maximal incomplete frame between calls (RTCM 10403.3 Table 4-1)."""
    framer = Framer()
    framer.feed(b"\xd3\x03\xff")  # a 1023-byte frame announced
    for _ in range(200):
        framer.feed(os.urandom(7))
        assert len(framer._buf) <= MAX_INCOMPLETE_FRAME


@pytest.mark.parametrize(
    ("name", "rtcm", "nmea", "crc_bad"),
    [
        # Figures from ../shared/data/real/PROVENANCE.md for each file.
        ("RTK134_202102051543.rtcm3", 7954, 0, 0),
        ("pygnssutils_ntrip_encode_none.bin", 292, 0, 0),
        ("pygnssutils_pygpsdata-rtcm3.log", 1106, 4661, 0),
        ("pyrtcm_pygpsdata-NTRIP-USCL00CHL0.log", 35, 0, 0),
        ("pyrtcm_pygpsdata-NTRIP.log", 73, 0, 0),
        ("pyrtcm_pygpsdata-MIXED-RTCM3.log", 7, 2, 0),
        ("pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log", 6, 2, 1),
        ("pyrtcm_pygpsdata-RTCMMSM3.log", 3, 0, 0),
    ],
)
def test_framer_counts_match_provenance(real_data, name, rtcm, nmea, crc_bad):
    """Framer finds the RTCM frame and NMEA sentence counts PROVENANCE.md states for each capture."""
    data = (real_data / "rtcm" / name).read_bytes()
    frames, framer = _feed_all([data])
    stats = framer.statistics()
    assert stats.rtcm_frames == rtcm
    # NMEA: 4 661 valid sentences = nmea/pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea (PROVENANCE.md).
    assert stats.nmea_frames == nmea
    assert stats.crc_failures == crc_bad
    assert stats.bytes_total == len(data)
    framed = sum(len(f.payload) + 6 if isinstance(f, RtcmFrame) else len(f.raw) for f in frames)
    assert framed + stats.bytes_discarded == len(data)


def test_framer_ntrip_capture_starts_with_cut_frame(real_data):
    """Framer discards exactly the 420-byte cut-frame tail at the start of ntrip_encode_none.bin (PROVENANCE.md)."""
    frames, framer = _feed_all(
        [(real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes()]
    )
    assert frames[0].offset == 420
    assert framer.statistics().bytes_discarded == 420


def test_framer_badcrc_file_non_rtcm_bytes(real_data):
    """Framer leaves 247 non-RTCM bytes in MIXED-RTCM3BADCRC.log, as PROVENANCE.md's scan counts."""
    data = (real_data / "rtcm" / "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log").read_bytes()
    frames, _ = _feed_all([data])
    rtcm_bytes = sum(len(f.payload) + 6 for f in frames if isinstance(f, RtcmFrame))
    assert len(data) - rtcm_bytes == 247


@pytest.mark.parametrize(
    "name", ["pygnssutils_pygpsdata-rtcm3.log", "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log"]
)
def test_framer_whole_bytewise_and_junk_agree(real_data, name):
    """Framer gives identical frames fed whole, one byte at a time, and with junk between frames."""
    data = (real_data / "rtcm" / name).read_bytes()[:60_000]
    whole, _ = _feed_all([data])
    bytewise, _ = _feed_all([data[i : i + 1] for i in range(len(data))])
    assert _key(bytewise) == _key(whole)
    assert [f.offset for f in bytewise] == [f.offset for f in whole]
    # Junk between frames: a false preamble and a false '$' before every frame.
    junk = b"\xd3\x00\x05\x01$GP\xff"
    pieces = []
    last = 0
    for f in whole:
        pieces.append(data[last : f.offset])
        pieces.append(junk)
        size = len(f.payload) + 6 if isinstance(f, RtcmFrame) else len(f.raw)
        pieces.append(data[f.offset : f.offset + size])
        last = f.offset + size
    with_junk, _ = _feed_all([b"".join(pieces) + junk])
    assert _key(with_junk) == _key(whole)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=700), min_size=1, max_size=40))
def test_framer_arbitrary_chunking_same_frames(real_data, cuts):
    """Framer's output does not depend on how the stream is cut into chunks (STYLE rule 8)."""
    data = (real_data / "rtcm" / "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log").read_bytes() * 3
    whole, _ = _feed_all([data])
    chunks, pos = [], 0
    for c in cuts:
        chunks.append(data[pos : pos + c])
        pos += c
    chunks.append(data[pos:])
    assert _key(_feed_all([c for c in chunks if c])[0]) == _key(whole)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=3000))
def test_framer_arbitrary_bytes_never_raise(data):
    """Framer turns arbitrary bytes into frames and counters only, with every byte accounted for."""
    frames, framer = _feed_all([data])
    stats = framer.statistics()
    framed = sum(len(f.payload) + 6 if isinstance(f, RtcmFrame) else len(f.raw) for f in frames)
    assert framed + stats.bytes_discarded + 6 * stats.rtcm_empty_frames == len(data)
