"""Framer: RTCM frames sent back to back are CRC-checked as one run; outcomes as frame by frame."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.parsers._crc import crc24q, frame_rtcm
from ionwarden.parsers._framer import Framer, RtcmFrame, _crc_run


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
