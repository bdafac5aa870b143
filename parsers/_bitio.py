"""Scalar big-endian bit packing for RTCM 3 headers and ephemeris messages.

RTCM 3 fields are MSB-first, two's complement for signed ``intN`` types (RTCM 10403.3 §3.3, Table
3.3-1 "Data types"); a few fields (DF011-style sign-magnitude ``intSN``, used by GLONASS ephemeris)
are sign-magnitude. The MSM cell blocks are decoded with numpy elsewhere; this is for the scalar parts.
"""

from __future__ import annotations

__all__ = ["BitReader", "BitWriter"]


class BitReader:
    """Reads MSB-first bit fields from a byte string."""

    __slots__ = ("_data", "_nbits", "pos")

    def __init__(self, data: bytes, pos: int = 0) -> None:
        self._data = int.from_bytes(data, "big")
        self._nbits = len(data) * 8
        self.pos = pos

    @property
    def remaining(self) -> int:
        return self._nbits - self.pos

    def u(self, n: int) -> int:
        """Unsigned n-bit field (uintN)."""
        if n == 0:
            return 0
        if self.pos + n > self._nbits:
            raise EOFError(f"need {n} bits at bit {self.pos}, have {self._nbits - self.pos}")
        shift = self._nbits - self.pos - n
        self.pos += n
        return (self._data >> shift) & ((1 << n) - 1)

    def s(self, n: int) -> int:
        """Two's complement n-bit field (intN)."""
        v = self.u(n)
        return v - (1 << n) if v >> (n - 1) else v

    def sm(self, n: int) -> int:
        """Sign-magnitude n-bit field (intSN: MSB is the sign)."""
        v = self.u(n)
        mag = v & ((1 << (n - 1)) - 1)
        return -mag if v >> (n - 1) else mag

    def skip(self, n: int) -> None:
        self.u(n) if n else None


class BitWriter:
    """Appends MSB-first bit fields; ``to_bytes`` pads the last byte with zeros."""

    __slots__ = ("_acc", "nbits")

    def __init__(self) -> None:
        self._acc = 0
        self.nbits = 0

    def u(self, n: int, value: int) -> BitWriter:
        if value < 0 or value >> n:
            raise ValueError(f"{value} does not fit in uint{n}")
        self._acc = (self._acc << n) | value
        self.nbits += n
        return self

    def s(self, n: int, value: int) -> BitWriter:
        lo, hi = -(1 << (n - 1)), (1 << (n - 1)) - 1
        if not lo <= value <= hi:
            raise ValueError(f"{value} does not fit in int{n}")
        return self.u(n, value & ((1 << n) - 1))

    def sm(self, n: int, value: int) -> BitWriter:
        if abs(value) >> (n - 1):
            raise ValueError(f"{value} does not fit in intS{n}")
        return self.u(n, ((1 << (n - 1)) if value < 0 else 0) | abs(value))

    def to_bytes(self) -> bytes:
        pad = (-self.nbits) % 8
        return (self._acc << pad).to_bytes((self.nbits + pad) // 8, "big")
