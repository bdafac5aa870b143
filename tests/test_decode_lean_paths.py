"""Lean steps of the per-epoch decode, each against the path it replaces (bit for bit).

* ``Framer._rtcm_at`` takes the good messages of a run inline instead of one ``_accept`` call each:
  the same frames, offsets, counters and resynchronisation as the previous code (kept below as
  ``_AcceptEach``, golden from our own previous code) for any stream and any cutting of it.
* ``parse_msm_head(payload, memo)`` reuses the layout of the stream's last message of the same
  type when its masks (DF394–DF396, RTCM 10403.3 Table 3.5-78) are the same: the same header
  values, layout and errors as without the memo.
* ``StreamDecoder._on_msm`` computes the GPS ms of day and the epoch gap inline: epochs grouped as
  by ``gps_ms_of_day`` / ``circular_gap_ms`` (the previous code, kept below as ``_PreviousOnMsm``).
* ``leap_seconds_at`` searches the table from its newest entry, ``gps_to_utc`` reuses one
  timedelta per leap second count, and ``StationPipeline._utc_time`` picks the nearest day without
  ``min()``: the same values as the previous code (kept below).
"""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ionwarden.daemon.estimator import StationPipeline
from ionwarden.parsers import ParseError
from ionwarden.parsers._framer import Frame, Framer, NeedData, RtcmFrame, _crc_run
from ionwarden.parsers._gnsstime import (
    GPS_EPOCH,
    LEAP_SECONDS,
    SECONDS_PER_WEEK,
    GpsTime,
    gps_to_utc,
    leap_seconds_at,
    utc_to_gps,
)
from ionwarden.parsers._msm import MSM_TYPES, MsmHead, MsmMemo, parse_msm_head
from ionwarden.parsers._msm_time import DAY_MS, LEAP_NOW_S, gps_ms_of_day
from ionwarden.parsers._stream import SAME_EPOCH_TOLERANCE_MS, StreamDecoder, _Epoch

from .conftest import REAL_DATA
from .test_decode_shortcuts import _same, _sim_bytes
from .test_framer_runs import _JUNK, _cut, _nmea_piece, _outcome, _rtcm_piece

_RTCM_FILES = ("RTK134_202102051543.rtcm3", "pygnssutils_ntrip_encode_none.bin")  # PROVENANCE.md


def _real(name: str) -> bytes:
    """A real RTCM capture, read in place (see /work/shared/data/real/PROVENANCE.md)."""
    return (REAL_DATA / "rtcm" / name).read_bytes()


# --- framer: a run's messages taken inline -------------------------------------------------------


class _AcceptEach(Framer):
    """The framer with the previous ``_rtcm_at``: each good frame of a run through ``_accept``."""

    def _rtcm_at(self, i: int, frames: list[Frame]) -> NeedData | None:
        buf = self._buf
        size = len(buf)
        if size - i < 3:
            return self._incomplete()
        if buf[i + 1] & 0xFC:
            self._skip(1)
            return None
        end = i + 6 + (((buf[i + 1] & 0x03) << 8) | buf[i + 2])
        if size < end:
            return self._incomplete()
        starts = [i]
        p = end
        limit = min(size, end + 4096)
        while p + 3 <= limit and buf[p] == 0xD3:
            if buf[p + 1] & 0xFC:
                break
            q = p + 6 + (((buf[p + 1] & 0x03) << 8) | buf[p + 2])
            if q > limit:
                break
            starts.append(p)
            p = q
        crcs = _crc_run(buf, starts, p)
        if crcs[0] != 0:
            self._counts[3] += 1
            self._skip(1)
            return None
        starts.append(p)
        for k, crc in enumerate(crcs):
            if crc != 0:
                break
            self._accept(starts[k], starts[k + 1], frames)
        return None


@pytest.mark.parametrize("name", _RTCM_FILES)
@pytest.mark.parametrize("size", [1, 7, 100, 1935, 4096, 1 << 20])
def test_framer_inline_run_equals_accept_each_on_real_captures(name, size):
    """Framer gives the previous code's frames and counters on a real capture cut in chunks."""
    data = _real(name)
    chunks = [data[k : k + size] for k in range(0, len(data), size)]
    if size == 1:
        chunks = chunks[:20_000]  # byte by byte: the first 20 kB (a run never forms)
    got = _outcome(Framer(), chunks)
    assert got == _outcome(_AcceptEach(), chunks)
    assert got[1][0] > 0  # frames were found


