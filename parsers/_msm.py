"""Vectorised decoder for RTCM 3 MSM4–MSM7 (RTCM 10403.3 §3.5.12) into structure-of-arrays.

One message is decoded with a handful of numpy operations, whatever its number of cells: the bit
position of every satellite and cell field is laid out once per (message type, satellite mask,
signal mask, cell mask) and cached (masks repeat epoch after epoch); the payload is then viewed as
overlapping big-endian 64-bit words (stride one byte), one gather pulls the word under every field,
and two shifts cut each field out (unsigned, or two's complement via an arithmetic shift).

Axes: ``nsat`` satellites of the message (satellite-mask order), ``n`` cells (satellite-major,
signal-minor, cell-mask order). Physical conversion (RTCM 10403.3 §3.5.12.3–4, DF397–DF408):
pseudorange = c/1000 · (DF397 + DF398·2⁻¹⁰ + fine) m, with fine = DF400·2⁻²⁴ or DF405·2⁻²⁹ ms;
phase range likewise with DF401·2⁻²⁹ or DF406·2⁻³¹ ms, phase (cycles) = phase range · f / c;
phase-range rate = DF399 + DF404·10⁻⁴ m/s. Invalid markers become NaN: DF397 = 255 and the most
negative code of every signed fine field; CN0 = 0 ("not computed") also becomes NaN.
"""

# size: ~520 lines: the MSM4–7 field layouts (RTCM 10403.3 §3.5.12) and their one
# vectorised decoder; the layouts are the decoder's tables.
from __future__ import annotations

import struct
from dataclasses import dataclass
from typing import Final

import numpy as np
import numpy.typing as npt

from ._errors import ParseError
from ._msm_tables import (
    CELL_FIELDS,
    HEADER_BITS,
    LOCK_TIME_DF402_S,
    LOCK_TIME_DF407_S,
    SAT_FIELDS,
    SPEED_OF_LIGHT_MPS,
    MsmSystem,
    msm_system,
)
from ._signals import GLO_NO_CHANNEL, frequencies_hz

__all__ = [
    "GLO_CHANNEL_TABLE_SIZE",
    "MSM_TYPES",
    "MsmHead",
    "MsmMemo",
    "MsmMessage",
    "decode_msm",
    "is_msm",
    "learn_glo_channels",
    "new_glo_channel_table",
    "parse_msm_head",
]

_LIGHT_MS_M: Final = SPEED_OF_LIGHT_MPS / 1000.0  # metres per light-millisecond
_PAD: Final = bytes(8)
_MAX_LAYOUTS: Final = 512  # cached layouts; cleared when full (a stream uses a handful)
#: Size of a GLONASS channel table indexed by slot number 1…64 (MSM satellite-mask bit).
GLO_CHANNEL_TABLE_SIZE: Final = 65
# DF419 (RTCM 10403.3): 0…13 ↔ channel −7…+6; 14, 15 = unknown.
_GLO_EXT_MAX: Final = 13

_F64 = npt.NDArray[np.float64]


def new_glo_channel_table() -> npt.NDArray[np.int8]:
    """A GLONASS slot → frequency channel table with every channel unknown."""
    return np.full(GLO_CHANNEL_TABLE_SIZE, GLO_NO_CHANNEL, np.int8)


