"""CRC-24Q and RTCM 3 transport-layer framing (RTCM 10403.3 §4, Table 4-1).

Frame: preamble 0xD3, 6 reserved bits (0), 10-bit message length (0…1023 bytes), the message, then
a 24-bit CRC (Qualcomm CRC-24Q, polynomial 0x1864CFB, initial value 0) over preamble, length and
message.
"""

from __future__ import annotations

from functools import cache

import numpy as np
import numpy.typing as npt

__all__ = [
    "RTCM_MAX_FRAME",
    "RTCM_MAX_PAYLOAD",
    "RTCM_PREAMBLE",
    "crc24q",
    "crc24q_table",
    "frame_rtcm",
]

RTCM_PREAMBLE = 0xD3
#: 10-bit length field (RTCM 10403.3 Table 4-1).
RTCM_MAX_PAYLOAD = 1023
#: Preamble + length (3 bytes), the largest message and the CRC (RTCM 10403.3 Table 4-1).
RTCM_MAX_FRAME = 3 + RTCM_MAX_PAYLOAD + 3
_POLY = 0x1864CFB


def _make_table() -> tuple[int, ...]:
    table = []
    for i in range(256):
        crc = i << 16
        for _ in range(8):
            crc <<= 1
            if crc & 0x1000000:
                crc ^= _POLY
        table.append(crc & 0xFFFFFF)
    return tuple(table)


_TABLE = _make_table()


@cache
def crc24q_table() -> npt.NDArray[np.uint32]:
    """``table[k, b]`` = CRC-24Q of byte ``b`` followed by ``k`` zero bytes, for k < RTCM_MAX_FRAME.

    CRC-24Q (initial value 0, no final XOR) is linear over GF(2), so the CRC of a run of bytes is the
    XOR of each byte's row ``k`` = number of bytes after it: one gather and one XOR-reduce per frame
    (the framer's check and the batched encoders share this one 1 MiB table).
    """
    step = np.array(_TABLE, np.uint32)
    table = np.empty((RTCM_MAX_FRAME, 256), np.uint32)
    table[0] = step
    for k in range(1, RTCM_MAX_FRAME):
        prev = table[k - 1]
        table[k] = ((prev << 8) & 0xFFFFFF) ^ step[prev >> 16]
    table.setflags(write=False)
    return table


def crc24q(data: bytes | bytearray | memoryview) -> int:
    """CRC-24Q of ``data`` (RTCM 10403.3 §4.2)."""
    crc = 0
    table = _TABLE
    for byte in bytes(data):
        crc = ((crc << 8) & 0xFFFFFF) ^ table[(crc >> 16) ^ byte]
    return crc


def frame_rtcm(payload: bytes) -> bytes:
    """Wrap one RTCM 3 message in preamble, length and CRC."""
    if len(payload) > RTCM_MAX_PAYLOAD:
        raise ValueError(f"RTCM message too long: {len(payload)} > {RTCM_MAX_PAYLOAD} bytes")
    head = bytes((RTCM_PREAMBLE, len(payload) >> 8, len(payload) & 0xFF))
    crc = crc24q(head + payload)
    return head + payload + crc.to_bytes(3, "big")
