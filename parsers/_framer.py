"""Sans-IO framer for one receiver byte stream that interleaves NMEA 0183, RTCM 3 and vendor binary.

``Framer.feed(data)`` takes bytes in arbitrary chunks and returns the complete, checked frames found
so far: :class:`RtcmFrame` (RTCM 10403.3 §4 transport layer: 0xD3, 6 reserved zero bits, 10-bit
length, message, CRC-24Q) and :class:`NmeaFrame` (NMEA 0183 §5.3: ``$`` or ``!``, printable ASCII,
``*hh`` XOR checksum, CR LF). Everything else (u-blox UBX, other vendor binary, line noise) is skipped
and counted. ``feed(b"")`` marks the end of the stream.

Resynchronisation: a candidate that fails (reserved bits set, CRC or checksum mismatch, malformed
sentence) is abandoned by ONE byte, never by its claimed length, so a false 0xD3 inside NMEA or binary
cannot swallow the next real frame. The price is latency, not loss: a false preamble holds the
frames behind it until its claimed length (at most 1029 bytes) has arrived and failed its CRC. The
scanner keeps its position between calls: bytes already searched are not searched again while more
data is awaited.

Runs: a receiver sends its frames back to back, so both kinds are taken a run at a time. From an
RTCM candidate the length fields lead to the frames right behind it, and one batched CRC checks them
all. From a ``$``/``!`` candidate one regular expression matches the well-formed sentences right
behind it (printable run ending in ``*hh``, CR LF or bare LF, at most ``MAX_NMEA_SENTENCE`` bytes
before the line ending), and one ``np.bitwise_xor.reduceat`` over the whole sentences checks all
their checksums. The sentences of a run are taken in order, each with the outcome the one-by-one
path would give it (a frame, or a counted checksum failure); where that path would go on from a
``$``/``!`` inside a bad sentence, the run stops and the one-by-one path takes over. The frames,
offsets, counters and resynchronisation are the same as one by one for any input and any way of
cutting it into feeds. A sentence cut by the end of the buffer is never part of a run; it waits on
the one-by-one path, which remembers how far it has scanned.
"""

# size: ~540 lines: one scanner for interleaved NMEA, RTCM and vendor frames, its fast
# runs beside the general path they must equal (tests/test_framer*.py), resynchronisation included.
from __future__ import annotations

import enum
import re
from dataclasses import dataclass, field
from itertools import accumulate
from types import MappingProxyType
from typing import Final

import numpy as np
import numpy.typing as npt

from ._crc import crc24q_table
from ._errors import ParseError
from ._twin import slots_twin

__all__ = [
    "MAX_INCOMPLETE_FRAME",
    "MAX_NMEA_SENTENCE",
    "NEED_DATA",
    "Frame",
    "Framer",
    "FramerStatistics",
    "NeedData",
    "NmeaFrame",
    "RtcmFrame",
    "crc24q_fast",
]

_PREAMBLE: Final = 0xD3
#: RTCM 10403.3 Table 4-1: 3 header bytes + at most 1023 message bytes + 3 CRC bytes.
_RTCM_MAX_FRAME: Final = 3 + 1023 + 3
#: NMEA 0183 §5.3 caps a sentence at 82 characters; vendor sentences (Unicore "H" variants, PUBX)
#: run longer, so we accept up to 255 before declaring the candidate malformed.
MAX_NMEA_SENTENCE: Final = 255
#: Largest incomplete frame the framer ever holds while waiting for more bytes: the RTCM 3 maximum
#: frame (RTCM 10403.3 Table 4-1, 1029 bytes), which also covers the longest NMEA sentence we accept.
MAX_INCOMPLETE_FRAME: Final = _RTCM_MAX_FRAME


class NeedData(enum.Enum):
    """Sentinel type: the buffer holds no complete frame yet (STYLE rule 4)."""

    NEED_DATA = "NEED_DATA"


NEED_DATA: Final = NeedData.NEED_DATA


@dataclass(frozen=True, slots=True, kw_only=True)
class RtcmFrame:
    """One CRC-checked RTCM 3 message: ``payload`` excludes preamble, length and CRC."""

    msg_type: int
    payload: bytes
    #: Byte offset of the 0xD3 preamble in the stream.
    offset: int


