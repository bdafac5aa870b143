"""Streaming RINEX 3.02–3.05 observation reader: text lines in, one :class:`ObsEpoch` per epoch out.

Record layouts (RINEX 3.05 Table A3, "GNSS observation data file – data record description"):

* Epoch record: ``>`` A1, year 1X,I4, month/day/hour/min 4(1X,I2.2), seconds F11.7, 2X, epoch flag
  I1, number of satellites (or of special records) I3, 6X, receiver clock offset F15.12 (optional).
* Observation record: satellite A1,I2.2 then, for each observation code of that system in header
  order, F14.3 value, I1 loss-of-lock indicator (LLI), I1 signal strength indicator.
* Epoch flags: 0 OK, 1 power failure since the previous epoch, 2 antenna moving, 3 new site
  occupation, 4 header information follows, 5 external event, 6 cycle-slip records follow.

The epoch's satellite lines are kept as text until the epoch is complete and then decoded in one
vectorised pass: the lines are padded to a common width, viewed as a ``(satellites, codes, 16)``
byte array, and every F14.3 field is read by digit arithmetic at fixed columns (bit-exact with
``float()``: an exact integer divided by 1000). Fields that do not fit the fixed layout fall back to
``float()`` one by one. Memory per epoch is bounded by :data:`MAX_SATELLITES_PER_EPOCH` lines.
"""

# size: ~400 lines: the observation record reader (epoch lines, the per-header layout and the
# vectorised F14.3 decode) in one place; the header reader is in _rinex_obs_header.py.
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ._epoch import ObsEpoch
from ._errors import ParseError
from ._rinex_obs_header import RinexObsHeader, _ObsHeaderBuilder
from ._rinex_open import open_rinex_text
from ._rinex_time import Civil, civil_to_gps
from ._signals import GLO_NO_CHANNEL, MAX_SAT_ID, SYSTEMS, frequencies_hz, signal_code

if TYPE_CHECKING:
    from collections.abc import Iterable, Iterator
    from os import PathLike

__all__ = [
    "MAX_SATELLITES_PER_EPOCH",
    "RinexObsParser",
    "RinexObsStatistics",
    "iter_rinex_obs",
]

#: The epoch record's satellite count is I3 (RINEX 3.05 Table A3), so no epoch holds more.
MAX_SATELLITES_PER_EPOCH = 999
#: Speed of light (m/s), IS-GPS-200 §20.3.4.3; Doppler (Hz) → range rate: −D·c/f (RINEX 3.05 §5.3).
_C_MPS = 299_792_458.0
_FIELD = 16  # F14.3 + LLI + SSI
_KINDS = "CLDS"  # pseudorange, phase, Doppler, signal strength (RINEX 3.05 §5.1 Table 4)
# Byte → system index lookup for the satellite letter (column 0 of an observation record).
_SYS_OF_BYTE = np.full(256, -1, np.int16)
for _i, _s in enumerate(SYSTEMS):
    _SYS_OF_BYTE[ord(_s)] = _i
# F14.3 place values ×1000 for columns 0–13 (column 10 is the decimal point).
_PLACE = np.array([10 ** (12 - i) for i in range(10)] + [0, 100, 10, 1], np.int64)

_HEADER, _EPOCH, _SATS, _SPECIAL = range(4)


@dataclass(frozen=True, slots=True, kw_only=True)
class RinexObsStatistics:
    """Counters of one parser: epochs emitted, event records skipped, cycle-slip records seen."""

    epochs: int
    event_records: int
    cycle_slip_records: int
    blank_lines: int


@dataclass(frozen=True, slots=True)
class _Layout:
    """Per-system gather tables built from the header: which column holds C/L/D/S of each signal."""

    width: int  # padded line width (3 + 16 × most codes of any system)
    columns: int  # most codes of any system; column index ``columns`` is an all-NaN column
    gather: npt.NDArray[np.intp]  # (systems, 4 kinds, max signals) column index
    sig: npt.NDArray[np.uint16]  # (systems, max signals) packed signal code
    valid: npt.NDArray[np.bool_]  # (systems, max signals)
    has_types: npt.NDArray[np.bool_]  # (systems,)
    scale: npt.NDArray[np.float64] | None  # (systems, columns + 1) divisors, None if all 1


