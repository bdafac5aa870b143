"""StreamDecoder reuses decoded values of repeated (byte-identical) ephemeris messages."""

from __future__ import annotations

from ionwarden.parsers import KeplerEphemeris, StreamDecoder
from ionwarden.parsers._framer import Framer, RtcmFrame


def test_stream_repeated_ephemeris_payload_decodes_once(real_data) -> None:
    """StreamDecoder returns the same immutable value when a receiver repeats a 1019 byte for byte,
    and equal values to a fresh decoder (pygnssutils_ntrip_encode_none.bin: 1019 each second)."""
    data = (real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes()
    framer = Framer()
    frames = [f for f in framer.feed(data) if isinstance(f, RtcmFrame) and f.msg_type == 1019]
    frame_bytes = data[frames[0].offset : frames[0].offset + len(frames[0].payload) + 6]
    dec = StreamDecoder()
    first = [m for m in dec.feed(frame_bytes) if isinstance(m, KeplerEphemeris)]
    second = [m for m in dec.feed(frame_bytes) if isinstance(m, KeplerEphemeris)]
    assert len(first) == len(second) == 1
    assert second[0] is first[0]
    fresh = [m for m in StreamDecoder().feed(frame_bytes) if isinstance(m, KeplerEphemeris)]
    assert fresh[0] == first[0]
