"""Sans-IO receiver-stream decoder: framing, dispatch, MSM epoch assembly and time resolution.

``StreamDecoder.feed(data)`` returns decoded messages: one :class:`ObsEpoch` per receiver epoch (all
MSM messages that share an epoch time, whatever the constellation), the typed ephemeris / station
messages of ``_rtcm_misc.DECODERS``, NMEA messages of ``_nmea``, and :class:`RawRtcm` for every
RTCM type without a decoder (proprietary 4xxx, MSM1–3, SSR …), counted by type.

Time (RTCM 10403.3 §3.5.12, Table 3.5-78): MSM epochs carry only a time of week (GPS, Galileo,
QZSS, SBAS, NavIC: ms of week; BeiDou: BDT ms of week, BDT = GPST − 14 s) or, for GLONASS, DF416
day of week + DF034 ms of day in UTC(SU) + 3 h (GLONASS ICD §3.3.3), which needs GPS − UTC leap
seconds. Each is resolved to the full GPS time nearest to a reference: the constructor's (the
daemon passes its clock; this module never reads one), else the last resolved epoch, else one
learned from the stream (Galileo 1045/1046 or BeiDou 1042 week, NMEA date, and only as a last
resort the newest GPS 1019, because receivers repeat year-old 1019s). Until a reference exists,
closed epochs wait in a bounded queue; those pushed out are counted as unresolved, never guessed.
A constructor reference that two Galileo/BeiDou ephemerides of different satellites contradict by
more than two weeks (a Pi booted with a stale clock) is replaced, and the correction is counted.

Epoch assembly: an epoch closes on the message whose multiple-message bit (DF393) is 0, or when an
MSM with another station id or an epoch time more than ``SAME_EPOCH_TOLERANCE_MS`` away arrives
(so u-blox's whole-second + 1 ms stamps stay one epoch, at their actual time). A cell sent twice
in one epoch (MSM6 and MSM7 of one system) is kept once, from the later message. MSM messages are
checked and their headers read on arrival; their cells are decoded when the feed returns, all the
epochs it closed together (``_msm_epoch``), so the output order is unchanged.
"""

# size: ~530 lines: framing, dispatch, MSM epoch assembly and time resolution are one
# state machine over the same per-stream state; its decode shortcuts sit beside it.
from __future__ import annotations

import datetime as _dt
import functools
import weakref
from collections import deque
from collections.abc import Hashable
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, Final, TypeVar, cast

from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._epoch import ObsEpoch
from ._errors import ParseError
from ._framer import Frame, Framer, FramerStatistics, NmeaFrame, RtcmFrame
from ._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime, utc_to_gps
from ._msm import (
    MSM_TYPES,
    MsmHead,
    MsmMemo,
    MsmMessage,
    decode_msm,
    learn_glo_channels,
    new_glo_channel_table,
    parse_msm_head,
)
from ._msm_epoch import decode_epochs
from ._msm_time import (
    BDS_OFFSET_MS,
    DAY_MS,
    LEAP_NOW_S,
    WEEK_MS,
    gps_ms_of_day,
    leap_at,
    resolve_epoch,
)
from ._nmea import (
    GsvAssembler,
    GsvPart,
    NmeaMessage,
    RmcFix,
    SatellitesInView,
    ZdaTime,
    decode_wanted,
    skipped_sentence,
)
from ._rtcm_misc import DECODERS, DecodeContext
from ._rtcm_station import ReceiverDescriptor, StationReference

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable, Mapping

__all__ = [
    "MAX_HELD_EPOCHS",
    "Message",
    "RawRtcm",
    "StreamDecoder",
    "StreamStatistics",
]