@dataclass(frozen=True, slots=True, kw_only=True)
class NmeaFrame:
    """One checksum-verified NMEA 0183 sentence, ``$`` … ``*hh`` plus the line ending as received."""

    raw: bytes
    #: Byte offset of the ``$``/``!`` in the stream.
    offset: int


Frame = RtcmFrame | NmeaFrame

# Hot-path construction (~20 frames a second per station): the frozen dataclasses' generated
# ``__init__`` stores each field with ``object.__setattr__(self, name, value)``, which looks the
# slot up by name every time; these store the same values through the slot descriptors directly
# (about half the cost). Same type, same fields, equal values: tests/test_decode_shortcuts.py.
_NEW = object.__new__
_SET_TYPE = vars(RtcmFrame)["msg_type"].__set__
_SET_PAYLOAD = vars(RtcmFrame)["payload"].__set__
_SET_RTCM_OFFSET = vars(RtcmFrame)["offset"].__set__
_SET_RAW = vars(NmeaFrame)["raw"].__set__
_SET_NMEA_OFFSET = vars(NmeaFrame)["offset"].__set__


def _rtcm_frame(msg_type: int, payload: bytes, offset: int) -> RtcmFrame:
    """``RtcmFrame(msg_type=…, payload=…, offset=…)``, built field by field (see above)."""
    frame = _NEW(RtcmFrame)
    _SET_TYPE(frame, msg_type)
    _SET_PAYLOAD(frame, payload)
    _SET_RTCM_OFFSET(frame, offset)
    return frame


def _nmea_frame(raw: bytes, offset: int) -> NmeaFrame:
    """``NmeaFrame(raw=…, offset=…)``, built field by field (see above)."""
    frame = _NEW(NmeaFrame)
    _SET_RAW(frame, raw)
    _SET_NMEA_OFFSET(frame, offset)
    return frame


# Cheaper still where a run's frames are built in a loop (``Framer._rtcm_at``, ``_take_nmea_run``):
# plain stores into a twin with the same slots, whose class is then set to the frame's (see
# ``_twin``). Same type, same fields, equal values: tests/test_decode_twin_paths.py.
_RtcmFrameSlots = slots_twin(RtcmFrame)
_NmeaFrameSlots = slots_twin(NmeaFrame)


@dataclass(frozen=True, slots=True, kw_only=True)
class FramerStatistics:
    """Counters since the framer was created (all totals, never reset)."""

    rtcm_frames: int = 0
    nmea_frames: int = 0
    #: RTCM frames by message number.
    rtcm_by_type: MappingProxyType[int, int] = field(default_factory=lambda: MappingProxyType({}))
    #: Empty RTCM frames (length 0: the caster keep-alive ``D3 00 00 47 EA 4B``), 6 bytes each.
    rtcm_empty_frames: int = 0
    crc_failures: int = 0
    nmea_checksum_failures: int = 0
    #: Candidates that were still incomplete when the stream ended.
    truncated_at_eof: int = 0
    #: Bytes that were not part of any good frame (vendor binary, garbage, failed candidates).
    bytes_discarded: int = 0
    bytes_total: int = 0


# --- CRC-24Q, vectorised -------------------------------------------------------------------------
# _CRC_TAB[k, v] is the CRC-24Q of byte v followed by k zero bytes (see _crc.crc24q_table): one
# gather plus one XOR-reduce then checks a whole frame.
_CRC_TAB = crc24q_table()
_CRC_FLAT = _CRC_TAB.ravel()
# _CRC_ROW[_RTCM_MAX_FRAME - n:] gives (n-1-i)*256 for i = 0…n-1: the row of byte i in an n-byte run.
_CRC_ROW = (np.arange(_RTCM_MAX_FRAME - 1, -1, -1, dtype=np.intp) * 256).astype(np.intp)
#: Most bytes of back-to-back RTCM frames checked in one CRC batch beyond the first frame: a false
#: preamble costs at most this much more CRC work than checking its own claimed frame would.
_CRC_RUN_BYTES: Final = 4096


