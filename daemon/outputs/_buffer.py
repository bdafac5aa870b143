"""The MQTT outbound buffer: two bounded FIFOs with counted overflow (STYLE rule 15).

* **alarm class** (alarm transitions, alarm states, station/daemon status): a large bound; kept
  and delivered in order after a reconnect. Past the bound the oldest is dropped and counted (and
  logged by the publisher) — losing a transition is a failure worth an error line.
* **epoch class** (summaries, satellite figures, health): a small bound, drop-oldest, counted.
  Fresh data matters more than old data, and MQTT v5 expiry makes old data worthless anyway.

The alarm class drains first. A message leaves the buffer only once the broker acknowledged it
(the publisher peeks, publishes, then pops), so a broken link re-sends it: at-least-once.
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
    buffer class, and when it was queued (publisher's monotonic clock, s)."""

    topic: Topic
    payload: bytes
    qos: int
    retain: bool
    expiry_s: int | None = None
    alarm_class: bool = False
    queued_s: float = 0.0


class OutboundBuffer:
    """Two bounded FIFOs; ``put_nowait`` never blocks and never fails."""

    __slots__ = ("_alarm", "_epoch", "alarm_bound", "dropped_alarm", "dropped_epoch")

    def __init__(self, *, alarm_bound: int, epoch_bound: int) -> None:
        self._alarm: deque[OutboundMessage] = deque()
        self.alarm_bound = alarm_bound
        self._epoch: deque[OutboundMessage] = deque(maxlen=epoch_bound)
        self.dropped_alarm = 0
        self.dropped_epoch = 0

    def __len__(self) -> int:
        return len(self._alarm) + len(self._epoch)

    @property
    def alarm_depth(self) -> int:
        return len(self._alarm)

    @property
    def epoch_depth(self) -> int:
        return len(self._epoch)

    def put_nowait(self, msg: OutboundMessage) -> bool:
        """Queue ``msg``; returns False when an older message was dropped to make room."""
        if msg.alarm_class:
            dropped = len(self._alarm) >= self.alarm_bound
            if dropped:
                self._alarm.popleft()
                self.dropped_alarm += 1
            self._alarm.append(msg)
            return not dropped
        dropped = len(self._epoch) == self._epoch.maxlen
        if dropped:
            self.dropped_epoch += 1
        self._epoch.append(msg)  # a full deque with maxlen drops its oldest itself
        return not dropped

    def peek(self) -> OutboundMessage | None:
        """The next message to send (alarm class first), left in place."""
        if self._alarm:
            return self._alarm[0]
        if self._epoch:
            return self._epoch[0]
        return None

    def pop(self, msg: OutboundMessage) -> None:
        """Remove ``msg`` after it was acknowledged (a no-op if overflow already dropped it)."""
        q = self._alarm if msg.alarm_class else self._epoch
        if q and q[0] is msg:
            q.popleft()