def test_framer_inline_run_equals_accept_each_on_sim_stream():
    """Framer gives the previous code's frames and counters on the simulator's stream (MSM4,
    ephemerides, 1005, NMEA) fed one second at a time."""
    chunks, _ = _sim_bytes(8.0)
    assert _outcome(Framer(), chunks) == _outcome(_AcceptEach(), chunks)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(st.one_of(_rtcm_piece(), _rtcm_piece(), _nmea_piece(), _JUNK), max_size=25),
    st.lists(st.integers(0, 10_000), max_size=10),
)
def test_framer_inline_run_equals_accept_each_on_any_pieces(pieces, cuts):
    """Framer does what the previous code did for any mix of good, bad-CRC, keep-alive and short
    RTCM frames, sentences and junk, cut anywhere (RTCM 10403.3 Table 4-1 framing)."""
    data = b"".join(pieces)
    assert _outcome(Framer(), _cut(data, cuts)) == _outcome(_AcceptEach(), _cut(data, cuts))


# --- MSM header: the stream's last layout of each type -------------------------------------------

_HEAD_FIELDS = (
    "payload",
    "head",
    "msg_type",
    "msm_system",
    "system",
    "msm_level",
    "station_id",
    "epoch_ms",
    "glonass_day",
    "multiple_message",
    "glo_channels",
)


def _head_outcome(payload: bytes, memo: MsmMemo | None) -> object:
    """Every header value and the layout's content, or the error (type and text)."""
    try:
        h = parse_msm_head(payload, memo)
    except ParseError as exc:
        return ("error", str(exc), exc.args)
    lay = h.layout
    layout = tuple(
        (f.name, getattr(lay, f.name).tobytes())
        if isinstance(getattr(lay, f.name), np.ndarray)
        else (f.name, getattr(lay, f.name))
        for f in dataclasses.fields(lay)
    )
    return tuple(getattr(h, name) for name in _HEAD_FIELDS), layout


def _msm_payloads(data: bytes) -> list[bytes]:
    return [
        f.payload
        for f in Framer().feed(data) + Framer().feed(b"")
        if isinstance(f, RtcmFrame) and f.msg_type in MSM_TYPES
    ]


@pytest.mark.parametrize("name", _RTCM_FILES)
def test_msm_head_memo_equals_fresh_parse_on_real_captures(name):
    """Every MSM message of a real capture (MSM5 and MSM7; PROVENANCE.md) parses to the same header
    and layout with the stream's memo as without; truncated copies give the same errors."""
    payloads = _msm_payloads(_real(name))
    assert len(payloads) > 100
    memo: MsmMemo = {}
    for p in payloads:
        assert _head_outcome(p, memo) == _head_outcome(p, None)
        for cut in (21, 22, 29, 30, len(p) - 1):  # header too short; masks need more bytes
            assert _head_outcome(p[:cut], memo) == _head_outcome(p[:cut], None)
    assert set(memo) == {(p[0] << 4) | (p[1] >> 4) for p in payloads}  # one entry per MSM type


def test_msm_head_memo_equals_fresh_parse_on_sim_stream():
    """The same on the simulator's MSM4 stream, whose satellites rise and set (masks change)."""
    chunks, _ = _sim_bytes(30.0)
    memo: MsmMemo = {}
    for p in _msm_payloads(b"".join(chunks)):
        assert _head_outcome(p, memo) == _head_outcome(p, None)


_SEEDS = _msm_payloads(_real(_RTCM_FILES[1]))[:8] + _msm_payloads(_real(_RTCM_FILES[0]))[:8]


