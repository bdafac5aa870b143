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

from ionwarden.parsers import MSM_TYPES
from ionwarden.parsers._framer import Framer, FramerStatistics, RtcmFrame

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping, Sequence

    from ionwarden.parsers._framer import Frame

__all__ = ["DecoderCounts", "FrameConsumer", "FramingCore", "StationCore"]


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

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: Mapping[str, Any], /) -> None: ...


class FrameConsumer(Protocol):
    """The estimator side: checked frames in, outputs out (the station pipeline). A consumer may
    also have ``unsettled()`` and ``settle()`` (as :class:`StationCore`), which the core
    forwards."""

    def feed_frames(self, frames: Sequence[Frame], /) -> Sequence[object]: ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: Mapping[str, Any], /) -> None: ...


def _add(a: DecoderCounts, s: FramerStatistics) -> DecoderCounts:
    return DecoderCounts(
        frames_total=a.frames_total + s.rtcm_frames + s.nmea_frames,
        rtcm_frames_total=a.rtcm_frames_total + s.rtcm_frames,
        nmea_frames_total=a.nmea_frames_total + s.nmea_frames,
        crc_errors_total=a.crc_errors_total + s.crc_failures,
        checksum_errors_total=a.checksum_errors_total + s.nmea_checksum_failures,
        discarded_bytes_total=a.discarded_bytes_total + s.bytes_discarded,
        truncated_frames_total=a.truncated_frames_total + s.truncated_at_eof,
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


class FramingCore:
    """The framer, restarted on each new connection, plus an optional frame consumer.

    ``rebuild`` makes a fresh consumer for :meth:`reset`; without it a reset restarts the framer
    only. ``defer`` (with a consumer that settles, ``StationPipeline(defer=True)``): the frames
    after a chunk's last epoch (typically its NMEA sentences) are decoded by :meth:`settle`
    instead of :meth:`feed`, after the consumer's own deferred work, so a burst of stations
    publishes its snapshots sooner; the order of everything the consumer sees is unchanged.
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
        self._framer = Framer()
        self._done = DecoderCounts()  # counts of framers already ended
        self._consumer = consumer
        self._rebuild = rebuild
        self._bind_settle()
        self._frames_total = 0  # every frame the framers returned (= their RTCM + NMEA counts)

    def feed(self, data: bytes, /) -> Sequence[object]:
        frames = self._framer.feed(data)
        self._frames_total += len(frames)
        if self._later:
            frames = self._later + frames
            self._later = []
        if self._consumer is None or not frames:
            return ()
        if self._defer:
            k = _after_last_epoch(frames)
            if 0 < k < len(frames):
                self._later = frames[k:]
                frames = frames[:k]
        return self._consumer.feed_frames(frames)

    def end_stream(self) -> Sequence[object]:
        frames = self._framer.feed(b"")
        self._frames_total += len(frames)
        self._done = _add(self._done, self._framer.statistics())
        self._framer = Framer()
        if self._later:
            frames = self._later + frames
            self._later = []
        if self._consumer is None or not frames:
            return ()
        return self._consumer.feed_frames(frames)

    def counts(self) -> DecoderCounts:
        return _add(self._done, self._framer.statistics())

    def _bind_settle(self) -> None:
        c = self._consumer
        self._unsettled: Callable[[], bool] | None = getattr(c, "unsettled", None)
        self._settle: Callable[[], Sequence[object]] | None = getattr(c, "settle", None)

    def unsettled(self) -> bool:
        return bool(self._later) or (self._unsettled is not None and self._unsettled())

    def settle(self) -> Sequence[object]:
        # The held frames first (the consumer settles its own deferred part before routing
        # them), then whatever the consumer still has to do (its look-ahead work last).
        later, self._later = self._later, []
        out = (
            list(self._consumer.feed_frames(later)) if later and self._consumer is not None else []
        )
        if self._settle is not None:
            out.extend(self._settle())
        return out

    def frames_total(self) -> int:
        return self._frames_total

    def reset(self) -> None:
        self._done = _add(self._done, self._framer.statistics())
        self._framer = Framer()
        self._later = []
        if self._rebuild is not None:
            self._consumer = self._rebuild()
            self._bind_settle()

    def state_dict(self) -> dict[str, Any]:
        return {} if self._consumer is None else self._consumer.state_dict()

    def load_state_dict(self, state: Mapping[str, Any], /) -> None:
        if self._consumer is not None:
            self._consumer.load_state_dict(state)
