"""Vectorised MSB-first bit packing and batched RTCM 3 framing, planned once and reused.

RTCM 3 fields are MSB-first; a signed ``intN`` field is sent as its ``N``-bit two's complement
pattern (RTCM 10403.3 §3.3, Table 3.3-1). A :class:`PackPlan` fixes the width of every field of a
run of messages: each field is shifted to the top of a 64-bit word (which drops the sign
extension of negative codes), then right by its bit offset in the big-endian 64-bit word that
holds its first bit; fields sharing a word are merged with one ``bitwise_or.reduceat``, and the
low bits of fields that straddle two words go into the next word. Every message is zero-padded
to a whole byte, as ``BitWriter.to_bytes`` does.

A :class:`FramePlan` wraps those messages in the RTCM 10403.3 §4 transport frame (preamble 0xD3,
6 reserved zero bits, 10-bit length, message, CRC-24Q). CRC-24Q (initial value 0, no final XOR) is
linear over GF(2), so a frame's CRC is the XOR, over its bytes, of the CRC of that byte followed by
as many zero bytes as stand after it in the frame; those are tabulated once (``_crc.crc24q_table``,
shared with the framer's check) and all CRCs of a plan are one gather plus one
``bitwise_xor.reduceat``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._crc import RTCM_MAX_PAYLOAD, RTCM_PREAMBLE, crc24q_table

__all__ = ["FramePlan", "PackPlan", "plan_frames", "plan_packing"]

_IDX = npt.NDArray[np.intp]
_U64 = npt.NDArray[np.uint64]


@dataclass(frozen=True, slots=True, kw_only=True)
class PackPlan:
    """Where each of ``ne`` fields lands; :meth:`pack` then costs a fixed handful of numpy calls."""

    #: 64 − width per field: left-aligns the field (and drops two's complement sign bits).
    lsh: _U64
    #: Bit offset of the field in its first 64-bit word.
    rsh: _U64
    #: First field of each run of fields sharing a word, and that word.
    first: _IDX
    first_word: _IDX
    #: Fields that straddle two words, the left shift of their low bits, and the second word.
    spill: _IDX
    spill_lsh: _U64
    spill_word: _IDX
    nwords: int
    #: Bytes of each message (after padding) and of all of them.
    msg_bytes: _IDX
    nbytes: int

    def pack(self, values: npt.NDArray[np.int64] | _U64) -> bytes:
        """The messages' bytes, end to end; ``values`` must fit their widths (two's complement)."""
        top = values.view(np.uint64) << self.lsh
        words = np.zeros(self.nwords, np.uint64)
        words[self.first_word] = np.bitwise_or.reduceat(top >> self.rsh, self.first)
        if self.spill.shape[0]:
            words[self.spill_word] |= top[self.spill] << self.spill_lsh
        return words.astype(">u8").tobytes()[: self.nbytes]


def plan_packing(widths: npt.NDArray[np.int64], msg_fields: _IDX) -> PackPlan:
    """Plan fields of ``widths`` bits (1…64), ``msg_fields[m]`` of them for message ``m`` in turn."""
    w = widths.astype(np.int64)
    if w.shape[0] == 0 or int(msg_fields.sum()) != w.shape[0] or (w < 1).any() or (w > 64).any():
        raise ValueError("field widths must be 1…64 bits and add up to the messages' fields")
    end = np.cumsum(w)
    msg_end = end[np.cumsum(msg_fields) - 1]
    msg_bits = msg_end - np.concatenate(([0], msg_end[:-1]))
    msg_bytes = (msg_bits + 7) // 8
    pad = msg_bytes * 8 - msg_bits
    start = end - w + np.repeat(np.cumsum(pad) - pad, msg_fields)
    word = start >> 6
    r = start & 63
    new = np.ones(word.shape[0], np.bool_)
    new[1:] = word[1:] != word[:-1]
    first = np.flatnonzero(new)
    spill = np.flatnonzero(r + w > 64)
    return PackPlan(
        lsh=(64 - w).astype(np.uint64),
        rsh=r.astype(np.uint64),
        first=first,
        first_word=word[first],
        spill=spill,
        spill_lsh=(64 - r[spill]).astype(np.uint64),
        spill_word=word[spill] + 1,
        nwords=int(word[-1]) + 2,
        msg_bytes=msg_bytes.astype(np.intp),
        nbytes=int(msg_bytes.sum()),
    )


@dataclass(frozen=True, slots=True, kw_only=True)
class FramePlan:
    """Frames for messages of fixed lengths laid end to end (see :func:`plan_frames`)."""

    #: Frames without their CRC, end to end, preamble and length bytes already set.
    template: npt.NDArray[np.uint8]
    #: Template index of every message byte.
    payload_at: _IDX
    #: CRC table row (bytes after it in its frame) of every template byte.
    crc_row: _IDX
    #: Template index of each frame's first byte, and (start, end) of each frame.
    start: _IDX
    bounds: tuple[tuple[int, int], ...]

    def frame(self, payload: bytes) -> list[bytes]:
        """Each message of ``payload`` in its own frame, as ``_crc.frame_rtcm`` gives it."""
        raw = self.template.copy()
        raw[self.payload_at] = np.frombuffer(payload, np.uint8)
        crcs = np.bitwise_xor.reduceat(crc24q_table()[self.crc_row, raw], self.start).tolist()
        data = raw.tobytes()
        return [
            data[a:b] + crc.to_bytes(3, "big")
            for (a, b), crc in zip(self.bounds, crcs, strict=True)
        ]


def plan_frames(msg_bytes: _IDX) -> FramePlan:
    """Plan RTCM 10403.3 §4 frames (Table 4-1) for messages of ``msg_bytes`` bytes each."""
    lens = msg_bytes.astype(np.intp)
    if lens.shape[0] == 0:
        raise ValueError("no message to frame")
    if int(lens.max()) > RTCM_MAX_PAYLOAD:
        raise ValueError(f"RTCM message too long: {int(lens.max())} > {RTCM_MAX_PAYLOAD} bytes")
    covered = lens + 3
    start = np.cumsum(covered) - covered
    end = start + covered
    template = np.zeros(int(covered.sum()), np.uint8)
    template[start] = RTCM_PREAMBLE
    template[start + 1] = lens >> 8  # 6 reserved zero bits, then the top 2 bits of the length
    template[start + 2] = lens & 0xFF
    template.setflags(write=False)
    msg_of_byte = np.repeat(np.arange(lens.shape[0]), lens)
    return FramePlan(
        template=template,
        payload_at=np.arange(int(lens.sum())) + 3 * (msg_of_byte + 1),
        crc_row=np.repeat(end - 1, covered) - np.arange(template.shape[0]),
        start=start,
        bounds=tuple(zip(start.tolist(), end.tolist(), strict=True)),
    )