def crc24q_fast(data: bytes | bytearray | memoryview) -> int:
    """CRC-24Q of up to 1029 bytes (equal to ``_crc.crc24q``; a whole frame with its CRC gives 0)."""
    n = len(data)
    if n == 0:
        return 0
    if n > _RTCM_MAX_FRAME:
        raise ValueError(f"crc24q_fast handles at most {_RTCM_MAX_FRAME} bytes, got {n}")
    idx = _CRC_ROW[_RTCM_MAX_FRAME - n :] + np.frombuffer(data, np.uint8)
    return int(np.bitwise_xor.reduce(_CRC_FLAT[idx]))


#: Table rows and frame starts of a run of back-to-back frames, by the frames' lengths: a receiver
#: repeats the same messages with the same lengths second after second (MSM lengths change only
#: with the satellite and signal masks). Cleared when full.
_RUN_ROWS: dict[tuple[int, ...], tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]] = {}
_RUN_ROWS_SIZE: Final = 64


def _run_rows(lengths: tuple[int, ...]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """``_CRC_ROW`` rows of every byte of frames of these lengths laid end to end, and each frame's
    first byte (relative to the first frame): see :func:`_crc_run`."""
    hit = _RUN_ROWS.get(lengths)
    if hit is not None:
        return hit
    rows = np.concatenate([_CRC_ROW[_RTCM_MAX_FRAME - n :] for n in lengths])
    first = np.array([0, *accumulate(lengths[:-1])], np.intp)
    rows.setflags(write=False)
    first.setflags(write=False)
    if len(_RUN_ROWS) >= _RUN_ROWS_SIZE:
        _RUN_ROWS.clear()
    _RUN_ROWS[lengths] = rows, first
    return rows, first


def _crc_run(buf: bytearray, starts: list[int], end: int) -> list[int]:
    """CRC-24Q of frames laid end to end in ``buf``: ``starts[k]`` to the next start (or ``end``)."""
    ends = [*starts[1:], end]
    return _crc_lengths(buf, starts[0], [b - a for a, b in zip(starts, ends, strict=True)])


def _crc_lengths(buf: bytearray, s0: int, lengths: list[int]) -> list[int]:
    """CRC-24Q of frames laid end to end in ``buf`` from ``s0``, of these lengths (bytes).

    One gather and one XOR-reduce for the whole run (same table and sums as :func:`crc24q_fast`).
    """
    if len(lengths) == 1:  # one frame: fewer numpy calls
        n = lengths[0]
        idx = _CRC_ROW[_RTCM_MAX_FRAME - n :] + np.frombuffer(buf, np.uint8, n, s0)
        return [int(np.bitwise_xor.reduce(_CRC_FLAT.take(idx)))]
    rows, first = _run_rows(tuple(lengths))
    idx = rows + np.frombuffer(buf, np.uint8, rows.shape[0], s0)
    crcs: list[int] = np.bitwise_xor.reduceat(_CRC_FLAT.take(idx), first).tolist()
    return crcs


# NMEA 0183 §5.3: a sentence is printable ASCII (0x20–0x7E) between the start character and CR LF.
_SYNC = re.compile(rb"[\xd3$!]")
_NOT_PRINTABLE = re.compile(rb"[^\x20-\x7e]")
_HEX = frozenset(b"0123456789ABCDEFabcdef")


def _nmea_checksum(body: bytes | bytearray) -> int:
    """XOR of every byte between the start character and ``*`` (NMEA 0183 §5.3.1)."""
    return int(np.bitwise_xor.reduce(np.frombuffer(body, np.uint8))) if body else 0


# NMEA 0183 §5.3: sentences back to back, each the start character, printable ASCII ending in "*hh"
# (at most MAX_NMEA_SENTENCE bytes after the start character, as _nmea_at allows), then CR LF or a
# bare LF. A match holds complete sentences only; each one's "*" is the unique one before its "hh"
# and line ending, because the printable run cannot cross the CR or LF.
_NMEA_RUN = re.compile(
    rb"(?:[$!][\x20-\x7e]{0,%d}\*[0-9A-Fa-f]{2}\r?\n)+" % (MAX_NMEA_SENTENCE - 3)
)
#: Most bytes of back-to-back NMEA sentences matched and checksummed in one batch (a receiver's
#: second of NMEA is about 1 kB); a longer run is taken in several batches.
_NMEA_RUN_BYTES: Final = 4096


def _tail_table() -> dict[bytes, int]:
    """``"*hh"`` + line ending → XOR of those bytes with the checksum ``hh`` states.

    A sentence ``c body * h h EOL`` is good when XOR(body) = hh (NMEA 0183 §5.3.1), that is when
    the XOR of ALL its bytes equals ``c ^ table[tail]``: one XOR per whole sentence then checks it,
    and a sentence is never an empty segment (``reduceat`` gives ``a[i]``, not 0, for those).
    """
    table: dict[bytes, int] = {}
    for hi in _HEX:
        for lo in _HEX:
            digits = bytes((hi, lo))
            for eol in (b"\r\n", b"\n"):
                tail = b"*" + digits + eol
                x = int(digits, 16)
                for b in tail:
                    x ^= b
                table[tail] = x
    return table


_TAIL_XOR: Final = _tail_table()


class Framer:
    """Splits one byte stream into RTCM 3 and NMEA 0183 frames; see the module docstring."""

    __slots__ = (
        "_base",
        "_buf",
        "_by_type",
        "_counts",
        "_eof",
        "_nmea_resume",
        "_pos",
    )

    def __init__(self) -> None:
        self._buf = bytearray()
        self._pos = 0  # next index of _buf to scan; everything before it is consumed
        self._base = 0  # stream offset of _buf[0]
        self._eof = False
        self._nmea_resume = (-1, 0)  # (stream offset of a pending '$', printable up to offset)
        self._by_type: dict[int, int] = {}
        # rtcm, nmea, empty, crc_fail, nmea_fail, truncated, discarded, total
        self._counts = [0, 0, 0, 0, 0, 0, 0, 0]

    def feed(self, data: bytes | bytearray | memoryview) -> list[Frame]:
        """Add bytes and return every complete frame they finish; ``b""`` ends the stream.

        Bytes fed after the end of the stream raise :class:`ParseError`.
        """
        if self._eof:
            if not data:  # repeated EOF is harmless
                return []
            raise ParseError("data fed after end of stream", offset=self._base + len(self._buf))
        if not data:
            self._eof = True
        else:
            self._buf += data
            self._counts[7] += len(data)
        frames: list[Frame] = []
        self._scan(frames)
        # Drop consumed bytes; what remains is one incomplete candidate (≤ MAX_INCOMPLETE_FRAME).
        if self._pos:
            del self._buf[: self._pos]
            self._base += self._pos
            self._pos = 0
        return frames

    def statistics(self) -> FramerStatistics:
        c = self._counts
        return FramerStatistics(
            rtcm_frames=c[0],
            nmea_frames=c[1],
            rtcm_by_type=MappingProxyType(dict(self._by_type)),
            rtcm_empty_frames=c[2],
            crc_failures=c[3],
            nmea_checksum_failures=c[4],
            truncated_at_eof=c[5],
            bytes_discarded=c[6],
            bytes_total=c[7],
        )

    def totals(self) -> tuple[int, ...]:
        """The counters of :meth:`statistics` without its per-type table: (rtcm_frames,
        nmea_frames, rtcm_empty_frames, crc_failures, nmea_checksum_failures, truncated_at_eof,
        bytes_discarded, bytes_total). A station's status tick reads them every second; the
        table's copy and the frozen record are not needed there."""
        return tuple(self._counts)

    def _skip(self, n: int) -> None:
        self._pos += n
        self._counts[6] += n

    def _incomplete(self) -> NeedData | None:
        """Wait for more data, or at end of stream abandon the candidate by one byte."""
        if not self._eof:
            return NEED_DATA
        self._counts[5] += 1
        self._skip(1)
        return None

    def _scan(self, frames: list[Frame]) -> None:
        """Append every complete frame from the scan position on, until more data is needed."""
        buf = self._buf
        while True:
            pos = self._pos
            if pos < len(buf) and buf[pos] == _PREAMBLE:  # frames back to back: no search
                i = pos
            else:
                m = _SYNC.search(buf, pos)
                if m is None:
                    self._skip(len(buf) - pos)
                    return
                i = m.start()
                if i > pos:
                    self._skip(i - pos)
            if buf[i] == _PREAMBLE:
                if self._rtcm_at(i, frames) is NEED_DATA:
                    return
                continue
            if self._nmea_run(i, frames) is NEED_DATA:
                return

    def _rtcm_at(self, i: int, frames: list[Frame]) -> NeedData | None:
        """Take the RTCM candidate at ``i`` and the complete frames right behind it.

        A receiver sends RTCM frames back to back: following the length fields from ``i`` finds
        them, and one batched CRC covers the run. Frames are then taken in order up to the first
        bad CRC, exactly as one-by-one checking would (the scan resumes there).
        """
        buf = self._buf
        size = len(buf)
        if size - i < 3:
            return self._incomplete()
        # RTCM 10403.3 Table 4-1: 6 reserved bits (zero) then the 10-bit message length.
        if buf[i + 1] & 0xFC:
            self._skip(1)
            return None
        end = i + 6 + (((buf[i + 1] & 0x03) << 8) | buf[i + 2])
        if size < end:
            return self._incomplete()
        lengths = [end - i]  # of the frames of the run, back to back from i
        p = end
        limit = min(size, end + _CRC_RUN_BYTES)
        while p + 3 <= limit and buf[p] == _PREAMBLE:
            h = buf[p + 1]
            if h & 0xFC:  # reserved bits set: not a frame
                break
            q = p + 6 + ((h << 8) | buf[p + 2])  # h is the length's top 2 bits alone
            if q > limit:
                break
            lengths.append(q - p)
            p = q
        crcs = _crc_lengths(buf, i, lengths)
        if crcs[0] != 0:
            self._counts[3] += 1
            self._skip(1)  # resync by one byte, never by the claimed length
            return None
        # _accept of each good frame in order, inlined for messages (what a receiver sends): the
        # same payloads, frames, counters and scan position; keep-alives and 1-byte messages go
        # through _accept itself (from the frame's start). The scan resumes at the first bad CRC
        # and rejects it there. Payloads are cut from one copy of the run's bytes.
        by_type, base = self._by_type, self._base
        run = bytes(buf[i:p])
        a = taken = 0  # a: the frame's start in ``run``
        for n, crc in zip(lengths, crcs, strict=True):
            if crc != 0:
                break
            b = a + n
            if n < 8:  # message length 0 or 1
                self._pos = i + a
                self._accept(i + a, i + b, frames)
                a = b
                continue
            payload = run[a + 3 : b - 3]
            msg_type = (payload[0] << 4) | (payload[1] >> 4)
            by_type[msg_type] = by_type.get(msg_type, 0) + 1
            frame = _RtcmFrameSlots()
            frame.msg_type = msg_type
            frame.payload = payload
            frame.offset = base + i + a
            frame.__class__ = RtcmFrame
            frames.append(frame)
            taken += 1
            a = b
        # After the last frame taken (_accept moved the scan itself when that one was its).
        if i + a > self._pos:  # noqa: PLR1730 - a compare is cheaper than a call to max()
            self._pos = i + a
        self._counts[0] += taken
        return None

    def _accept(self, i: int, end: int, frames: list[Frame]) -> None:
        """The CRC-good frame ``buf[i:end]``: a message, a keep-alive or too short to hold one."""
        length = end - i - 6
        if length == 0:  # keep-alive: counted, not a message
            self._pos = end
            self._counts[2] += 1
            return
        if length == 1:  # no room for the 12-bit message number (DF002): discard
            self._skip(end - i)
            return
        buf = self._buf
        self._pos = end
        payload = bytes(buf[i + 3 : end - 3])
        msg_type = (payload[0] << 4) | (payload[1] >> 4)
        self._counts[0] += 1
        by_type = self._by_type
        by_type[msg_type] = by_type.get(msg_type, 0) + 1
        frames.append(_rtcm_frame(msg_type, payload, self._base + i))

    def _nmea_run(self, i: int, frames: list[Frame]) -> NeedData | None:
        """Take the sentence candidate at ``i`` and the well-formed sentences right behind it.

        A candidate that is no complete sentence, or that waited for data last time (its scan
        resumes), goes to :meth:`_nmea_at` alone; so does a sentence of the run that
        :meth:`_take_nmea_run` leaves to it.
        """
        if self._nmea_resume[0] != self._base + i:
            m = _NMEA_RUN.match(self._buf, i, i + _NMEA_RUN_BYTES)
            if m is not None:
                i = self._take_nmea_run(i, m.group(), frames)
                if i == m.end():
                    return None
        return self._nmea_single(i, frames)

    def _nmea_single(self, i: int, frames: list[Frame]) -> NeedData | None:
        """The sentence candidate at ``i`` alone (:meth:`_nmea_at`), appended if it is one."""
        frame = self._nmea_at(i)
        if frame is NEED_DATA:
            return NEED_DATA
        if frame is not None:
            frames.append(frame)
        return None

    def _take_nmea_run(self, i: int, run: bytes, frames: list[Frame]) -> int:
        """Check the sentences of ``run`` (a match of ``_NMEA_RUN`` at ``i``) with one batched XOR
        and take them in order; return where the scan goes on (``i + len(run)`` if all were taken).

        A good sentence becomes a frame. A bad checksum is counted and the sentence discarded, as
        :meth:`_nmea_at` would (it steps one byte, and the search for the next start character
        lands on the next sentence), unless a ``$``/``!`` inside it would start a candidate
        there: then the scan stops at that sentence and leaves it to :meth:`_nmea_at`.
        """
        parts = run.splitlines(keepends=True)  # a match holds only CR LF / LF: one per sentence
        starts = list(accumulate(map(len, parts[:-1]), initial=0))
        xors: list[int] = np.bitwise_xor.reduceat(np.frombuffer(run, np.uint8), starts).tolist()
        counts = self._counts
        offset = self._base + i
        for s, x in zip(parts, xors, strict=True):
            if x == _TAIL_XOR[s[-5:] if s[-2] == 0x0D else s[-4:]] ^ s[0]:
                frame = _NmeaFrameSlots()  # NmeaFrame(raw=s, offset=offset), see _twin
                frame.raw = s
                frame.offset = offset
                frame.__class__ = NmeaFrame
                frames.append(frame)
                counts[1] += 1
            elif s.find(b"$", 1) < 0 and s.find(b"!", 1) < 0:
                counts[4] += 1
                counts[6] += len(s)
            else:
                break
            offset += len(s)
        self._pos = offset - self._base
        return self._pos

    def _nmea_at(self, i: int) -> NmeaFrame | NeedData | None:
        buf = self._buf
        # End of the printable run after the start character, at most MAX_NMEA_SENTENCE bytes on;
        # a candidate still waiting for data resumes where the last call stopped (no rescan).
        cand, scanned = self._nmea_resume
        start = scanned - self._base if cand == self._base + i else i + 1
        limit = min(len(buf), i + 1 + MAX_NMEA_SENTENCE)
        stop = _NOT_PRINTABLE.search(buf, start, limit)
        e = stop.start() if stop is not None else limit
        self._nmea_resume = (self._base + i, self._base + e)
        at_end = e == len(buf) or (e == len(buf) - 1 and buf[e] == 0x0D)
        # A printable run of up to MAX_NMEA_SENTENCE bytes after the start character may still
        # end in CR LF with the next bytes (e − i − 1 is the run's length).
        if at_end and e - i - 1 <= MAX_NMEA_SENTENCE:
            return self._incomplete()
        # NMEA 0183 §5.3: "*hh" then CR LF (a bare LF is accepted: some loggers strip the CR).
        if buf[e : e + 2] == b"\r\n":
            end = e + 2
        elif buf[e : e + 1] == b"\n":
            end = e + 1
        else:
            self._skip(1)
            return None
        if e - i < 4 or buf[e - 3] != 0x2A or buf[e - 2] not in _HEX or buf[e - 1] not in _HEX:
            self._skip(1)
            return None
        if _nmea_checksum(buf[i + 1 : e - 3]) != int(buf[e - 2 : e], 16):
            self._counts[4] += 1
            self._skip(1)
            return None
        self._pos = end
        self._counts[1] += 1
        return _nmea_frame(bytes(buf[i:end]), self._base + i)