def _layout(header: RinexObsHeader) -> _Layout:
    columns = max((len(v) for v in header.obs_types.values()), default=0)
    signals = {
        s: list(dict.fromkeys(c[1:3] for c in t if c[0] in _KINDS))
        for s, t in header.obs_types.items()
    }
    nsig = max((len(v) for v in signals.values()), default=0) or 1
    gather = np.full((len(SYSTEMS), 4, nsig), columns, np.intp)
    sig = np.zeros((len(SYSTEMS), nsig), np.uint16)
    valid = np.zeros((len(SYSTEMS), nsig), np.bool_)
    has_types = np.zeros(len(SYSTEMS), np.bool_)
    for system, codes in header.obs_types.items():
        if system not in SYSTEMS:
            continue
        s = SYSTEMS.index(system)
        has_types[s] = True
        for j, name in enumerate(signals[system]):
            sig[s, j] = signal_code(name)
            valid[s, j] = True
        for col, code in enumerate(codes):
            if code[0] in _KINDS:
                gather[s, _KINDS.index(code[0]), signals[system].index(code[1:3])] = col
    scale = np.ones((len(SYSTEMS), columns + 1))
    for system, factors in header.scale_factors.items():  # RINEX 3.05 Table A2 SYS / SCALE FACTOR
        if system in SYSTEMS and system in header.obs_types:
            for col, code in enumerate(header.obs_types[system]):
                scale[SYSTEMS.index(system), col] = factors.get(code, factors.get("*", 1))
    return _Layout(
        3 + _FIELD * columns,
        columns,
        gather,
        sig,
        valid,
        has_types,
        None if (scale == 1.0).all() else scale,
    )


def _decode_f14_3(digits: npt.NDArray[np.uint8], first_line: int) -> npt.NDArray[np.float64]:
    """Vectorised F14.3 read of ``digits`` (..., 14) bytes; blank → NaN; odd layouts via float()."""
    d = digits - np.uint8(48)
    is_digit = d <= 9
    blank = digits == 32
    minus = digits == 45
    started = np.maximum.accumulate(~blank, axis=-1)
    lead = np.zeros_like(started)
    lead[..., 1:] = started[..., :-1]
    ok = is_digit[..., 11:].all(axis=-1) & (digits[..., 10] == 46)
    int_part = is_digit[..., :10] | (blank[..., :10] & ~started[..., :10])
    int_part |= minus[..., :10] & ~lead[..., :10]
    ok &= int_part.all(axis=-1)
    n = (np.where(is_digit, d, 0).astype(np.int64) * _PLACE).sum(axis=-1)
    out: npt.NDArray[np.float64] = n / 1000.0
    out[minus.any(axis=-1)] *= -1.0
    empty = blank.all(axis=-1)
    out[empty] = np.nan
    odd = ~ok & ~empty
    if odd.any():
        for r, c in zip(*np.nonzero(odd), strict=True):
            text = bytes(digits[r, c]).decode("latin-1")
            try:
                out[r, c] = float(text)
            except ValueError:
                raise ParseError(
                    f"bad observation value {text.strip()!r} in field {c + 1}",
                    message_id="RINEX obs record",
                    offset=first_line + int(r),
                ) from None
    return out


