"""The MQTT outbound buffer: bounded FIFOs with counted overflow (STYLE rule 15).

* **alarm class** (alarm transitions, alarm states, station/daemon status): a large bound; kept
  and delivered in order after a reconnect. Past the bound the oldest is dropped and counted (and
  logged by the publisher) — losing a transition is a failure worth an error line.
* **epoch class** (per-epoch summaries), and its **bulk** part (satellite figures, health): each a
  small bound, drop-oldest, counted together as epoch drops. Fresh data matters more than old
  data, and MQTT v5 expiry makes old data worthless anyway.

Sending order: alarm class, then summaries, then bulk — so the large, rate-limited satellite
payloads of 20 stations never sit in front of the next second's summaries. Within a class the
order is kept. A message leaves the buffer only once the broker acknowledged it, so a broken link
re-sends it: at-least-once.

Pipelining: the publisher keeps a window of messages in flight. :meth:`OutboundBuffer.take` hands
out the next message not yet sent (in sending order) and marks it in flight — it stays queued;
:meth:`OutboundBuffer.pop` removes it once acknowledged; :meth:`OutboundBuffer.resend_all` (after a
broken link) makes every unacknowledged message "not yet sent" again, in its original order. Within
each FIFO the in-flight messages are its oldest ones (a prefix), so an overflow drops an in-flight
message first; its later acknowledgement is then a no-op.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from typing import TYPE_CHECKING

from ionwarden.daemon._records import fast_constructor

if TYPE_CHECKING:
    from ._topics import Topic

__all__ = ["OutboundBuffer", "OutboundMessage", "new_outbound_message"]


@dataclass(frozen=True, slots=True, kw_only=True)
class OutboundMessage:
    """One publish: topic, payload bytes, QoS, retain flag, MQTT v5 expiry (None = never), the
    buffer class (``alarm_class``; ``bulk`` for low-priority epoch data), and when it was queued
    (publisher's monotonic clock, s). A summary also carries its ``station`` and ``origin_s``: when
    the bytes that completed its epoch arrived (same clock; None when unknown), for the
    frame → acknowledgement latency."""

    topic: Topic
    payload: bytes
    qos: int
    retain: bool
    expiry_s: int | None = None
    alarm_class: bool = False
    bulk: bool = False
    queued_s: float = 0.0
    origin_s: float | None = None
    station: str = ""


#: ``OutboundMessage(**fields)`` with every field by keyword, for the per-epoch producers: the
#: same object without the frozen ``__init__``'s ``object.__setattr__`` per field (20.5k -> 4.2k
#: instructions per message under callgrind; the summary's formatting takes ~37k).
new_outbound_message = fast_constructor(OutboundMessage)


class OutboundBuffer:
    """Bounded FIFOs; ``put_nowait`` never blocks and never fails."""

    __slots__ = (
        "_alarm",
        "_bulk",
        "_epoch",
        "_queues",
        "_sent",
        "alarm_bound",
        "dropped_alarm",
        "dropped_epoch",
    )

    def __init__(self, *, alarm_bound: int, epoch_bound: int) -> None:
        self._alarm: deque[OutboundMessage] = deque()
        self.alarm_bound = alarm_bound
        self._epoch: deque[OutboundMessage] = deque(maxlen=epoch_bound)
        self._bulk: deque[OutboundMessage] = deque(maxlen=epoch_bound)
        #: The FIFOs in sending order, and how many of each one's oldest messages are in flight.
        self._queues = (self._alarm, self._epoch, self._bulk)
        self._sent = [0, 0, 0]
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

    @property
    def in_flight(self) -> int:
        """Messages handed out by :meth:`take` and not yet acknowledged (nor dropped)."""
        return sum(self._sent)

    @property
    def unsent(self) -> int:
        """Messages queued and not yet handed out by :meth:`take`."""
        return len(self) - self.in_flight

    def put_nowait(self, msg: OutboundMessage) -> bool:
        """Queue ``msg``; returns False when an older message was dropped to make room."""
        i = 0 if msg.alarm_class else 2 if msg.bulk else 1  # its FIFO (written inline: hot)
        q = self._queues[i]
        if i == 0:
            dropped = len(q) >= self.alarm_bound
            if dropped:
                q.popleft()
                self.dropped_alarm += 1
        else:
            dropped = len(q) == q.maxlen  # a full deque with maxlen drops its oldest itself
            if dropped:
                self.dropped_epoch += 1
        if dropped and self._sent[i]:
            self._sent[i] -= 1  # the oldest was in flight: its acknowledgement becomes a no-op
        q.append(msg)
        return not dropped

    def peek(self) -> OutboundMessage | None:
        """The oldest queued message in sending order (alarm class, then summaries, then bulk),
        left in place (sent or not)."""
        for q in self._queues:
            if q:
                return q[0]
        return None

    def take(self) -> OutboundMessage | None:
        """The next message not yet sent, in sending order, marked in flight (still queued)."""
        sent = self._sent
        for i, q in enumerate(self._queues):
            k = sent[i]
            if k < len(q):
                sent[i] = k + 1
                return q[k]
        return None

    def pop(self, msg: OutboundMessage) -> None:
        """Remove ``msg`` after it was acknowledged (a no-op if overflow already dropped it).

        Acknowledgements are expected oldest first within each FIFO (the publisher settles them in
        sending order)."""
        i = 0 if msg.alarm_class else 2 if msg.bulk else 1  # its FIFO (written inline: hot)
        q = self._queues[i]
        if q and q[0] is msg:
            q.popleft()
            if self._sent[i]:
                self._sent[i] -= 1

    def resend_all(self) -> None:
        """The link broke: every message in flight is unacknowledged, send it again (in order)."""
        self._sent = [0, 0, 0]
