"""Property tests: any bytes, and real frames with mutated payloads, give messages and counters only."""

from __future__ import annotations

from functools import cache

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ionwarden.parsers import GpsTime
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._framer import MAX_INCOMPLETE_FRAME, Framer, RtcmFrame
from ionwarden.parsers._stream import MAX_HELD_EPOCHS, StreamDecoder
from tests.conftest import REAL_DATA

_REF = GpsTime(2328, 76_000.0)


@cache
def _real_payloads() -> tuple[bytes, ...]:
    """One payload of every RTCM type found in the real captures (../shared/data/real/rtcm)."""
    seen: dict[int, bytes] = {}
    for path in sorted((REAL_DATA / "rtcm").iterdir()):
        framer = Framer()
        for f in framer.feed(path.read_bytes()):
            if isinstance(f, RtcmFrame):
                seen.setdefault(f.msg_type, f.payload)
    return tuple(seen[t] for t in sorted(seen))


def _check_bounded(dec: StreamDecoder) -> None:
    stats = dec.statistics()
    assert stats.epochs_waiting <= MAX_HELD_EPOCHS + 1
    assert len(dec._framer._buf) <= MAX_INCOMPLETE_FRAME


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=4000), st.booleans())
def test_stream_arbitrary_bytes_never_raise(data, with_reference):
    """StreamDecoder returns messages and counters only, for any bytes, with bounded buffers."""
    dec = StreamDecoder(reference_time=_REF if with_reference else None)
    dec.feed(data)
    _check_bounded(dec)
    dec.feed(b"")
    assert dec.statistics().framer.bytes_total == len(data)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.data(),
    st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 255)), min_size=1, max_size=8),
    st.integers(-40, 40),
)
def test_stream_mutated_real_frames_never_raise(data, flips, length_change):
    """StreamDecoder counts, never raises, when real frames (every type in the captures) carry mutated payloads with valid CRC."""
    payloads = _real_payloads()
    payload = bytearray(data.draw(st.sampled_from(payloads)))
    for pos, value in flips:
        payload[pos % len(payload)] = value
    if length_change < 0:
        payload = payload[: max(2, len(payload) + length_change)]
    else:
        payload += bytes(length_change)
    dec = StreamDecoder(reference_time=_REF)
    # The mutated frame between good ones: it must not cost the neighbours.
    good = frame_rtcm(payloads[0])
    dec.feed(good + frame_rtcm(bytes(payload[:1023])) + good)
    dec.feed(b"")
    stats = dec.statistics()
    assert stats.framer.rtcm_frames == 3
    _check_bounded(dec)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=5000), min_size=1, max_size=30))
def test_stream_chunking_does_not_change_output(cuts):
    """StreamDecoder gives the same messages for any chunking of the u-blox NMEA+UBX+RTCM capture (pygpsdata-rtcm3.log)."""
    data = _ublox_sample()

    def summary(msgs):
        return [
            (type(m).__name__, getattr(m, "time", None), len(getattr(m, "sat", ()))) for m in msgs
        ]

    whole = StreamDecoder()
    expected = summary(whole.feed(data) + whole.feed(b""))
    dec = StreamDecoder()
    got, pos = [], 0
    for c in [*cuts, len(data)]:
        if data[pos : pos + c]:
            got += dec.feed(data[pos : pos + c])
        pos += c
    got += dec.feed(b"")
    assert summary(got) == expected
    assert dec.statistics().epochs == whole.statistics().epochs > 0


@cache
def _ublox_sample() -> bytes:
    return (REAL_DATA / "rtcm" / "pygnssutils_pygpsdata-rtcm3.log").read_bytes()[:40_000]