#: Closed epochs kept while no reference time is known (1 min at 1 Hz); older ones are dropped
#: and counted as unresolved.
MAX_HELD_EPOCHS: Final = 64
#: Without a better source, the newest GPS 1019 is trusted once this many epochs are waiting.
_GPS_1019_FALLBACK_EPOCHS: Final = 8
#: MSM messages whose epoch times differ by at most this much belong to one epoch (u-blox stamps
#: whole seconds + 1 ms on some constellations); far below the 50 ms of a 20 Hz receiver.
SAME_EPOCH_TOLERANCE_MS: Final = 5
#: A reference further than this from two agreeing Galileo/BeiDou ephemerides (different
#: satellites) is replaced by them: ephemerides are valid for hours, never for two weeks.
_CLOCK_DISAGREEMENT_S: Final = 14 * 86_400.0
_EPH_AGREE_S: Final = 86_400.0  # two ephemerides within a day of each other agree
#: Ephemerides whose full week we trust to place the stream in time (RTCM 10403.3: Galileo DF289
#: and BeiDou DF489 are not truncated to 10 bits; GPS 1019s are often stale, see _learn).
_WEEK_SOURCES: Final = {1045: "galileo", 1046: "galileo", 1042: "beidou"}


@dataclass(frozen=True, slots=True, kw_only=True)
class RawRtcm:
    """An RTCM 3 message without a decoder here, passed through as received."""

    msg_type: int
    payload: bytes
    offset: int


#: What ``StreamDecoder.feed`` returns: epochs, ephemerides, station data, NMEA and raw RTCM.
Message = (
    ObsEpoch
    | MsmMessage
    | RawRtcm
    | KeplerEphemeris
    | GlonassEphemeris
    | StationReference
    | ReceiverDescriptor
    | NmeaMessage
    | SatellitesInView
)


@dataclass(frozen=True, slots=True, kw_only=True)
class StreamStatistics:
    """Counters since the decoder was created."""

    framer: FramerStatistics
    #: Decoded messages by RTCM type (MSM and the ``DECODERS`` table).
    decoded_by_type: Mapping[int, int] = field(default_factory=lambda: MappingProxyType({}))
    #: RTCM types without a decoder, passed through as :class:`RawRtcm`.
    raw_by_type: Mapping[int, int] = field(default_factory=lambda: MappingProxyType({}))
    #: CRC-good frames whose content a decoder rejected (:class:`ParseError`), by type.
    decode_errors_by_type: Mapping[int, int] = field(default_factory=lambda: MappingProxyType({}))
    nmea_decoded: int = 0
    #: Valid sentences outside ``nmea_wanted`` not returned (``emit_nmea_other=False``); they
    #: are counted in ``nmea_decoded`` too.
    nmea_skipped: int = 0
    nmea_errors: int = 0
    last_error: str = ""
    epochs: int = 0
    #: Epochs dropped because no reference time arrived while they waited.
    epochs_unresolved: int = 0
    epochs_waiting: int = 0
    #: Cells seen twice in one epoch (e.g. MSM6 and MSM7 of one system); the later one is kept.
    duplicate_cells: int = 0
    #: Where the reference time came from: "constructor", "galileo", "beidou", "gps-1019", "nmea"
    #: or "" while unknown.
    reference_source: str = ""
    #: Times the reference was replaced because ephemerides contradicted it by over two weeks.
    reference_corrections: int = 0


class _Epoch:
    """MSM messages collected for one epoch (mutable, private)."""

    __slots__ = ("msgs", "sod", "station")

    def __init__(self, msg: MsmHead, sod: int) -> None:
        self.msgs = [msg]
        self.sod = sod
        self.station = msg.station_id


#: Placeholder in the output list for an epoch decoded when the feed returns.
_SLOT: Final = RawRtcm(msg_type=-1, payload=b"", offset=-1)
#: Decoded non-MSM messages kept for reuse (about one ephemeris set per satellite of four
#: constellations, plus station messages); cleared whole when full.
_MISC_CACHE_SIZE = 256
#: Process-wide table of the immutable values held by the decoders' caches (decoded ephemerides
#: and station messages, and the payload bytes that key them): value → [the one kept object, how
#: many cache entries hold it]. Receivers of one network broadcast the same ephemerides, so every
#: station's cache, ephemeris store and last-set table holds one shared object per distinct value
#: instead of its own equal copy (~120 KiB per station on the demo). Content-keyed (equal values
#: only), so sharing cannot change a result; a value leaves when the last cache holding it is
#: cleared or its decoder is collected, so the table holds nothing the caches do not.
_SHARED: dict[Hashable, list[Any]] = {}
_H = TypeVar("_H", bound=Hashable)


