"""RTCM 3 station messages 1005/1006 and descriptors 1007/1008/1033: pyrtcm cross-check on every
real message, encoder round trip, error paths."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from pyrtcm import RTCMReader

from ionwarden.parsers import ParseError
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._rtcm_eph_encode import encode_1005
from ionwarden.parsers._rtcm_misc import DECODERS, DecodeContext
from ionwarden.parsers._rtcm_station import ReceiverDescriptor, StationReference

from .test_rtcm_eph import frames_of

STATION_FRAMES = frames_of((1005, 1006, 1007, 1008, 1033))
CTX = DecodeContext()


def test_real_files_hold_station_messages() -> None:
    """The captures hold the 1005/1006/1033 counts listed in PROVENANCE.md."""
    counts: dict[int, int] = {}
    for _, mt, _, _ in STATION_FRAMES:
        counts[mt] = counts.get(mt, 0) + 1
    # PROVENANCE.md: 1005 ×158 (rtcm3.log) + 1 (MIXED) + 1 (USCL; BADCRC's 1005 is corrupt);
    # 1006 ×97 + 7 + 1 + 8; 1033 ×97 + 7 + 1 + 8; 1007 ×1; 1008 ×1 + 8.
    assert counts == {1005: 160, 1006: 113, 1007: 1, 1008: 9, 1033: 113}


def test_decode_station_equals_pyrtcm() -> None:
    """1005/1006 decode to pyrtcm's ARP, flags and antenna height (pyrtcm decode)."""
    n = 0
    for _, mt, body, frame in STATION_FRAMES:
        if mt not in (1005, 1006):
            continue
        ref = RTCMReader.parse(frame).__dict__  # pyrtcm decode
        st_ = DECODERS[mt](body, CTX)
        assert isinstance(st_, StationReference)
        assert st_.station_id == ref["DF003"]
        assert st_.itrf_year == ref["DF021"]
        assert (st_.gps, st_.glonass, st_.galileo) == (
            bool(ref["DF022"]),
            bool(ref["DF023"]),
            bool(ref["DF024"]),
        )
        assert st_.non_physical == bool(ref["DF141"])
        assert st_.single_oscillator == bool(ref["DF142"])
        assert st_.quarter_cycle == ref["DF364"]
        assert (st_.x_m, st_.y_m, st_.z_m) == (ref["DF025"], ref["DF026"], ref["DF027"])
        assert st_.antenna_height_m == (ref["DF028"] if mt == 1006 else None)
        n += 1
    assert n == 273


def _chars(ref: dict[str, object], df: str) -> str:
    """pyrtcm splits DF030/DF033/DF228/… into one attribute per character."""
    keys = sorted(k for k in ref if k.startswith(df + "_"))
    return "".join(str(ref[k]) for k in keys).strip()


def test_decode_descriptors_equal_pyrtcm() -> None:
    """1007/1008/1033 strings and ids equal pyrtcm's characters (pyrtcm decode)."""
    for _, mt, body, frame in STATION_FRAMES:
        if mt not in (1007, 1008, 1033):
            continue
        ref = RTCMReader.parse(frame).__dict__  # pyrtcm decode
        d = DECODERS[mt](body, CTX)
        assert isinstance(d, ReceiverDescriptor)
        assert d.station_id == ref["DF003"]
        assert d.antenna_descriptor == _chars(ref, "DF030")
        assert d.antenna_setup_id == ref["DF031"]
        assert d.antenna_serial == _chars(ref, "DF033")
        assert d.receiver_type == _chars(ref, "DF228")
        assert d.receiver_firmware == _chars(ref, "DF230")
        assert d.receiver_serial == _chars(ref, "DF232")


def test_decode_1033_names_real_receivers() -> None:
    """1033 gives the receiver and antenna names recorded in PROVENANCE.md."""
    seen = {
        (d.antenna_descriptor, d.receiver_type)
        for _, mt, body, _ in STATION_FRAMES
        if mt == 1033 and isinstance(d := DECODERS[mt](body, CTX), ReceiverDescriptor)
    }
    # PROVENANCE.md: RTK134 "ADVNULLANTENNA"/"UNICORE"; ntrip_encode_none "LEIAR10 NONE"/
    # "TRIMBLE ALLOY"; USCL00CHL0 "SEPCHOKE_B3E6 SPKE"/"SEPT POLARX5".
    assert ("ADVNULLANTENNA", "UNICORE") in seen
    assert ("LEIAR10         NONE", "TRIMBLE ALLOY") in seen
    assert ("SEPCHOKE_B3E6   SPKE", "SEPT POLARX5") in seen


def test_encode_1005_reproduces_real_messages() -> None:
    """encode_1005 of a decoded real 1005/1006 gives back the original bytes (pyrtcm files)."""
    for _, mt, body, _ in STATION_FRAMES:
        if mt in (1005, 1006):
            st_ = DECODERS[mt](body, CTX)
            assert isinstance(st_, StationReference)
            assert encode_1005(st_) == body


@given(
    station_id=st.integers(0, 4095),
    x=st.floats(-1.3e7, 1.3e7),
    y=st.floats(-1.3e7, 1.3e7),
    z=st.floats(-1.3e7, 1.3e7),
    height=st.one_of(st.none(), st.floats(0, 6.5535)),
    flags=st.tuples(*[st.booleans()] * 5),
    quarter=st.integers(0, 3),
)
def test_encode_1005_round_trips(station_id, x, y, z, height, flags, quarter) -> None:
    """decode(encode(station)) is within one 0.1 mm LSB (RTCM 10403.3 DF025–DF028)."""
    src = StationReference(
        message=1005 if height is None else 1006,
        station_id=station_id,
        itrf_year=0,
        gps=flags[0],
        glonass=flags[1],
        galileo=flags[2],
        non_physical=flags[3],
        single_oscillator=flags[4],
        quarter_cycle=quarter,
        x_m=x,
        y_m=y,
        z_m=z,
        antenna_height_m=height,
    )
    frame = frame_rtcm(encode_1005(src))
    out = DECODERS[src.message](frame[3:-3], CTX)
    assert isinstance(out, StationReference)
    for a, b in ((out.x_m, x), (out.y_m, y), (out.z_m, z)):
        assert abs(a - b) <= 0.5e-4 + 1e-9
    if height is None:
        assert out.antenna_height_m is None
    else:
        assert out.antenna_height_m is not None
        assert abs(out.antenna_height_m - height) <= 0.5e-4 + 1e-9
    assert (out.station_id, out.quarter_cycle, out.gps, out.non_physical) == (
        station_id,
        quarter,
        flags[0],
        flags[3],
    )
    ref = RTCMReader.parse(frame).__dict__  # pyrtcm decode of our encoding
    assert ref["DF003"] == station_id


def test_decode_descriptor_rejects_overrun_string() -> None:
    """decode_descriptor raises ParseError when a character counter overruns the message."""
    body = next(b for _, m, b, _ in STATION_FRAMES if m == 1033)
    with pytest.raises(ParseError, match="DF030") as info:
        DECODERS[1033](body[:10], CTX)
    assert info.value.message_id == 1033


def test_decode_1006_rejects_short_body() -> None:
    """decode_1006 raises ParseError for a body shorter than 168 bits (RTCM 10403.3 1006)."""
    body = next(b for _, m, b, _ in STATION_FRAMES if m == 1006)
    with pytest.raises(ParseError, match="too short"):
        DECODERS[1006](body[:20], CTX)
