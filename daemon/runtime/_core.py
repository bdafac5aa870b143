"""What one station's estimate task drives: bytes in, outputs out (sync, never blocks).

:class:`StationCore` is the small protocol the runtime needs; :class:`FramingCore` is the real one:
the sans-IO framer from ``ionwarden.parsers`` splits the stream into checked frames, and an optional
:class:`FrameConsumer` (the estimator's station pipeline) turns frames into ``StationSnapshot`` and
``FixStatus`` values. Without a consumer the core frames and counts, and produces no figures: the
runtime never invents results.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

from ionwarden.daemon._records import fast_constructor
from ionwarden.parsers import MSM_TYPES
from ionwarden.parsers._framer import MAX_INCOMPLETE_FRAME, Framer, RtcmFrame

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping, Sequence

    from ionwarden.parsers._framer import Frame

__all__ = ["DecoderCounts", "FrameConsumer", "FramingCore", "StationCore"]

_RTCM_MAX_FRAME = MAX_INCOMPLETE_FRAME  # RTCM 10403.3 Table 4-1: at most 3 + 1023 + 3 bytes
_SENTENCE_START = frozenset(b"$!")  # NMEA 0183 §5.3: a sentence starts with "$" or "!"
_CUT_TRIES = 16  # 0xD3 bytes _tail_cut looks at, at most (a flood of them is junk: no cut)
#: Bytes of the last cut's sentence start that ``FramingCore`` looks for in the next chunk.
_HINT_BYTES = 6


@dataclass(frozen=True, slots=True, kw_only=True)
class DecoderCounts:
    """Framing counters of one station since start (totals across reconnects)."""

    frames_total: int = 0
    rtcm_frames_total: int = 0
    nmea_frames_total: int = 0
    crc_errors_total: int = 0
    checksum_errors_total: int = 0
    discarded_bytes_total: int = 0
    truncated_frames_total: int = 0


class StationCore(Protocol):
    def feed(self, data: bytes, /) -> Sequence[object]:
        """Decode ``data``; return the outputs it completed (snapshots, fixes)."""
        ...

    def end_stream(self) -> Sequence[object]:
        """The byte stream ended or broke: drop any partial frame (counted); more may follow."""
        ...

    def counts(self) -> DecoderCounts: ...

    def frames_total(self) -> int:
        """``counts().frames_total``, cheaply (the estimate loop reads it around every chunk)."""
        ...

    def reset(self) -> None:
        """Start afresh after repeated pipeline failures: drop the partial frame and the
        estimator's state (counters are kept)."""
        ...

    def unsettled(self) -> bool:
        """Deferred work is pending (see :meth:`settle`)."""
        ...

    def settle(self) -> Sequence[object]:
        """Do the work deferred from the last ``feed`` (the estimator's periodic receiver-bias
        fit, the messages after the chunk's last epoch) and return the outputs it completes; the
        next ``feed`` does it first when this was not called, so results never depend on it."""
        ...

    def slack_after_s(self) -> float | None:
        """Deferred work that :meth:`settle` leaves pending waits for :meth:`settle_slack` (or
        the next ``feed``): how long after the step's bytes arrived it may wait; None: none."""
        ...

    def settle_slack(self) -> Sequence[object]:
        """Do all deferred work, :meth:`settle`'s and the slack, and return its outputs."""
        ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: Mapping[str, Any], /) -> None: ...


class FrameConsumer(Protocol):
    """The estimator side: checked frames in, outputs out (the station pipeline). A consumer may
    also have ``unsettled()`` and ``settle()``, and ``slack_after_s()`` and ``settle_slack()``
    (as :class:`StationCore`), which the core forwards."""

    def feed_frames(self, frames: Sequence[Frame], /) -> Sequence[object]: ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: Mapping[str, Any], /) -> None: ...


#: ``DecoderCounts(**fields)``, every field given (the status tick takes one per station each
#: second): without the frozen ``__init__``'s ``object.__setattr__`` per field.
_new_decoder_counts = fast_constructor(DecoderCounts)


def _add_framer(a: DecoderCounts, framer: Framer) -> DecoderCounts:
    """``a`` plus the framer's counts, read from its ``totals()`` (the counters of its
    ``statistics()``, without the copy of its per-type table and the frozen record: the status
    tick takes a station's counts every second)."""
    rtcm, nmea, _empty, crc, nmea_fail, truncated, discarded, _total = framer.totals()
    return _new_decoder_counts(
        frames_total=a.frames_total + rtcm + nmea,
        rtcm_frames_total=a.rtcm_frames_total + rtcm,
        nmea_frames_total=a.nmea_frames_total + nmea,
        crc_errors_total=a.crc_errors_total + crc,
        checksum_errors_total=a.checksum_errors_total + nmea_fail,
        discarded_bytes_total=a.discarded_bytes_total + discarded,
        truncated_frames_total=a.truncated_frames_total + truncated,
    )


