"""Vectorised bit packing and batched RTCM framing agree with the scalar BitWriter and frame_rtcm."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers._bitio import BitWriter
from ionwarden.parsers._bitpack import plan_frames, plan_packing
from ionwarden.parsers._crc import crc24q, crc24q_table, frame_rtcm

_FIELD = st.integers(1, 64).flatmap(
    lambda w: st.tuples(st.just(w), st.integers(-(1 << (w - 1)), (1 << w) - 1))
)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(_FIELD, min_size=1, max_size=40), min_size=1, max_size=6))
def test_pack_plan_matches_bitwriter(messages):
    """PackPlan.pack gives BitWriter's bytes per message, end to end (RTCM 10403.3 §3.3 MSB-first, two's complement)."""
    want = b""
    for fields in messages:
        w = BitWriter()
        for width, value in fields:
            w.s(width, value) if value < 0 else w.u(width, value)
        want += w.to_bytes()
    flat = [f for fields in messages for f in fields]
    plan = plan_packing(
        np.array([f[0] for f in flat], np.int64), np.array([len(m) for m in messages], np.intp)
    )
    values = np.array([v & ((1 << 64) - 1) for _, v in flat], np.uint64)
    assert plan.pack(values) == want
    assert plan.msg_bytes.tolist() == [(sum(f[0] for f in m) + 7) // 8 for m in messages]


def test_pack_plan_rejects_bad_widths():
    """plan_packing raises ValueError for a width outside 1…64 or field counts that do not add up."""
    with pytest.raises(ValueError, match="1…64"):
        plan_packing(np.array([0, 8], np.int64), np.array([2], np.intp))
    with pytest.raises(ValueError, match="1…64"):
        plan_packing(np.array([65], np.int64), np.array([1], np.intp))
    with pytest.raises(ValueError, match="add up"):
        plan_packing(np.array([8, 8], np.int64), np.array([1], np.intp))


def test_crc24q_table_rows_are_crcs_of_byte_and_zeros():
    """crc24q_table()[k, b] is CRC-24Q of b followed by k zero bytes (RTCM 10403.3 §4.2, linearity)."""
    table = crc24q_table()
    assert table.shape == (1029, 256)  # a whole frame: 3 + 1023 + 3 bytes (RTCM 10403.3 Table 4-1)
    for k in (0, 1, 2, 57, 1025, 1028):
        for b in (0, 1, 0x80, 0xD3, 0xFF):
            assert int(table[k, b]) == crc24q(bytes((b,)) + bytes(k))


@settings(max_examples=100, deadline=None)
@given(st.lists(st.binary(min_size=0, max_size=1023), min_size=1, max_size=5))
def test_frame_plan_matches_frame_rtcm(payloads):
    """FramePlan.frame gives frame_rtcm's frames for messages laid end to end (RTCM 10403.3 Table 4-1)."""
    plan = plan_frames(np.array([len(p) for p in payloads], np.intp))
    assert plan.frame(b"".join(payloads)) == [frame_rtcm(p) for p in payloads]


def test_frame_plan_rejects_long_or_no_message():
    """plan_frames raises ValueError past the 1023-byte length field (RTCM 10403.3 Table 4-1) or for none."""
    with pytest.raises(ValueError, match="too long"):
        plan_frames(np.array([10, 1024], np.intp))
    with pytest.raises(ValueError, match="no message"):
        plan_frames(np.array([], np.intp))