class RinexObsParser:
    """Line-fed RINEX 3 observation parser; sans-IO (the caller reads the file).

    ``feed_line(line)`` takes one text line (with or without its newline) and returns the epochs it
    completed (zero or one). ``feed_line("")`` means end of input and checks that no epoch was cut.
    ``header`` is None until END OF HEADER has been read.
    """

    def __init__(self, *, station_id: int = -1) -> None:
        self._station_id = station_id
        self._builder = _ObsHeaderBuilder()
        self._header: RinexObsHeader | None = None
        self._layout: _Layout | None = None
        self._glo = np.full(MAX_SAT_ID, GLO_NO_CHANNEL, np.int8)
        self._state = _HEADER
        self._line_no = 0
        self._rows: list[str] = []
        self._pending = 0
        self._epoch_line = 0
        self._epoch_fields: Civil = (0, 0, 0, 0, 0, 0.0)
        self._epoch_flag = 0
        self._special_is_header = False
        self._epochs = self._events = self._slips = self._blank = 0

    @property
    def header(self) -> RinexObsHeader | None:
        return self._header

    def statistics(self) -> RinexObsStatistics:
        return RinexObsStatistics(
            epochs=self._epochs,
            event_records=self._events,
            cycle_slip_records=self._slips,
            blank_lines=self._blank,
        )

    def feed_lines(self, lines: Iterable[str]) -> list[ObsEpoch]:
        out: list[ObsEpoch] = []
        for line in lines:
            out.extend(self.feed_line(line))
        return out

    def feed_line(self, line: str) -> list[ObsEpoch]:
        self._line_no += 1
        state = self._state
        if state == _SATS:
            if not line:
                self._eof()
            self._rows.append(line)
            self._pending -= 1
            if self._pending:
                return []
            self._state = _EPOCH
            return [self._finish()]
        if not line:
            self._eof()
            return []
        if state == _EPOCH:
            return self._epoch_record(line)
        if state == _HEADER:
            if self._builder.feed(line, self._line_no):
                self._set_header()
                self._state = _EPOCH
        else:  # _SPECIAL: event or cycle-slip records (flags 2–6)
            if self._special_is_header:
                self._builder.feed(line, self._line_no)
            self._pending -= 1
            if not self._pending:
                if self._special_is_header:
                    self._set_header()
                self._state = _EPOCH
        return []

    # --- internals -----------------------------------------------------------------------------

    def _fail(self, reason: str, record: str = "RINEX obs epoch") -> ParseError:
        return ParseError(reason, message_id=record, offset=self._line_no)

    def _eof(self) -> None:
        if self._state == _HEADER:
            raise self._fail(
                "end of input inside the header (no END OF HEADER)", "RINEX obs header"
            )
        if self._state in (_SATS, _SPECIAL):
            raise self._fail(
                f"end of input inside the epoch record of line {self._epoch_line}: "
                f"{self._pending} record line(s) missing"
            )

    def _set_header(self) -> None:
        try:
            header = self._builder.build()
        except ValueError as exc:
            raise self._fail(f"bad RINEX header: {exc}", "RINEX obs header") from exc
        if not 3.0 <= header.version < 5.0 or header.file_type != "O":
            raise self._fail(
                f"not a RINEX 3 observation file (version {header.version}, type {header.file_type!r})",
                "RINEX obs header",
            )
        try:
            layout = _layout(header)
        except ValueError as exc:  # an observation code that is not RINEX 3 (e.g. "C1 ")
            raise self._fail(f"bad SYS / # / OBS TYPES: {exc}", "RINEX obs header") from exc
        self._header = header
        self._layout = layout
        self._builder.lines = 0  # the header bound applies to each header block
        self._glo[:] = GLO_NO_CHANNEL
        for sat, k in header.glonass_channels.items():
            self._glo[sat] = k

    def _epoch_record(self, line: str) -> list[ObsEpoch]:
        if not line.strip():
            self._blank += 1
            return []
        if line[0] != ">":
            raise self._fail(
                f"expected an epoch record starting with '>', got {line[:20].rstrip()!r}"
            )
        try:
            flag = int(line[31])
            count = int(line[32:35])
            fields = (
                int(line[2:6]),
                int(line[7:9]),
                int(line[10:12]),
                int(line[13:15]),
                int(line[16:18]),
                float(line[18:29]),
            )
        except (ValueError, IndexError) as exc:
            raise self._fail(f"bad epoch record {line.rstrip()!r}") from exc
        if not 0 <= count <= MAX_SATELLITES_PER_EPOCH:
            raise self._fail(f"bad satellite count {count}")
        self._epoch_line = self._line_no
        if flag <= 1:
            self._epoch_fields = fields
            self._epoch_flag = flag
            self._rows = []
            self._pending = count
            if count:
                self._state = _SATS
            else:  # an epoch without satellites is valid: hand it on, empty
                return [self._finish()]
        elif flag <= 6:
            if flag == 6:
                self._slips += count
            else:
                self._events += 1
            self._special_is_header = flag in (3, 4)
            self._pending = count
            if count:
                self._state = _SPECIAL
        else:
            raise self._fail(f"bad epoch flag {flag}")
        return []

    def _finish(self) -> ObsEpoch:
        header, lay = self._header, self._layout
        assert header is not None
        assert lay is not None
        flag = self._epoch_flag
        try:
            time = civil_to_gps(self._epoch_fields, header.time_system)
        except ValueError as exc:
            raise ParseError(
                f"bad epoch time: {exc}", message_id="RINEX obs epoch", offset=self._epoch_line
            ) from exc
        rows = self._rows
        n, width = len(rows), lay.width
        first = self._epoch_line + 1
        text = "".join([r.rstrip("\r\n")[:width].ljust(width) for r in rows])
        raw = np.frombuffer(text.encode("latin-1"), np.uint8).reshape(n, width)
        sys_idx = _SYS_OF_BYTE[raw[:, 0]]
        prn_d = raw[:, 1:3].astype(np.int16) - 48
        prn_d[raw[:, 1:3] == 32] = 0
        bad = (sys_idx < 0) | (prn_d < 0).any(axis=1) | (prn_d > 9).any(axis=1)
        bad |= ~lay.has_types[np.maximum(sys_idx, 0)]
        if bad.any():
            r = int(np.argmax(bad))
            raise ParseError(
                f"bad or undeclared satellite {rows[r][:3]!r} (no SYS / # / OBS TYPES for it?)",
                message_id="RINEX obs record",
                offset=first + r,
            )
        sat_row = (sys_idx * 100 + prn_d[:, 0] * 10 + prn_d[:, 1]).astype(np.int16)
        body = raw[:, 3:].reshape(n, lay.columns, _FIELD)
        values = np.empty((n, lay.columns + 1), np.float64)
        values[:, :-1] = _decode_f14_3(body[:, :, :14], first)
        if lay.scale is not None:
            values[:, :-1] /= lay.scale[sys_idx, :-1]
        values[:, -1] = np.nan
        lli_raw = body[:, :, 14]
        lli_col = np.zeros((n, lay.columns + 1), np.uint8)
        lli_col[:, :-1] = np.where(lli_raw == 32, 0, lli_raw - np.uint8(48))
        if (lli_col > 9).any():
            r, c = np.argwhere(lli_col > 9)[0]
            raise ParseError(
                f"bad loss-of-lock indicator in field {c + 1}",
                message_id="RINEX obs record",
                offset=first + int(r),
            )
        gather = lay.gather[sys_idx]  # (n, 4, nsig)
        rows_ix = np.arange(n)[:, None]
        c = values[rows_ix, gather[:, 0]]
        ph = values[rows_ix, gather[:, 1]]
        dop = values[rows_ix, gather[:, 2]]
        snr = values[rows_ix, gather[:, 3]]
        lli = lli_col[rows_ix, gather[:, 1]]
        keep = lay.valid[sys_idx] & ~(np.isnan(c) & np.isnan(ph) & np.isnan(dop) & np.isnan(snr))
        sat = np.broadcast_to(sat_row[:, None], keep.shape)[keep]
        sig = lay.sig[sys_idx][keep]
        freq = frequencies_hz(sat, sig, self._glo[sat])
        lli_k = lli[keep]
        lli_bit0 = (lli_k & 1).astype(np.uint8)
        if flag == 1:  # power failure between the previous and this epoch: every cell lost lock
            lli_bit0[:] = 1
        m = int(sat.shape[0])
        self._epochs += 1
        return ObsEpoch(
            time=time,
            station_id=self._station_id,
            sat=sat,
            sig=sig,
            pseudorange_m=c[keep],
            phase_cycles=ph[keep],
            range_rate_mps=-dop[keep] * (_C_MPS / freq),
            cn0_dbhz=snr[keep].astype(np.float32),
            lock_time_s=np.full(m, np.nan, np.float32),
            lock_indicator=np.full(m, -1, np.int16),
            half_cycle=(lli_k & 2).astype(np.bool_),
            lli=lli_bit0,
            freq_hz=freq,
            sources=("RINEX",),
            _validate=False,
        )


def iter_rinex_obs(
    path: str | PathLike[str], *, station_id: int = -1, parser: RinexObsParser | None = None
) -> Iterator[ObsEpoch]:
    """Yield the epochs of a RINEX 3 observation file (plain, .gz, .bz2, Hatanaka), streaming.

    Pass ``parser`` to read the header (``parser.header``) and counters while iterating.
    """
    p = parser if parser is not None else RinexObsParser(station_id=station_id)
    with open_rinex_text(path) as lines:
        for line in lines:
            yield from p.feed_line(line)
        p.feed_line("")