def _after_last_epoch(frames: Sequence[Frame]) -> int:
    """Index just after the last frame that closes an observation epoch: an MSM whose
    multiple-message bit (DF393, bit 54 of the message: RTCM 10403.3 §3.5.12, Table 3.5-78) is 0;
    0 when none does."""
    for k in range(len(frames) - 1, -1, -1):
        f = frames[k]
        if type(f) is RtcmFrame and f.msg_type in MSM_TYPES:
            p = f.payload
            if len(p) > 6 and not p[6] & 0x02:
                return k + 1
    return 0


def _tail_cut(data: bytes) -> int:
    """Where the bytes of ``data`` that can hold no RTCM 3 frame start (``len(data)``: nowhere).

    An RTCM 3 frame starts with the preamble 0xD3 (RTCM 10403.3 §4, Table 4-1), and NMEA 0183
    sentences are printable 7-bit ASCII (NMEA 0183 §5.1, §5.3), so past the chunk's last 0xD3 only
    sentences and junk remain. Any cut past it is safe (``FramingCore.feed`` checks the rest);
    this one aims at the end of the frame that 0xD3 is in: of the 0xD3 from there back whose
    10-bit length (reserved bits zero) ends a frame past it within the chunk, the nearest one
    followed by a sentence's ``$``/``!`` (a 0xD3 in a payload or CRC rarely is), else the nearest.
    """
    n = len(data)
    last = j = data.rfind(0xD3)
    lo = max(0, last - _RTCM_MAX_FRAME + 1)  # the start of a frame holding ``last``, at the most
    cut = n
    for _ in range(_CUT_TRIES):
        if j < lo:
            break
        if j + 3 <= n and not data[j + 1] & 0xFC:
            end = j + 6 + (((data[j + 1] & 0x03) << 8) | data[j + 2])
            if last < end <= n:
                if end == n or data[end] in _SENTENCE_START:
                    return end
                if cut == n:
                    cut = end
        j = data.rfind(0xD3, lo, j)
    return cut


def _frame_end(frame: Frame) -> int:
    """Stream offset just after ``frame``: RTCM 3 adds 3 header and 3 CRC bytes to the message."""
    if isinstance(frame, RtcmFrame):
        return frame.offset + len(frame.payload) + 6
    return frame.offset + len(frame.raw)


