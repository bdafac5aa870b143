"""Framer: RTCM frames and NMEA sentences sent back to back are checked as one run; outcomes as
frame by frame (the one-by-one path the framer had before runs, kept below as ``_OneByOne``)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ionwarden.parsers._crc import crc24q, frame_rtcm
from ionwarden.parsers._framer import (
    _NMEA_RUN_BYTES,
    MAX_NMEA_SENTENCE,
    Frame,
    Framer,
    NeedData,
    NmeaFrame,
    RtcmFrame,
    _crc_run,
)


def _payload(msg_type: int, n: int, seed: int) -> bytes:
    """An invented message: DF002 message number, then bytes that never hold a 0xD3 preamble."""
    body = np.random.default_rng(seed).integers(0, 0xD3, n, dtype=np.uint8).tobytes()
    return bytes(((msg_type >> 4) & 0xFF, (msg_type & 0xF) << 4)) + body


def _feed(data: bytes, cuts: list[int]) -> tuple[list[RtcmFrame], Framer]:
    framer = Framer()
    out: list[RtcmFrame] = []
    last = 0
    for cut in [*cuts, len(data)]:
        out += framer.feed(data[last:cut])  # type: ignore[arg-type]
        last = cut
    out += framer.feed(b"")  # type: ignore[arg-type]
    return out, framer


def test_crc_run_equals_bytewise_crc():
    """CRC of each frame of a run equals the byte-wise CRC-24Q (RTCM 10403.3 §4.2; _crc.crc24q)."""
    rng = np.random.default_rng(7)
    frames = [
        rng.integers(0, 256, int(n), dtype=np.uint8).tobytes() for n in rng.integers(1, 1030, 40)
    ]
    buf = bytearray(b"".join(frames))
    starts = np.cumsum([0] + [len(f) for f in frames[:-1]]).tolist()
    assert _crc_run(buf, starts, len(buf)) == [crc24q(f) for f in frames]  # _crc.crc24q
    assert _crc_run(buf, starts[:1], len(frames[0])) == [crc24q(frames[0])]  # _crc.crc24q


@pytest.mark.parametrize("chunk", [0, 1, 7, 100, 4096])
def test_run_with_bad_crc_keep_alive_and_short_frame(chunk):
    """Good frames around a bad CRC, a keep-alive and a 1-byte message come out as frame by frame.

    RTCM 10403.3 Table 4-1 framing: the bad frame is counted and skipped (resync by one byte, no
    0xD3 inside it), the keep-alive D3 00 00 47 EA 4B counted, the 1-byte message discarded.
    """
    good = [frame_rtcm(_payload(1077 + k, 50 + 97 * k, k)) for k in range(6)]
    bad = bytearray(frame_rtcm(_payload(1087, 120, 99)))
    bad[-1] ^= 0x01  # CRC no longer matches
    keep_alive = bytes.fromhex("D3000047EA4B")
    short = frame_rtcm(b"\x42")
    data = b"".join([good[0], good[1], bytes(bad), good[2], keep_alive, good[3], short, *good[4:]])
    cuts = [] if chunk == 0 else list(range(chunk, len(data), chunk))
    frames, framer = _feed(data, cuts)
    want = [1077, 1078, 1079, 1080, 1081, 1082]  # the six good frames, in order
    assert [f.msg_type for f in frames] == want
    assert [f.payload for f in frames] == [g[3:-3] for g in good]
    offsets = [data.index(g) for g in good]
    assert [f.offset for f in frames] == offsets
    stats = framer.statistics()
    assert stats.rtcm_frames == 6
    assert stats.crc_failures == 1
    assert stats.rtcm_empty_frames == 1
    assert stats.bytes_discarded == len(bad) + len(short)
    assert stats.bytes_total == len(data)


# --- NMEA sentence runs ----------------------------------------------------------------------------


class _OneByOne(Framer):
    """The framer without sentence runs: each NMEA candidate through ``_nmea_at`` alone (the code
    path every NMEA sentence took before runs; a run still hands it a bad sentence holding a ``$``
    or ``!``)."""

    def _nmea_run(self, i: int, frames: list[Frame]) -> NeedData | None:
        return self._nmea_single(i, frames)


def _sentence(
    body: bytes, *, start: bytes = b"$", eol: bytes = b"\r\n", fmt: bytes = b"%02X"
) -> bytes:
    """NMEA 0183 §5.3: start character, body, "*" and the XOR of the body as two hex digits."""
    return start + body + b"*" + fmt % _xor(body) + eol


def _xor(body: bytes) -> int:
    """NMEA 0183 §5.3.1 checksum: XOR of the bytes between the start character and "*"."""
    ck = 0
    for b in body:
        ck ^= b
    return ck


def _outcome(
    framer: Framer, chunks: list[bytes]
) -> tuple[list[tuple[object, ...]], tuple[object, ...]]:
    """Every frame (kind, bytes, offset) and every counter after feeding ``chunks`` then EOF."""
    frames: list[Frame] = []
    for chunk in chunks:
        frames += framer.feed(chunk)
    frames += framer.feed(b"")
    keys: list[tuple[object, ...]] = [
        (f.raw, f.offset) if isinstance(f, NmeaFrame) else (f.msg_type, f.payload, f.offset)
        for f in frames
    ]
    st_ = framer.statistics()
    counters: tuple[object, ...] = (
        st_.rtcm_frames,
        st_.nmea_frames,
        dict(st_.rtcm_by_type),
        st_.rtcm_empty_frames,
        st_.crc_failures,
        st_.nmea_checksum_failures,
        st_.truncated_at_eof,
        st_.bytes_discarded,
        st_.bytes_total,
    )
    return keys, counters


def _cut(data: bytes, cuts: list[int]) -> list[bytes]:
    points = sorted({c % (len(data) + 1) for c in cuts})
    return [data[a:b] for a, b in zip([0, *points], [*points, len(data)], strict=True) if b > a]


def test_nmea_run_edge_sentences_as_one_by_one():
    """A run holding an empty body, lower-case hex, a bare LF, the longest accepted sentence, one
    byte too long, bad checksums (one with a "$" inside) and a CR without LF gives exactly the
    one-by-one frames.

    NMEA 0183 §5.3 framing as the framer reads it (common practice for the bare LF and the
    MAX_NMEA_SENTENCE margin): bad checksums are counted, the malformed candidates are skipped by
    one byte, and all their bytes are counted as discarded. The "$X*00" inside the second bad
    sentence is a candidate of its own, with a bad checksum too (XOR of "X" is 58).
    """
    longest = _sentence(b"P" * (MAX_NMEA_SENTENCE - 3))  # "*hh" ends at MAX_NMEA_SENTENCE bytes
    too_long = _sentence(b"P" * (MAX_NMEA_SENTENCE - 2))
    bad = b"$GPGSV,1,1,00*%02X\r\n" % (_xor(b"GPGSV,1,1,00") ^ 0xFF)
    bad_inner = b"$GPTXT,01,01,02,$X*00\r\n"  # XOR of the body is 0x31, not 0x00
    good = [
        _sentence(b"GNGGA,120000.00,,,,,0,00,99.99,,,,,,"),
        _sentence(b""),
        _sentence(b"GNGST,120000.00,1.0,,,,2.0,2.0,3.0", fmt=b"%02x"),
        _sentence(b"GNRMC,120000.00,V,,,,,,,010126,,,N,V", eol=b"\n"),
        longest,
        _sentence(b"AIVDM,1,1,,A,13u?etPv2;0n:dDPwUM1U1Cb069D,0", start=b"!"),
        _sentence(b"GNZDA,120000.00,01,01,2026,00,00"),
    ]
    stream = b"".join(
        [good[0], good[1], good[2], bad, good[3], too_long, good[4], bad_inner, good[5],
         _sentence(b"GPTXT,01", eol=b"\r"), good[6]]
    )  # fmt: skip
    frames, counters = _outcome(Framer(), [stream])
    assert [raw for raw, _ in frames] == good
    assert [off for _, off in frames] == [stream.index(g) for g in good]
    assert counters[5] == 3  # bad, bad_inner and the "$X*00" inside it
    malformed = len(too_long) + len(_sentence(b"GPTXT,01", eol=b"\r"))
    assert counters[7] == len(bad) + len(bad_inner) + malformed
    for chunk in (1, 2, 3, 7, 64, 255, 256, 257):
        chunks = [stream[k : k + chunk] for k in range(0, len(stream), chunk)]
        assert _outcome(Framer(), chunks) == _outcome(_OneByOne(), chunks) == (frames, counters)


def test_nmea_longest_sentence_cut_at_limit():
    """Framer accepts the longest sentence it allows however the stream is cut (STYLE rule 8)."""
    longest = _sentence(b"P" * (MAX_NMEA_SENTENCE - 3))
    whole = _outcome(Framer(), [longest])
    assert whole[1][1] == 1
    cut = [longest[:-2], longest[-2:]]  # the feed ends right after "*hh"
    assert _outcome(_OneByOne(), cut) == whole


def test_nmea_run_longer_than_one_batch_is_taken_whole(real_data):
    """All 4,661 sentences of the real u-blox NMEA extract come out, in order and at their offsets,
    though the run spans many _NMEA_RUN_BYTES batches (counts from PROVENANCE.md)."""
    data = (real_data / "nmea" / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes()
    assert len(data) > 10 * _NMEA_RUN_BYTES
    frames, counters = _outcome(Framer(), [data])
    assert len(frames) == counters[1] == 4661  # PROVENANCE.md: 4,661 sentences, all valid
    assert b"".join(raw for raw, _ in frames if isinstance(raw, bytes)) == data
    assert counters[7] == 0
    cuts = _cut(data, list(range(997, len(data), 997)))
    assert _outcome(Framer(), cuts) == (frames, counters)


@pytest.mark.parametrize(
    ("name", "good", "bad"),
    [
        # PROVENANCE.md: "Three sentences. Two have bad checksums and one is a valid GNRMC."
        ("pynmeagps_pygpsdata-nmeabadck.log", 1, 2),
        # PROVENANCE.md: 26 sentences, all checksums valid.
        ("pygnssutils_pygpsdata-nmea.log", 26, 0),
    ],
)
def test_nmea_run_real_capture_counts(real_data, name, good, bad):
    """The run path finds the good and bad sentences PROVENANCE.md counts, fed whole or bytewise."""
    data = (real_data / "nmea" / name).read_bytes()
    whole = _outcome(Framer(), [data])
    assert whole[1][1] == good
    assert whole[1][5] == bad
    bytewise = [data[k : k + 1] for k in range(len(data))]
    assert _outcome(Framer(), bytewise) == _outcome(_OneByOne(), bytewise) == whole


_PRINTABLE = st.sampled_from(list(b"$!*,.AGNPSVZ019 ~"))
_EOL = st.sampled_from([b"\r\n", b"\r\n", b"\n", b"\r", b"", b"\r\r\n", b"\n\r"])


@st.composite
def _nmea_piece(draw: st.DrawFn) -> bytes:
    """A sentence: good, bad checksum, non-hex, odd line ending, near the length limit, or a
    random byte overwritten."""
    pattern = bytes(draw(st.lists(_PRINTABLE, min_size=1, max_size=6)))
    # Short bodies, or the longest the framer accepts ("*hh" ends MAX_NMEA_SENTENCE bytes after
    # the start character) and one shorter or longer.
    n = draw(
        st.one_of(st.integers(0, 80), st.integers(MAX_NMEA_SENTENCE - 4, MAX_NMEA_SENTENCE - 2))
    )
    body = (pattern * (n // len(pattern) + 1))[:n]
    out = bytearray(
        _sentence(
            body,
            start=draw(st.sampled_from([b"$", b"$", b"!"])),
            eol=draw(_EOL),
            fmt=draw(st.sampled_from([b"%02X", b"%02x"])),
        )
    )
    kind = draw(st.integers(0, 9))
    star = out.rindex(b"*")
    if kind == 0:  # wrong checksum, still hex
        out[star + 2] = ord("0") if out[star + 2] != ord("0") else ord("1")
    elif kind == 1:  # not hex
        out[star + 1] = ord("G")
    elif kind == 2:  # any byte anywhere
        out[draw(st.integers(0, len(out) - 1))] = draw(st.integers(0, 255))
    return bytes(out)


@st.composite
def _rtcm_piece(draw: st.DrawFn) -> bytes:
    n = draw(st.integers(0, 30))
    if n == 0:
        return bytes.fromhex("D3000047EA4B")  # keep-alive
    frame = bytearray(frame_rtcm(bytes((0x43, 0xD0)) + draw(st.binary(min_size=n, max_size=n))))
    if draw(st.integers(0, 9)) == 0:
        frame[-1] ^= 0x01  # CRC no longer matches
    return bytes(frame)


_JUNK = st.lists(st.sampled_from(list(b"\xd3$!*\r\n0A\x00\xff")), min_size=1, max_size=5).map(bytes)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(
        st.one_of(_nmea_piece(), _nmea_piece(), _rtcm_piece(), _JUNK), min_size=1, max_size=25
    ),
    st.lists(st.integers(0, 10_000), max_size=10),
    st.booleans(),
)
def test_nmea_run_path_equals_one_by_one(pieces, cuts, bytewise):
    """For any mix of good and bad sentences, RTCM frames and junk, cut anywhere, the run path
    gives the frames, offsets and counters of the one-by-one path (reference: ``_OneByOne``)."""
    data = b"".join(pieces)
    chunks = [data[k : k + 1] for k in range(len(data))] if bytewise else _cut(data, cuts)
    assert _outcome(Framer(), chunks) == _outcome(_OneByOne(), chunks)
