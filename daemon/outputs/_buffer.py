"""The MQTT outbound buffer: bounded FIFOs with counted overflow (STYLE rule 15).

* **alarm class** (alarm transitions, alarm states, station/daemon status): a large bound; kept
  and delivered in order after a reconnect. Past the bound the oldest is dropped and counted (and
  logged by the publisher) — losing a transition is a failure worth an error line.
* **epoch class** (per-epoch summaries), and its **bulk** part (satellite figures, health): each a
  small bound, drop-oldest, counted together as epoch drops. Fresh data matters more than old
  data, and MQTT v5 expiry makes old data worthless anyway.

Sending order: alarm class, then summaries, then bulk — so the large, rate-limited satellite
payloads of 20 stations never sit in front of the next second's summaries. Within a class the
order is kept. A message leaves the buffer only once the broker acknowledged it (the publisher
peeks, publishes, then pops), so a broken link re-sends it: at-least-once.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ._topics import Topic

__all__ = ["OutboundBuffer", "OutboundMessage"]


@dataclass(frozen=True, slots=True, kw_only=True)
class OutboundMessage:
    """One publish: topic, payload bytes, QoS, retain flag, MQTT v5 expiry (None = never), the
    buffer class (``alarm_class``; ``bulk`` for low-priority epoch data), and when it was queued
    (publisher's monotonic clock, s)."""

    topic: Topic
    payload: bytes
    qos: int
    retain: bool
    expiry_s: int | None = None
    alarm_class: bool = False
    bulk: bool = False
    queued_s: float = 0.0


class OutboundBuffer:
    """Bounded FIFOs; ``put_nowait`` never blocks and never fails."""

    __slots__ = ("_alarm", "_bulk", "_epoch", "alarm_bound", "dropped_alarm", "dropped_epoch")

    def __init__(self, *, alarm_bound: int, epoch_bound: int) -> None:
        self._alarm: deque[OutboundMessage] = deque()
        self.alarm_bound = alarm_bound
        self._epoch: deque[OutboundMessage] = deque(maxlen=epoch_bound)
        self._bulk: deque[OutboundMessage] = deque(maxlen=epoch_bound)
        self.dropped_alarm = 0
        self.dropped_epoch = 0

    def __len__(self) -> int:
        return len(self._alarm) + len(self._epoch) + len(self._bulk)

    @property
    def alarm_depth(self) -> int:
        return len(self._alarm)

    @property
    def epoch_depth(self) -> int:
        return len(self._epoch) + len(self._bulk)

    def _queue(self, msg: OutboundMessage) -> deque[OutboundMessage]:
        if msg.alarm_class:
            return self._alarm
        return self._bulk if msg.bulk else self._epoch

    def put_nowait(self, msg: OutboundMessage) -> bool:
        """Queue ``msg``; returns False when an older message was dropped to make room."""
        q = self._queue(msg)
        if msg.alarm_class:
            dropped = len(q) >= self.alarm_bound
            if dropped:
                q.popleft()
                self.dropped_alarm += 1
        else:
            dropped = len(q) == q.maxlen  # a full deque with maxlen drops its oldest itself
            if dropped:
                self.dropped_epoch += 1
        q.append(msg)
        return not dropped

    def peek(self) -> OutboundMessage | None:
        """The next message to send (alarm class, then summaries, then bulk), left in place."""
        for q in (self._alarm, self._epoch, self._bulk):
            if q:
                return q[0]
        return None

    def pop(self, msg: OutboundMessage) -> None:
        """Remove ``msg`` after it was acknowledged (a no-op if overflow already dropped it)."""
        q = self._queue(msg)
        if q and q[0] is msg:
            q.popleft()