class FramingCore:
    """The framer, restarted on each new connection, plus an optional frame consumer.

    ``rebuild`` makes a fresh consumer for :meth:`reset`; without it a reset restarts the framer
    only. ``defer`` (with a consumer that settles, ``StationPipeline(defer=True)``): the frames
    after a chunk's last epoch (typically its NMEA sentences) are decoded by :meth:`settle`
    instead of :meth:`feed`, after the consumer's own deferred work, so a burst of stations
    publishes its snapshots sooner; the order of everything the consumer sees is unchanged.

    With ``defer`` the bytes of such a chunk past its last 0xD3 and the RTCM frame holding it
    (:func:`_tail_cut`) are not even framed by :meth:`feed` but by :meth:`settle` (or the next
    ``feed``, ``end_stream``, ``reset``), when the framed part already holds the chunk's epoch and
    the framer holds no 0xD3 waiting for more bytes: those bytes then hold no RTCM 3 frame, hence
    no epoch, and all their frames would have been held for :meth:`settle` anyway. The framer
    gives the same frames for any cutting of the stream, so the frames the consumer gets, in
    which calls, and the counters once settled are those of framing the whole chunk at once;
    between ``feed`` and ``settle``, :meth:`counts` and :meth:`frames_total` lag by the held
    bytes' frames (``feed`` still counts at least the epoch's frame).
    """

    def __init__(
        self,
        consumer: FrameConsumer | None = None,
        *,
        rebuild: Callable[[], FrameConsumer] | None = None,
        defer: bool = False,
    ):
        self._defer = defer
        self._later: list[Frame] = []  # frames held for settle()
        self._tail = b""  # bytes held for settle(), not framed yet (no 0xD3 in them)
        self._hint = b""  # the first bytes after the last chunk's cut (see _cut)
        self._framer = Framer()
        self._fed = 0  # bytes given to this framer: the stream offset of the next byte
        self._done = DecoderCounts()  # counts of framers already ended
        self._consumer = consumer
        self._rebuild = rebuild
        self._hold = False
        self._bind_settle()
        self._frames_total = 0  # every frame the framers returned (= their RTCM + NMEA counts)

    def _frame(self, data: bytes) -> list[Frame]:
        """Frame ``data`` (``b""`` ends the stream), counted."""
        frames = self._framer.feed(data)
        self._fed += len(data)
        self._frames_total += len(frames)
        return frames

    def _held(self) -> list[Frame]:
        """Take the held frames, then the frames of the held bytes, in stream order."""
        frames, self._later = self._later, []
        tail, self._tail = self._tail, b""
        if tail:
            frames += self._frame(tail)
        return frames

    def feed(self, data: bytes, /) -> Sequence[object]:
        frames = self._held() if self._later or self._tail else []
        consumer = self._consumer
        n = len(data)
        cut = self._cut(data) if self._defer and consumer is not None else n
        k = -1  # index after the last epoch of ``frames``; -1: not looked for yet
        if cut < n:
            start = self._fed
            head = self._frame(data[:cut])
            frames += head
            k = _after_last_epoch(frames)
            # The held frames and bytes hold no epoch, so k > 0 means one in ``head``. The
            # framer holds the bytes after its last frame at most: if they and the rest of the
            # chunk have no 0xD3, the rest frames into sentences only, all after the epoch.
            rest = _frame_end(head[-1]) - start if k and head else -1
            if rest >= 0 and data.find(0xD3, rest, cut) < 0:
                self._tail = data[cut:]
            else:
                frames += self._frame(data[cut:])
                k = -1
        else:
            frames += self._frame(data)
        if consumer is None or not frames:
            return ()
        if self._defer:
            if k < 0:
                k = _after_last_epoch(frames)
            if 0 < k < len(frames):
                self._later = frames[k:]
                frames = frames[:k]
        return consumer.feed_frames(frames)

    def _cut(self, data: bytes) -> int:
        """Where ``feed`` stops framing ``data``: past its last 0xD3, like :func:`_tail_cut`.

        A receiver sends the same sentence first after its frames every second: the first bytes
        after the last chunk's cut, found past this chunk's last 0xD3, make a cut at once (any
        cut past it is safe, see :func:`_tail_cut`; one inside a frame only makes ``feed`` frame
        the rest as well). Otherwise :func:`_tail_cut`, and its cut's first bytes are kept.
        """
        hint = self._hint
        last = data.rfind(0xD3)
        if hint and last >= 0:
            at = data.find(hint, last + 1)
            if at >= 0:
                return at
        cut = _tail_cut(data)
        self._hint = data[cut : cut + _HINT_BYTES]
        return cut

    def end_stream(self) -> Sequence[object]:
        frames = self._held()
        frames += self._frame(b"")
        self._done = _add_framer(self._done, self._framer)
        self._framer = Framer()
        self._fed = 0
        if self._consumer is None or not frames:
            return ()
        return self._consumer.feed_frames(frames)

    def counts(self) -> DecoderCounts:
        return _add_framer(self._done, self._framer)

    def _bind_settle(self) -> None:
        c = self._consumer
        self._unsettled: Callable[[], bool] | None = getattr(c, "unsettled", None)
        self._settle: Callable[[], Sequence[object]] | None = getattr(c, "settle", None)
        self._slack_after: Callable[[], float | None] | None = getattr(c, "slack_after_s", None)
        self._settle_slack: Callable[[], Sequence[object]] | None = getattr(c, "settle_slack", None)

    def unsettled(self) -> bool:
        return (
            bool(self._later)
            or bool(self._tail)
            or (self._unsettled is not None and self._unsettled())
        )

    def settle(self) -> Sequence[object]:
        # The held frames first (the consumer settles its own deferred part before routing
        # them), then whatever the consumer still has to do (its look-ahead work last).
        later = self._held()
        out = (
            list(self._consumer.feed_frames(later)) if later and self._consumer is not None else []
        )
        if self._settle is not None:
            out.extend(self._settle())
        return out

    def slack_after_s(self) -> float | None:
        return None if self._slack_after is None else self._slack_after()

    def settle_slack(self) -> Sequence[object]:
        out = list(self.settle()) if self.unsettled() else []
        if self._settle_slack is not None:
            out.extend(self._settle_slack())
        return out

    def frames_total(self) -> int:
        return self._frames_total

    def hold_epochs(self) -> bool:
        """Have the consumer hold each chunk's last epoch for the daemon's batched tick (a
        ``StationPipeline``'s ``hold``, also after a reset rebuilds it); False when it cannot."""
        if self._consumer is None or not hasattr(self._consumer, "take_held"):
            return False
        self._hold = True
        self._consumer.hold = True  # type: ignore[attr-defined]
        return True

    def holding(self) -> bool:
        """The consumer holds an epoch for the tick (see :meth:`hold_epochs`)."""
        return self._hold and self._consumer.holding  # type: ignore[union-attr]

    @property
    def consumer(self) -> FrameConsumer | None:
        return self._consumer

    def reset(self) -> None:
        self._held()  # framed and counted as feed would have, then dropped (as held frames are)
        self._done = _add_framer(self._done, self._framer)
        self._framer = Framer()
        self._fed = 0
        if self._rebuild is not None:
            self._consumer = self._rebuild()
            self._bind_settle()
            if self._hold:
                self._consumer.hold = True  # type: ignore[attr-defined]

    def state_dict(self) -> dict[str, Any]:
        return {} if self._consumer is None else self._consumer.state_dict()

    def load_state_dict(self, state: Mapping[str, Any], /) -> None:
        if self._consumer is not None:
            self._consumer.load_state_dict(state)