@dataclass(frozen=True, slots=True, kw_only=True)
class MsmMessage:
    """One decoded MSM4–7 message: header fields, per-satellite and per-cell arrays.

    Per-cell arrays use the ``ObsEpoch`` dtypes (``EPOCH_DTYPES``); NaN marks an invalid or absent
    value. ``epoch_ms`` is the 30-bit epoch field in its own time scale: ms of week for GPS,
    Galileo, QZSS, SBAS, NavIC (DF004/DF248/DF428/DF546), BDT ms of week for BeiDou (DF427), and
    for GLONASS the ms of day in UTC(SU) + 3 h (DF034) with ``glonass_day`` (DF416, 7 = unknown).
    """

    msg_type: int
    system: str
    msm_level: int
    station_id: int
    epoch_ms: int
    glonass_day: int
    multiple_message: bool
    iods: int
    clock_steering: int
    external_clock: int
    smoothing: bool
    smoothing_interval: int
    # per satellite (nsat)
    sat_ids: npt.NDArray[np.int16]
    rough_range_ms: _F64
    #: Extended satellite info (MSM5/7; GLONASS: DF419 channel + 7); −1 in MSM4/6.
    sat_ext_info: npt.NDArray[np.int16]
    rough_rate_mps: _F64
    # per cell (n)
    sat: npt.NDArray[np.int16]
    sig: npt.NDArray[np.uint16]
    signal_id: npt.NDArray[np.uint8]
    fine_pseudorange_ms: _F64
    fine_phase_ms: _F64
    fine_rate_mps: _F64
    pseudorange_m: _F64
    phase_range_m: _F64
    phase_cycles: _F64
    range_rate_mps: _F64
    cn0_dbhz: npt.NDArray[np.float32]
    lock_indicator: npt.NDArray[np.int16]
    lock_time_s: npt.NDArray[np.float32]
    half_cycle: npt.NDArray[np.bool_]
    freq_hz: _F64
    #: GLONASS frequency channel per cell (``GLO_NO_CHANNEL`` if unknown or not GLONASS).
    glo_channel: npt.NDArray[np.int8]

    def __len__(self) -> int:
        return int(self.sat.shape[0])


@dataclass(frozen=True, slots=True, eq=False)
class _Layout:
    """Where every field of one mask combination sits, plus per-element conversion constants."""

    nbytes: int
    bytepos: npt.NDArray[np.intp]
    lsh: npt.NDArray[np.uint64]
    rsh: npt.NDArray[np.int64]
    #: AND mask: all ones for signed fields (keeps the sign extension), 2^w − 1 for unsigned.
    mask: npt.NDArray[np.int64]
    #: Value that marks "invalid" per element (an impossible value where the field has none).
    invalid: npt.NDArray[np.int64]
    scale: _F64
    seg: dict[str, slice]
    cell_sat: npt.NDArray[np.intp]
    sat_ids: npt.NDArray[np.int16]
    sat: npt.NDArray[np.int16]
    sig: npt.NDArray[np.uint16]
    signal_id: npt.NDArray[np.uint8]
    freq_hz: _F64
    glo_fdma: bool
    #: Per-cell ``GLO_NO_CHANNEL`` (read-only), the channel column of non-GLONASS messages.
    no_channel: npt.NDArray[np.int8]
    #: Per satellite: its GLONASS slot (``sat_ids`` − 100, read-only), for the channel table.
    glo_slots: npt.NDArray[np.intp]


_LAYOUTS: dict[tuple[int, int, int, int], _Layout] = {}
_NO_INVALID: Final = 1 << 40  # never produced by a ≤ 24-bit field
#: Scale (to ms, m/s, dB-Hz) and invalid code per field (RTCM 10403.3 DF397–DF408). Fields that
#: are kept raw (indicators, flags) have scale 1 and no invalid code.
_FIELD_SCALE: Final[dict[str, tuple[float, int]]] = {
    "DF397": (1.0, 255),  # integer ms of rough range, 255 = invalid
    "DF398": (2.0**-10, _NO_INVALID),
    "DF399": (1.0, -(1 << 13)),  # rough phase-range rate, m/s
    "EXT": (1.0, _NO_INVALID),
    "DF400": (2.0**-24, -(1 << 14)),
    "DF401": (2.0**-29, -(1 << 21)),
    "DF402": (1.0, _NO_INVALID),
    "DF403": (1.0, 0),  # CNR 1 dB-Hz, 0 = not computed
    "DF404": (1e-4, -(1 << 14)),  # fine phase-range rate, m/s
    "DF405": (2.0**-29, -(1 << 19)),
    "DF406": (2.0**-31, -(1 << 23)),
    "DF407": (1.0, _NO_INVALID),
    "DF408": (2.0**-4, 0),  # CNR 2^-4 dB-Hz, 0 = not computed
    "DF420": (1.0, _NO_INVALID),
}


def is_msm(msg_type: int) -> bool:
    """True for the MSM4–7 message numbers this module decodes."""
    found = msm_system(msg_type)
    return found is not None and found[1] >= 4


#: Every message number decoded here: MSM4–7 of GPS, GLONASS, Galileo, SBAS, QZSS, BeiDou, NavIC.
MSM_TYPES: Final = frozenset(t for t in range(1070, 1140) if is_msm(t))
#: (system, MSM level) of each of those message numbers.
_MSM_SYSTEM: Final = {t: found for t in MSM_TYPES if (found := msm_system(t)) is not None}