@settings(max_examples=400, deadline=None)
@given(
    st.sampled_from(_SEEDS),
    st.lists(st.tuples(st.integers(0, 239), st.booleans()), max_size=4),
    st.integers(0, 40),
)
def test_msm_head_memo_equals_fresh_parse_on_altered_headers(seed, flips, cut):
    """A message whose header bits (type, masks, epoch, flags) differ from the one the memo holds,
    or that is cut short, parses (or fails) exactly as without the memo."""
    memo: MsmMemo = {}
    parse_msm_head(seed, memo)
    b = bytearray(seed)
    for bit, _ in flips:
        b[bit // 8] ^= 0x80 >> (bit % 8)
    altered = bytes(b[: max(0, len(b) - cut)])
    assert _head_outcome(altered, memo) == _head_outcome(altered, None)
    assert _head_outcome(seed, memo) == _head_outcome(seed, None)


def test_msm_head_memo_path_taken_on_repeated_masks_and_equal():
    """The memo's byte path (no whole-head integer) is the one taken for a real capture's repeated
    masks (PROVENANCE.md), and gives what the general path gives (the oracle) for every message."""
    memo: MsmMemo = {}
    fast = 0
    for p in _msm_payloads(_real(_RTCM_FILES[0])):
        h = parse_msm_head(p, memo)
        fast += h._head is None  # built from the bytes, head not worked out yet
        assert _head_outcome(p, None) == _head_outcome(p, memo)
    assert fast > 100


@settings(max_examples=200, deadline=None)
@given(st.sampled_from(_SEEDS), st.integers(22, 40), st.integers(0, 239), st.data())
def test_msm_head_memo_from_cut_copy_never_matches_other_masks(seed, cut, bit, data):
    """A memo left by a cut copy of a message (its masks' bytes partly missing) does not make a
    message whose later mask bits differ take the memo's layout: it parses as without a memo (the
    general path, the oracle)."""
    memo: MsmMemo = {}
    _head_outcome(seed[:cut], memo)
    b = bytearray(seed)
    b[bit // 8] ^= 0x80 >> (bit % 8)
    other = bytes(b[: len(b) - data.draw(st.integers(0, 3))])
    assert _head_outcome(other, memo) == _head_outcome(other, None)
    assert _head_outcome(seed, memo) == _head_outcome(seed, None)


class _NoMemo(dict):  # type: ignore[type-arg]
    """A memo that never keeps anything: every header takes the general path."""

    def __setitem__(self, key: object, value: object) -> None:
        pass


@pytest.mark.parametrize("source", ["sim", *_RTCM_FILES])
def test_stream_decoder_with_memo_equals_without(source):
    """StreamDecoder's outputs, reference and statistics are those of a decoder whose memo never
    keeps a layout, on the simulator's stream and the real captures, in 4 kB chunks."""
    if source == "sim":
        chunks, ref = _sim_bytes(12.0)
    else:
        data = _real(source)
        chunks, ref = [data[k : k + 4096] for k in range(0, len(data), 4096)], None
    memo, general = StreamDecoder(ref), StreamDecoder(ref)  # type: ignore[arg-type]
    general._msm_memo = _NoMemo()
    for chunk in [*chunks, b""]:
        a, b = memo.feed(chunk), general.feed(chunk)
        assert len(a) == len(b)
        assert all(_same(x, y) for x, y in zip(a, b, strict=True))
        assert memo.reference_time == general.reference_time
    assert memo.statistics() == general.statistics()
    assert memo.statistics().epochs > 0
    assert memo._msm_memo


# --- epoch grouping: GPS ms of day and gap inline ------------------------------------------------


def circular_gap_ms(a: int, b: int) -> int:
    """The previous ``_msm_time.circular_gap_ms`` (our own previous code; the decoder now inlines
    it)."""
    d = abs(a - b) % DAY_MS
    return min(d, DAY_MS - d)


class _PreviousOnMsm(StreamDecoder):
    """The decoder with the previous ``_on_msm`` (``gps_ms_of_day`` and ``circular_gap_ms``)."""

    def _on_msm(self, msg: MsmHead, out: list) -> None:  # type: ignore[type-arg]
        sod = gps_ms_of_day(msg, LEAP_NOW_S)  # no GLONASS below: its branch is unchanged
        ep = self._open
        if ep is not None and (
            ep.station != msg.station_id or circular_gap_ms(ep.sod, sod) > SAME_EPOCH_TOLERANCE_MS
        ):
            self._close_open(out)
            ep = None
        if ep is None:
            self._open = _Epoch(msg, sod)
        else:
            ep.msgs.append(msg)
        if not msg.multiple_message:
            self._close_open(out)


@dataclasses.dataclass
class _Head:
    """What ``_on_msm`` reads of an MSM header (GPS-aligned or BeiDou time of week)."""

    system: str
    epoch_ms: int
    station_id: int
    multiple_message: bool


_WEEK_MS = 604_800_000
#: Times of week near the day and week edges, where the modulo and the circular gap matter.
_TOW = st.one_of(
    st.integers(0, _WEEK_MS - 1),
    st.integers(0, 20),
    st.integers(_WEEK_MS - 20, _WEEK_MS - 1),
    st.integers(-20, 20).map(lambda d: (86_400_000 * 3 + d) % _WEEK_MS),
    st.integers(-20, 20).map(lambda d: (86_400_000 - 14_000 + d) % _WEEK_MS),  # BDT day edge
    st.integers(-20, 20).map(lambda d: (_WEEK_MS - 14_000 + d) % _WEEK_MS),
)


@settings(max_examples=300, deadline=None)
@given(
    st.lists(
        st.tuples(st.sampled_from("GECJSI"), _TOW, st.integers(0, 2), st.booleans()),
        min_size=1,
        max_size=30,
    )
)
def test_epoch_grouping_inline_equals_previous(heads):
    """Messages are grouped into the same epochs (times of day, stations, order) as by
    ``gps_ms_of_day`` and ``circular_gap_ms`` (RTCM 10403.3 Table 3.5-78 times; BDT = GPST − 14 s,
    BDS-SIS-ICD-B1I §5.1.3), also across day and week edges."""
    new, old = StreamDecoder(), _PreviousOnMsm()  # no reference: closed epochs are held
    for system, tow, station, multiple in heads:
        h = _Head(system=system, epoch_ms=tow, station_id=station, multiple_message=multiple)
        out_new: list[object] = []
        out_old: list[object] = []
        new._on_msm(h, out_new)  # type: ignore[arg-type]
        old._on_msm(h, out_old)  # type: ignore[arg-type]
        assert out_new == out_old
    for a, b in zip([*new._held, new._open], [*old._held, old._open], strict=True):
        assert (a is None) == (b is None)
        if a is not None and b is not None:
            assert (a.sod, a.station, a.msgs) == (b.sod, b.station, b.msgs)


# --- GPS ↔ UTC and the GGA time of day ------------------------------------------------------------


def _leap_previous(utc: dt.datetime) -> int:
    """The previous ``leap_seconds_at``: the whole table walked from the start."""
    value = 13
    for start, leap in LEAP_SECONDS:
        if utc >= start:
            value = leap
    return value


def _gps_to_utc_previous(t: GpsTime) -> dt.datetime:
    """The previous ``gps_to_utc``: a new timedelta for each leap second count."""
    approx = GPS_EPOCH + dt.timedelta(seconds=t.total_s)
    leap = _leap_previous(approx - dt.timedelta(seconds=_leap_previous(approx)))
    return approx - dt.timedelta(seconds=leap)


_INSTANTS = st.one_of(
    st.datetimes(dt.datetime(1990, 1, 1), dt.datetime(2035, 1, 1)),
    st.sampled_from([s.replace(tzinfo=None) for s, _ in LEAP_SECONDS]).flatmap(
        lambda s: st.integers(-2_000_000, 2_000_000).map(
            lambda us: s + dt.timedelta(microseconds=us)
        )
    ),
).map(lambda d: d.replace(tzinfo=dt.UTC))


@settings(max_examples=300, deadline=None)
@given(_INSTANTS)
def test_leap_seconds_and_gps_to_utc_equal_previous(utc):
    """GPS − UTC (IERS Bulletin C table) and GPS → UTC are those of the previous code, also within
    a second or two of every leap second."""
    assert leap_seconds_at(utc) == _leap_previous(utc)
    t = utc_to_gps(utc)
    assert gps_to_utc(t) == _gps_to_utc_previous(t)


def _utc_time_previous(last_t: GpsTime, tod: dt.time) -> GpsTime:
    """The previous ``StationPipeline._utc_time``: min() over the three candidate days."""
    ref = _gps_to_utc_previous(last_t)
    cand = dt.datetime.combine(ref.date(), tod, tzinfo=dt.UTC)
    best = min(
        (cand + dt.timedelta(days=d) for d in (-1, 0, 1)),
        key=lambda c: abs((c - ref).total_seconds()),
    )
    return utc_to_gps(best)


@settings(max_examples=300, deadline=None)
@given(
    st.integers(1000, 2400),
    st.one_of(
        st.floats(0.0, SECONDS_PER_WEEK, exclude_max=True),
        st.integers(0, 6).map(lambda d: d * 86_400.0 + 18.0),  # UTC midnight
        st.integers(0, 6).map(lambda d: d * 86_400.0 + 43_218.0),  # UTC noon: tied candidates
    ),
    st.times(),
)
def test_pipeline_gga_time_equals_previous(week, tow, tod):
    """A GGA time of day is dated from the last epoch as by the previous code (the nearest
    calendar day, the earliest of equally near ones), midnight and noon included."""
    pipe = StationPipeline("T")
    pipe._last_t = GpsTime(week, tow)
    assert pipe._utc_time(tod) == _utc_time_previous(GpsTime(week, tow), tod)