def _share(value: _H) -> _H:
    """The process's kept object equal to ``value`` (``value`` itself if unhashable), counted as
    held by one more cache entry."""
    try:
        entry = _SHARED.get(value)
    except TypeError:  # a message holding arrays: not shared
        return value
    if entry is None:
        _SHARED[value] = [value, 1]
        return value
    entry[1] += 1
    return cast("_H", entry[0])


def _release(values: Iterable[object]) -> None:
    """Undo one :func:`_share` of each of ``values`` (the objects it returned)."""
    for value in values:
        try:
            entry = _SHARED.get(value)
        except TypeError:
            continue
        if entry is not None and entry[0] is value:
            entry[1] -= 1
            if entry[1] <= 0:
                del _SHARED[value]


def _release_cache(cache: dict[tuple[bytes, int], Message]) -> None:
    """Empty a decoder's cache of decoded messages, releasing its shared values."""
    _release([key[0] for key in cache])
    _release(cache.values())
    cache.clear()


#: Sentences that carry the UTC date (reference time for MSM times of week).
_DATE_SENTENCES = frozenset({"RMC", "ZDA"})


class StreamDecoder:
    """Decodes one receiver byte stream into epochs, ephemerides, station and NMEA messages."""

    def __init__(
        self,
        reference_time: GpsTime | None = None,
        *,
        emit_msm: bool = False,
        emit_nmea_other: bool = True,
    ) -> None:
        """``emit_msm`` also returns each :class:`MsmMessage` as it is decoded (diagnostics).
        ``emit_nmea_other=False`` drops the valid sentences that would come out as
        :class:`NmeaOther` (outside ``nmea_wanted``, or of a type we do not decode) after their
        checks, counted in ``statistics().nmea_skipped`` (for callers that ignore them anyway).
        """
        self._framer = Framer()
        self._ref = reference_time
        self._ref_source = "constructor" if reference_time is not None else ""
        self._emit_msm = emit_msm
        self._emit_nmea_other = emit_nmea_other
        self._glo_channels = new_glo_channel_table()
        self._open: _Epoch | None = None
        self._gsv = GsvAssembler()
        self._clock_votes: deque[tuple[int, GpsTime]] = deque(maxlen=4)
        self._corrections = 0
        self._held: deque[_Epoch] = deque()
        self._gps_1019_ref: GpsTime | None = None
        self._decoded: dict[int, int] = {}
        self._raw: dict[int, int] = {}
        self._errors: dict[int, int] = {}
        self._nmea_ok = 0
        self._nmea_skipped = 0
        self._nmea_err = 0
        self._last_error = ""
        self._epochs = 0
        self._unresolved = 0
        self._duplicates = 0
        #: Epochs closed during this feed, decoded together when it returns: (slot in the output
        #: list, epoch, time).
        self._pending: list[tuple[int, _Epoch, GpsTime]] = []
        #: NMEA sentence formatters decoded in full (e.g. {"GGA", "GST"}); other valid sentences
        #: pass through as NmeaOther after their checksum check, skipping the slow field parse.
        #: None = every type we know. RMC and ZDA are always decoded while no reference time is
        #: known, because the epoch times need the date.
        self.nmea_wanted: frozenset[str] | None = None
        self._misc_cache: dict[tuple[bytes, int], Message] = {}
        #: This stream's last masks and layout of each MSM type (see ``parse_msm_head``).
        self._msm_memo: MsmMemo = {}
        #: id → (Kepler ephemeris of the cache, its GPS time of ephemeris): a repeated ephemeris
        #: is the cache's same object, so ``_learn`` reuses its time (cleared with the cache).
        self._eph_refs: dict[int, tuple[KeplerEphemeris, GpsTime]] = {}
        # A collected decoder releases what its cache shared (the callback holds the cache only).
        weakref.finalize(self, _release_cache, self._misc_cache).atexit = False
        #: (reference, its GPS − UTC leap seconds): the reference changes once per epoch.
        self._leap_of: tuple[GpsTime | None, int] = (None, LEAP_NOW_S)
        # Message number → decoder (RTCM 10403.3 Table 3.5-1): MSM4–7 go to _on_msm (decoded a
        # whole epoch at a time), the rest to _rtcm_misc.DECODERS (they take a DecodeContext
        # carrying our current reference time).
        self._dispatch: dict[int, Callable[[bytes], Message]] = {
            t: functools.partial(self._decode_misc, dec) for t, dec in DECODERS.items()
        }

    # --- public -------------------------------------------------------------------------------
    def feed(self, data: bytes | bytearray | memoryview) -> list[Message]:
        """Add stream bytes; return every message they complete. ``b""`` ends the stream."""
        return self.feed_frames(self._framer.feed(data), end_of_stream=not data)

    def feed_frames(self, frames: Iterable[Frame], *, end_of_stream: bool = False) -> list[Message]:
        """Decode frames already split and checked by a :class:`Framer` the caller owns.

        ``end_of_stream`` closes the open epoch and counts epochs still waiting for a reference
        as unresolved (what ``feed(b"")`` does). The caller's framer keeps its own statistics;
        ``statistics().framer`` then describes only bytes given to :meth:`feed`.
        """
        out: list[Message] = []
        for frame in frames:
            if isinstance(frame, RtcmFrame):
                self._on_rtcm(frame, out)
            else:
                self._on_nmea(frame, out)
        if end_of_stream:
            self._close_open(out)
            while self._held:  # still no reference at the end: count, never guess
                self._held.popleft()
                self._unresolved += 1
        if self._pending:
            self._decode_pending(out)
        return out

    def statistics(self) -> StreamStatistics:
        return StreamStatistics(
            framer=self._framer.statistics(),
            decoded_by_type=MappingProxyType(dict(self._decoded)),
            raw_by_type=MappingProxyType(dict(self._raw)),
            decode_errors_by_type=MappingProxyType(dict(self._errors)),
            nmea_decoded=self._nmea_ok,
            nmea_skipped=self._nmea_skipped,
            nmea_errors=self._nmea_err,
            last_error=self._last_error,
            epochs=self._epochs,
            epochs_unresolved=self._unresolved,
            epochs_waiting=len(self._held) + (self._open is not None),
            duplicate_cells=self._duplicates,
            reference_source=self._ref_source,
            reference_corrections=self._corrections,
        )

    @property
    def reference_time(self) -> GpsTime | None:
        """The current reference (the last resolved epoch once there is one)."""
        return self._ref

    # --- RTCM ---------------------------------------------------------------------------------
    def _on_rtcm(self, frame: RtcmFrame, out: list[Message]) -> None:
        t = frame.msg_type
        if t in MSM_TYPES:
            try:
                head = parse_msm_head(frame.payload, self._msm_memo)
            except ParseError as exc:
                self._count_error(t, exc, frame.offset)
                return
            self._decoded[t] = self._decoded.get(t, 0) + 1
            self._on_msm(head, out)
            if self._emit_msm:  # the channel table already holds this message's DF419
                out.append(decode_msm(frame.payload, self._glo_channels))
            return
        decoder = self._dispatch.get(t)
        if decoder is None:
            self._raw[t] = self._raw.get(t, 0) + 1
            out.append(RawRtcm(msg_type=t, payload=frame.payload, offset=frame.offset))
            return
        # A repeated message: ``_decode_misc``'s cache hit (same key, same object), looked up
        # here without the two calls to get there (tests/test_decode_fixed_single.py).
        ref = self._ref
        msg = self._misc_cache.get((frame.payload, ref.week if ref is not None else -1))
        if msg is None:
            try:
                msg = decoder(frame.payload)
            except ParseError as exc:
                self._count_error(t, exc, frame.offset)
                return
        self._decoded[t] = self._decoded.get(t, 0) + 1
        self._learn(msg, out)
        out.append(msg)

    def _count_error(self, msg_type: int, exc: ParseError, offset: int) -> None:
        """A message that failed to decode: counted per type, the last one kept for statistics."""
        self._errors[msg_type] = self._errors.get(msg_type, 0) + 1
        self._last_error = f"{exc} at stream offset {offset}"

    def _decode_misc(
        self, decoder: Callable[[bytes, DecodeContext], object], payload: bytes
    ) -> Message:
        # Receivers repeat the same ephemeris and station messages every few seconds: an identical
        # payload under the same reference week decodes to the same (immutable) value, so reuse it.
        key = (payload, self._ref.week if self._ref is not None else -1)
        cached = self._misc_cache.get(key)
        if cached is not None:
            return cached
        # _rtcm_misc decoders return the typed messages listed in ``Message``.
        msg = cast("Message", decoder(payload, DecodeContext(reference_time=self._ref)))
        if len(self._misc_cache) >= _MISC_CACHE_SIZE:
            _release_cache(self._misc_cache)
            self._eph_refs.clear()
        self._misc_cache[(_share(payload), key[1])] = msg = _share(msg)
        return msg

    def _learn(self, msg: Message, out: list[Message]) -> None:
        """Channel table and reference time from ephemerides."""
        if isinstance(msg, KeplerEphemeris):  # the commonest (GPS, Galileo, BeiDou, QZSS)
            known = self._eph_refs.get(id(msg))
            if known is not None and known[0] is msg:  # held there: the id is still this object's
                ref = known[1]
            else:
                toe_gps = msg.toe_s + (BDS_GPS_OFFSET_S if msg.time_system == "BDT" else 0.0)
                ref = GpsTime(msg.week, 0.0) + toe_gps
                if len(self._eph_refs) >= _MISC_CACHE_SIZE:  # bounded like the cache
                    self._eph_refs.clear()
                self._eph_refs[id(msg)] = (msg, ref)
            source = _WEEK_SOURCES.get(msg.source) if isinstance(msg.source, int) else None
            if source is None:
                last = self._gps_1019_ref
                if msg.source == 1019 and (last is None or (ref is not last and ref > last)):
                    self._gps_1019_ref = ref
            elif self._ref is None:
                self._set_reference(ref, source, out)
            else:
                self._check_clock(msg.sat, ref, source, out)
        elif isinstance(msg, GlonassEphemeris):
            slot = msg.sat - 100
            if 0 < slot < self._glo_channels.shape[0] and -7 <= msg.channel <= 6:
                self._glo_channels[slot] = msg.channel

    def _check_clock(self, sat: int, ref: GpsTime, source: str, out: list[Message]) -> None:
        """Replace a reference (e.g. a Pi's unsynchronised clock) that two ephemerides contradict."""
        cur = self._ref
        assert cur is not None
        # abs(ref - cur), GpsTime.__sub__'s expression inlined (the same float operations)
        if (
            abs((ref.week - cur.week) * SECONDS_PER_WEEK + (ref.tow_s - cur.tow_s))
            <= _CLOCK_DISAGREEMENT_S
        ):
            self._clock_votes.clear()
            return
        agree = [r for s, r in self._clock_votes if s != sat and abs(r - ref) < _EPH_AGREE_S]
        self._clock_votes.append((sat, ref))
        if agree:
            self._clock_votes.clear()
            self._corrections += 1
            self._set_reference(ref, source, out)

    def _set_reference(self, ref: GpsTime, source: str, out: list[Message]) -> None:
        self._ref = ref
        self._ref_source = source
        while self._held:
            self._emit(self._held.popleft(), out)

    # --- MSM epochs ---------------------------------------------------------------------------
    def _leap(self) -> int:
        # Without a reference, grouping assumes today's 18 s (IERS Bulletin C, since 2017-01-01);
        # the epoch's time is resolved later with the leap second of its own date.
        ref = self._ref
        if ref is None:
            return LEAP_NOW_S
        last, leap = self._leap_of
        if last is not ref:
            leap = leap_at(ref)
            self._leap_of = (ref, leap)
        return leap

    def _on_msm(self, msg: MsmHead, out: list[Message]) -> None:
        system = msg.system
        if system == "R":  # only GLONASS times need the leap seconds
            learn_glo_channels(msg, self._glo_channels)
            sod = gps_ms_of_day(msg, self._leap())
        elif system == "C":  # gps_ms_of_day's BeiDou case, inlined (BDT = GPST - 14 s)
            sod = (msg.epoch_ms + BDS_OFFSET_MS) % WEEK_MS % DAY_MS
        else:  # ... and its GPS-aligned time of week case
            sod = msg.epoch_ms % WEEK_MS % DAY_MS
        ep = self._open
        if ep is not None:
            # circular_gap_ms(ep.sod, sod), inlined
            gap = abs(ep.sod - sod) % DAY_MS
            if ep.station != msg.station_id or min(gap, DAY_MS - gap) > SAME_EPOCH_TOLERANCE_MS:
                self._close_open(out)
                ep = None
        if ep is None:
            self._open = _Epoch(msg, sod)
        else:
            ep.msgs.append(msg)
        if not msg.multiple_message:  # DF393 = 0: last message of this epoch
            self._close_open(out)

    def _close_open(self, out: list[Message]) -> None:
        ep, self._open = self._open, None
        if ep is None:
            return
        if self._ref is None:
            self._held.append(ep)
            if len(self._held) > MAX_HELD_EPOCHS:
                self._held.popleft()
                self._unresolved += 1
            if len(self._held) >= _GPS_1019_FALLBACK_EPOCHS and self._gps_1019_ref is not None:
                self._set_reference(self._gps_1019_ref, "gps-1019", out)
            return
        self._emit(ep, out)

    def _emit(self, ep: _Epoch, out: list[Message]) -> None:
        assert self._ref is not None
        time = resolve_epoch(ep.msgs[0], self._ref, self._leap())  # leap_at(ref), kept per ref
        self._ref = time
        # The cells are decoded when this feed returns, with the other epochs it closed.
        self._pending.append((len(out), ep, time))
        out.append(_SLOT)
        self._epochs += 1

    def _decode_pending(self, out: list[Message]) -> None:
        pending, self._pending = self._pending, []
        epochs, duplicates = decode_epochs([(ep.msgs, time, ep.station) for _, ep, time in pending])
        for (slot, _, _), epoch in zip(pending, epochs, strict=True):
            out[slot] = epoch
        self._duplicates += duplicates

    # --- NMEA ---------------------------------------------------------------------------------
    def _on_nmea(self, frame: NmeaFrame, out: list[Message]) -> None:
        wanted = self.nmea_wanted
        if wanted is not None and self._ref is None:
            wanted = wanted | _DATE_SENTENCES
        if not self._emit_nmea_other and skipped_sentence(frame.raw, wanted):
            # decode_wanted would return None: counted as below, without its call chain
            self._nmea_ok += 1
            self._nmea_skipped += 1
            return
        try:
            # Our framer verified the checksum (NmeaFrame): not computed a second time. Without
            # emit_nmea_other, NmeaOther values are not even built (None, counted below).
            msg = decode_wanted(frame.raw, wanted, checked=True, keep_other=self._emit_nmea_other)
        except ParseError as exc:
            self._nmea_err += 1
            self._last_error = f"{exc} at stream offset {frame.offset}"
            return
        self._nmea_ok += 1
        if msg is None:
            self._nmea_skipped += 1
            return
        if isinstance(msg, GsvPart):  # GSV groups come out whole (one object per talker+signal)
            group = self._gsv.push(msg)
            if group is not None:
                out.append(group)
            return
        if self._ref is None and isinstance(msg, RmcFix | ZdaTime):
            valid = msg.valid if isinstance(msg, RmcFix) else True
            if valid and msg.date_utc is not None and msg.time_utc is not None:
                utc = _dt.datetime.combine(msg.date_utc, msg.time_utc, tzinfo=_dt.UTC)
                self._set_reference(utc_to_gps(utc), "nmea", out)
        out.append(msg)
