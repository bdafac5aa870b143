"""Bounded queues between stages, with overflow as a stated, counted policy (STYLE rule 15).

* ``DROP_OLDEST``: a full queue discards its oldest item to take the new one (live receiver bytes,
  per-epoch data: the freshest data matters most, and the decoder resynchronises after a gap).
* ``DROP_NEWEST``: a full queue refuses the new item.
* ``WAIT``: the producer waits (file replay and stdin: nothing is lost, the reader just slows down).

Every drop is counted; :meth:`BoundedQueue.statistics` returns a frozen snapshot for the exporter.
"""

from __future__ import annotations

import asyncio
import enum
from dataclasses import dataclass
from typing import Generic, TypeVar

__all__ = ["BoundedQueue", "Overflow", "QueueStatistics"]

T = TypeVar("T")


class Overflow(enum.Enum):
    DROP_OLDEST = "drop-oldest"
    DROP_NEWEST = "drop-newest"
    WAIT = "wait"


@dataclass(frozen=True, slots=True, kw_only=True)
class QueueStatistics:
    """One queue now: ``depth`` items waiting of ``capacity``; ``peak`` is the highest depth seen."""

    stage: str
    station: str
    policy: str
    capacity: int
    depth: int
    peak: int
    put_total: int
    dropped_total: int


class BoundedQueue(Generic[T]):
    """An ``asyncio.Queue`` with an explicit bound, an overflow policy and counters."""

    def __init__(self, maxsize: int, policy: Overflow, *, stage: str, station: str = ""):
        if maxsize < 1:
            raise ValueError(f"queue {stage}[{station}]: maxsize must be >= 1, got {maxsize}")
        self._q: asyncio.Queue[T] = asyncio.Queue(maxsize)
        self.policy = policy
        self._stage = stage
        self._station = station
        self._peak = 0
        self._put = 0
        self._dropped = 0

    def put_nowait(self, item: T) -> bool:
        """Enqueue without waiting; return False when the item (or the oldest one) was dropped.

        With the ``WAIT`` policy a full queue raises ``asyncio.QueueFull`` (use :meth:`put`).
        """
        self._put += 1
        kept = True
        if self._q.full():
            if self.policy is Overflow.WAIT:
                self._put -= 1
                raise asyncio.QueueFull
            self._dropped += 1
            kept = False
            if self.policy is Overflow.DROP_NEWEST:
                return False
            self._q.get_nowait()
            self._q.task_done()
        self._q.put_nowait(item)
        self._peak = max(self._peak, self._q.qsize())
        return kept

    async def put(self, item: T) -> bool:
        """Enqueue; waits only with the ``WAIT`` policy. Returns as :meth:`put_nowait`."""
        if self.policy is Overflow.WAIT:
            await self._q.put(item)
            self._put += 1
            self._peak = max(self._peak, self._q.qsize())
            return True
        return self.put_nowait(item)

    async def get(self) -> T:
        item = await self._q.get()
        self._q.task_done()
        return item

    def get_nowait(self) -> T:
        item = self._q.get_nowait()
        self._q.task_done()
        return item

    def qsize(self) -> int:
        return self._q.qsize()

    def empty(self) -> bool:
        return self._q.empty()

    def statistics(self) -> QueueStatistics:
        return QueueStatistics(
            stage=self._stage,
            station=self._station,
            policy=self.policy.value,
            capacity=self._q.maxsize,
            depth=self._q.qsize(),
            peak=self._peak,
            put_total=self._put,
            dropped_total=self._dropped,
        )