def _bits_set(mask: int, width: int) -> list[int]:
    """1-based positions (MSB first) of the set bits of a ``width``-bit mask."""
    return [i + 1 for i in range(width) if (mask >> (width - 1 - i)) & 1]


def _layout(
    system: MsmSystem, level: int, *, satmask: int, sigmask: int, cellmask: int, nsig: int
) -> _Layout:
    sat_bits = _bits_set(satmask, 64)
    sig_ids = _bits_set(sigmask, 32)
    nsat = len(sat_bits)
    cells = _bits_set(cellmask, nsat * nsig)
    cell_sat = np.array([(c - 1) // nsig for c in cells], np.intp)
    cell_sig = np.array([sig_ids[(c - 1) % nsig] for c in cells], np.intp)
    ncell = len(cells)
    starts, widths, masks, invalid, scale = [], [], [], [], []
    seg = {}
    pos = HEADER_BITS + nsat * nsig
    k = 0
    for fields, count in ((SAT_FIELDS[level], nsat), (CELL_FIELDS[level], ncell)):
        for name, width, is_signed in fields:
            starts.append(pos + width * np.arange(count, dtype=np.intp))
            widths.append(np.full(count, width, np.intp))
            masks.append(np.full(count, -1 if is_signed else (1 << width) - 1, np.int64))
            sc, inv = _FIELD_SCALE[name]
            scale.append(np.full(count, sc))
            invalid.append(np.full(count, inv, np.int64))
            seg[name] = slice(k, k + count)
            pos += width * count
            k += count
    start = np.concatenate(starts)
    sat_ids = (system.sat_base + np.array(sat_bits, np.int64)).astype(np.int16)
    sat = sat_ids[cell_sat]
    sig = system.signals[cell_sig]
    freq = frequencies_hz(sat, sig)
    no_channel = np.full(len(cells), GLO_NO_CHANNEL, np.int8)
    glo_slots = sat_ids.astype(np.intp) - 100
    for arr in (sat_ids, sat, sig, freq, cell_sat, no_channel, glo_slots):
        arr.setflags(write=False)  # shared by every message with this layout
    return _Layout(
        nbytes=(pos + 7) // 8,
        bytepos=start >> 3,
        lsh=(start & 7).astype(np.uint64),
        rsh=(64 - np.concatenate(widths)).astype(np.int64),
        mask=np.concatenate(masks),
        invalid=np.concatenate(invalid),
        scale=np.concatenate(scale),
        seg=seg,
        cell_sat=cell_sat,
        sat_ids=sat_ids,
        sat=sat,
        sig=sig,
        signal_id=cell_sig.astype(np.uint8),
        freq_hz=freq,
        glo_fdma=system.letter == "R",
        no_channel=no_channel,
        glo_slots=glo_slots,
    )


class MsmHead:
    """Header fields of one MSM4–7 message plus its cached layout (checked, no cell decoded yet).

    What epoch assembly needs on arrival; the cells are decoded later, a whole epoch at a time
    (``_msm_epoch``). ``glo_channels`` is the GLONASS channel per satellite as known when the
    message arrived (set by :func:`learn_glo_channels`; None for other systems).
    """

    __slots__ = (
        "_head",
        "epoch_ms",
        "glo_channels",
        "glonass_day",
        "layout",
        "msg_type",
        "msm_level",
        "msm_system",
        "multiple_message",
        "payload",
        "station_id",
        "system",
    )

    # Built by parse_msm_head only (its one tail fills every slot; no __init__ call per message).
    payload: bytes
    _head: int | None
    msg_type: int
    msm_system: MsmSystem
    system: str
    msm_level: int
    layout: _Layout
    station_id: int
    epoch_ms: int
    glonass_day: int
    multiple_message: bool
    glo_channels: npt.NDArray[np.int8] | None

    @property
    def head(self) -> int:
        """The first 240 bits of the payload as one integer (header and cell mask; zero bits past
        a shorter payload's end). Worked out on first use: the memo path of
        :func:`parse_msm_head` reads the header fields from the bytes and needs none of it."""
        head = self._head
        if head is None:
            head = self._head = int.from_bytes(self.payload[:30], "big") << 8 * max(
                0, 30 - len(self.payload)
            )
        return head


#: What :func:`parse_msm_head` remembers of a stream's last message of each MSM type: the bytes
#: of its header from byte 9 (bit 72, DF418's last bit) up to the last whole byte of the cell mask
#: (DF394, DF395, DF396: RTCM 10403.3 Table 3.5-78), the index of the byte holding the cell mask's
#: end, that byte's mask and masked value, then its system, the system's letter, MSM level and
#: layout.
#: A message type's system, the system's letter, MSM level and layout.
_Kind = tuple[MsmSystem, str, int, _Layout]
MsmMemo = dict[int, tuple[bytes, int, int, int, _Kind]]

#: Header bytes before the memo's bytes: bits 0–71 (Table 3.5-78, DF002 to DF418 but its last bit).
_MEMO_FROM: Final = 9
_NEW = object.__new__
#: Bytes 0–1, 2 and 3–6 of an MSM message, big-endian (see parse_msm_head).
_TOP: Final = struct.Struct(">HBI")


def parse_msm_head(payload: bytes, memo: MsmMemo | None = None) -> MsmHead:
    """Check one MSM4–7 message (``payload`` without preamble, length and CRC) and read its header.

    Raises :class:`ParseError` for a message that is not MSM4–7 or is shorter than its masks say.
    ``memo`` (one per stream, empty at first): a receiver sends the same masks in every message
    of a type, epoch after epoch; when this message's masks are those of the stream's last one of
    its type, their layout is taken from there without working them out (the same layout, checks
    and errors), and the few header fields that change are read straight from the bytes.
    """
    nbytes = len(payload)
    if memo is not None and nbytes >= 22:
        # Bits 0–55 (Table 3.5-78): DF002 and DF003's first 4 bits, DF003's last 8, then the
        # epoch time (30 bits), DF393 and DF409's first bit.
        fields = _TOP.unpack_from(payload)
        msg_type = fields[0] >> 4
        last = memo.get(msg_type)
        # Bits 72 to the cell mask's end: DF418's last bit, DF394 and DF395 (which fix the cell
        # mask's width), then DF396. One more bit than the layout needs (a change of DF418 only
        # sends the message down the general path below, which gives the same head).
        if last is not None:
            prefix, at, mask, byte, kind = last
            if (
                payload.startswith(prefix, _MEMO_FROM)
                and at < nbytes
                and payload[at] & mask == byte
            ):
                need = kind[3].nbytes
                if nbytes < need:
                    raise ParseError(
                        f"MSM payload has {nbytes} bytes, its masks need {need}",
                        message_id=msg_type,
                    )
                return _new_head(payload, None, fields, kind)
    if nbytes < 22:
        raise ParseError(f"MSM header needs 22 bytes, got {nbytes}", offset=nbytes)
    # Header (RTCM 10403.3 Table 3.5-78) and up to 64 cell-mask bits: 233 bits in 30 bytes.
    head = int.from_bytes(payload[:30], "big")
    if nbytes < 30:
        head <<= 8 * (30 - nbytes)
    msg_type = head >> 228
    found = _MSM_SYSTEM.get(msg_type)
    if found is None:
        raise ParseError("not an MSM4-7 message", message_id=msg_type)
    system, level = found
    satmask = (head >> 103) & 0xFFFF_FFFF_FFFF_FFFF  # DF394, bits 73–136
    sigmask = (head >> 71) & 0xFFFF_FFFF  # DF395, bits 137–168
    nsat = satmask.bit_count()
    nsig = sigmask.bit_count()
    if nsat * nsig > 64:  # RTCM 10403.3 §3.5.12.3: NSat × NSig ≤ 64
        raise ParseError(f"MSM cell mask of {nsat}x{nsig} > 64 bits", message_id=msg_type)
    cellmask = (head >> (71 - nsat * nsig)) & ((1 << (nsat * nsig)) - 1)
    key = (msg_type, satmask, sigmask, cellmask)
    lay = _LAYOUTS.get(key)
    if lay is None:
        if len(_LAYOUTS) >= _MAX_LAYOUTS:
            _LAYOUTS.clear()
        lay = _LAYOUTS[key] = _layout(
            system, level, satmask=satmask, sigmask=sigmask, cellmask=cellmask, nsig=nsig
        )
    kind = (system, system.letter, level, lay)
    end = HEADER_BITS + nsat * nsig  # the cell mask's end (bit index, exclusive)
    at, part = divmod(end, 8)
    # Remembered only where the payload holds every byte the memo compares: a cut copy's bytes
    # would match a longer message's prefix whatever follows.
    if memo is not None and at < nbytes:
        mask = (0xFF << (8 - part)) & 0xFF  # the byte's bits before ``end`` (none if part = 0)
        memo[msg_type] = (payload[_MEMO_FROM:at], at, mask, payload[at] & mask, kind)
    if nbytes < lay.nbytes:
        raise ParseError(
            f"MSM payload has {nbytes} bytes, its masks need {lay.nbytes}", message_id=msg_type
        )
    return _new_head(payload, head, _TOP.unpack_from(payload), kind)


def _new_head(
    payload: bytes, head: int | None, fields: tuple[int, int, int], kind: _Kind
) -> MsmHead:
    """The :class:`MsmHead` of both paths of :func:`parse_msm_head`: the header fields that change
    from one message to the next from ``fields`` (``_TOP.unpack_from(payload)``: bits 0–55 of
    Table 3.5-78), the rest from ``kind``; ``head`` the first 240 bits as one integer, or None
    (worked out on first use of ``MsmHead.head``)."""
    top, low, time = fields
    system, letter, level, lay = kind
    h = _NEW(MsmHead)
    h.payload = payload
    h._head = head
    h.msg_type = top >> 4  # DF002, bits 0–11
    h.msm_system = system
    h.system = letter
    h.msm_level = level
    h.layout = lay
    h.station_id = ((top & 0xF) << 8) | low  # DF003, bits 12–23
    if lay.glo_fdma:  # DF416 (3 bits) + DF034 (27 bits)
        h.epoch_ms = (time >> 2) & 0x7FF_FFFF
        h.glonass_day = time >> 29
    else:  # DF004 (GPS, QZSS), DF248 (Galileo), DF427 (BeiDou): bits 24–53
        h.epoch_ms = time >> 2
        h.glonass_day = -1
    h.multiple_message = bool(time & 2)  # DF393, bit 54
    h.glo_channels = None
    return h


def _fields(payload: bytes, lay: _Layout, part: slice) -> npt.NDArray[np.int64]:
    """Raw values of the layout elements ``part`` (unsigned, or sign-extended when signed)."""
    buf = payload + _PAD
    words = np.ndarray((len(buf) - 7,), np.dtype(">u8"), buf, 0, (1,))
    left = np.left_shift(words.take(lay.bytepos[part]), lay.lsh[part], dtype=np.uint64)
    raw: npt.NDArray[np.int64] = (left.view(np.int64) >> lay.rsh[part]) & lay.mask[part]
    return raw


def learn_glo_channels(h: MsmHead, table: npt.NDArray[np.int8]) -> None:
    """GLONASS: update ``table`` (slot → channel) from DF419 (MSM5/7), then note each satellite's.

    Sets ``h.glo_channels`` to the channel of every satellite of the message as known now: its
    own DF419 where known, else the table's (e.g. taught by a 1020 ephemeris).
    """
    lay = h.layout
    slots = lay.glo_slots  # lay.sat_ids.astype(np.intp) - 100, worked out once per layout
    if h.msm_level in (5, 7):
        ext = _fields(h.payload, lay, lay.seg["EXT"])
        known = ext <= _GLO_EXT_MAX  # DF419 0…13 ↔ channel −7…+6
        table[slots[known]] = (ext[known] - 7).astype(np.int8)
    h.glo_channels = table[slots]


def decode_msm(payload: bytes, glo_channels: npt.NDArray[np.int8] | None = None) -> MsmMessage:
    """Decode one MSM4–7 message (``payload`` without preamble, length and CRC).

    ``glo_channels`` (slot → channel, see :func:`new_glo_channel_table`) supplies GLONASS
    frequency channels where the message itself carries none (MSM4/6, or DF419 unknown).
    Raises :class:`ParseError` for a message that is not MSM4–7 or is shorter than its masks say.
    """
    h = parse_msm_head(payload)
    lay = h.layout
    level = h.msm_level
    head = h.head

    # One gather of the 64-bit big-endian word starting at every field's first byte; shift the
    # field to the top, arithmetic-shift it down (sign-extends), mask unsigned fields.
    buf = payload + _PAD
    words = np.ndarray((len(buf) - 7,), np.dtype(">u8"), buf, 0, (1,))
    left = np.left_shift(words.take(lay.bytepos), lay.lsh, dtype=np.uint64)
    raw = (left.view(np.int64) >> lay.rsh) & lay.mask
    val = raw * lay.scale
    val[raw == lay.invalid] = np.nan
    seg = lay.seg
    cell_sat = lay.cell_sat
    nsat_f = lay.sat_ids.shape[0]
    ncell = lay.sat.shape[0]

    # Satellite data (Tables 3.5-81/83/85/87): DF397 = 255 → NaN propagates to every cell.
    rough_ms = val[seg["DF397"]] + val[seg["DF398"]]
    if level in (5, 7):
        ext = raw[seg["EXT"]].astype(np.int16)
        rough_rate = val[seg["DF399"]]
        fine_rate = val[seg["DF404"]]
        range_rate = rough_rate.take(cell_sat) + fine_rate
    else:
        ext = np.full(nsat_f, -1, np.int16)
        rough_rate = np.full(nsat_f, np.nan)
        fine_rate = np.full(ncell, np.nan)
        range_rate = fine_rate
    # Signal data (Tables 3.5-82/84/86/88).
    if level in (4, 5):
        fine_pr, fine_ph = val[seg["DF400"]], val[seg["DF401"]]
        lock_raw = raw[seg["DF402"]]
        lock_s = LOCK_TIME_DF402_S.take(lock_raw)
        cn0 = val[seg["DF403"]].astype(np.float32)
    else:
        fine_pr, fine_ph = val[seg["DF405"]], val[seg["DF406"]]
        lock_raw = raw[seg["DF407"]]
        lock_s = LOCK_TIME_DF407_S.take(lock_raw)
        cn0 = val[seg["DF408"]].astype(np.float32)
    rough_cell = rough_ms.take(cell_sat)
    phase_ms = rough_cell + fine_ph

    freq = lay.freq_hz
    if lay.glo_fdma:
        slots = lay.sat_ids.astype(np.intp) - 100
        sat_ch = np.full(nsat_f, GLO_NO_CHANNEL, np.int8)
        if glo_channels is not None:
            sat_ch[:] = glo_channels[slots]
        if level in (5, 7):
            known = ext <= _GLO_EXT_MAX
            sat_ch[known] = (ext[known] - 7).astype(np.int8)
        glo_channel = sat_ch[cell_sat]
        freq = frequencies_hz(lay.sat, lay.sig, glo_channel)
    else:
        glo_channel = lay.no_channel

    return MsmMessage(
        msg_type=h.msg_type,
        system=h.system,
        msm_level=level,
        station_id=h.station_id,
        epoch_ms=h.epoch_ms,
        glonass_day=h.glonass_day,
        multiple_message=h.multiple_message,
        iods=(head >> 182) & 0x7,
        clock_steering=(head >> 173) & 0x3,
        external_clock=(head >> 171) & 0x3,
        smoothing=bool((head >> 170) & 1),
        smoothing_interval=(head >> 167) & 0x7,
        sat_ids=lay.sat_ids,
        rough_range_ms=rough_ms,
        sat_ext_info=ext,
        rough_rate_mps=rough_rate,
        sat=lay.sat,
        sig=lay.sig,
        signal_id=lay.signal_id,
        fine_pseudorange_ms=fine_pr,
        fine_phase_ms=fine_ph,
        fine_rate_mps=fine_rate,
        pseudorange_m=(rough_cell + fine_pr) * _LIGHT_MS_M,
        phase_range_m=phase_ms * _LIGHT_MS_M,
        phase_cycles=phase_ms * (freq * 1e-3),
        range_rate_mps=range_rate,
        cn0_dbhz=cn0,
        lock_indicator=lock_raw.astype(np.int16),
        lock_time_s=lock_s,
        half_cycle=raw[seg["DF420"]].astype(np.bool_),
        freq_hz=freq,
        glo_channel=glo_channel,
    )
