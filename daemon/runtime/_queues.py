"""Bounded queues between stages, with overflow as a stated, counted policy (STYLE rule 15).

* ``DROP_OLDEST``: a full queue discards its oldest item to take the new one (live receiver bytes,
  per-epoch data: the freshest data matters most, and the decoder resynchronises after a gap).
* ``DROP_NEWEST``: a full queue refuses the new item.
* ``WAIT``: the producer waits (file replay and stdin: nothing is lost, the reader just slows down).

Every drop is counted; :meth:`BoundedQueue.statistics` returns a frozen snapshot for the exporter.
"""

from __future__ import annotations

import asyncio
import contextlib
import enum
from collections import deque
from dataclasses import dataclass
from typing import Generic, TypeVar

from ionwarden.daemon._records import fast_constructor

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


_new_queue_statistics = fast_constructor(QueueStatistics)


def _wake_next(waiters: deque[asyncio.Future[None]]) -> None:
    """Wake the first waiter not cancelled meanwhile (as ``asyncio.Queue`` does)."""
    while waiters:
        waiter = waiters.popleft()
        if not waiter.done():
            waiter.set_result(None)
            return


class BoundedQueue(Generic[T]):
    """A FIFO queue with an explicit bound, an overflow policy and counters.

    Waiting getters and (``WAIT``) putters follow ``asyncio.Queue``'s algorithm step for step
    (first come first served, a woken waiter that is cancelled hands its wake-up on), without its
    ``join``/``task_done`` bookkeeping, which nothing here uses: a put and a get are on the path
    of every chunk of every station."""

    __slots__ = (
        "_dropped",
        "_getters",
        "_items",
        "_maxsize",
        "_peak",
        "_policy_name",
        "_put",
        "_putters",
        "_stage",
        "_station",
        "_wait",
        "policy",
    )

    def __init__(self, maxsize: int, policy: Overflow, *, stage: str, station: str = ""):
        if maxsize < 1:
            raise ValueError(f"queue {stage}[{station}]: maxsize must be >= 1, got {maxsize}")
        self._items: deque[T] = deque()
        self._maxsize = maxsize
        self._getters: deque[asyncio.Future[None]] = deque()
        self._putters: deque[asyncio.Future[None]] = deque()
        self.policy = policy
        self._policy_name = policy.value  # (an enum's .value is a property: read once)
        self._wait = policy is Overflow.WAIT
        self._stage = stage
        self._station = station
        self._peak = 0
        self._put = 0
        self._dropped = 0

    def put_nowait(self, item: T) -> bool:
        """Enqueue without waiting; return False when the item (or the oldest one) was dropped.

        With the ``WAIT`` policy a full queue raises ``asyncio.QueueFull`` (use :meth:`put`).
        """
        items = self._items
        kept = True
        if len(items) >= self._maxsize:
            if self._wait:
                raise asyncio.QueueFull
            self._put += 1
            self._dropped += 1
            if self.policy is Overflow.DROP_NEWEST:
                return False
            kept = False
            items.popleft()
            _wake_next(self._putters)
        else:
            self._put += 1
        items.append(item)
        _wake_next(self._getters)
        self._peak = max(self._peak, len(items))
        return kept

    async def put(self, item: T) -> bool:
        """Enqueue; waits only with the ``WAIT`` policy. Returns as :meth:`put_nowait`."""
        if not self._wait:
            return self.put_nowait(item)
        items = self._items
        while len(items) >= self._maxsize:
            putter: asyncio.Future[None] = asyncio.get_running_loop().create_future()
            self._putters.append(putter)
            try:
                await putter
            except BaseException:
                putter.cancel()  # in case it is not done yet
                with contextlib.suppress(ValueError):  # a get may have taken it off already
                    self._putters.remove(putter)
                if len(items) < self._maxsize and not putter.cancelled():
                    _wake_next(self._putters)  # woken, but cannot take it: the next in line
                raise
        items.append(item)
        _wake_next(self._getters)
        self._put += 1
        self._peak = max(self._peak, len(items))
        return True

    async def get(self) -> T:
        items = self._items
        while not items:
            getter: asyncio.Future[None] = asyncio.get_running_loop().create_future()
            self._getters.append(getter)
            try:
                await getter
            except BaseException:
                getter.cancel()  # in case it is not done yet
                with contextlib.suppress(ValueError):  # a put may have taken it off already
                    self._getters.remove(getter)
                if items and not getter.cancelled():
                    _wake_next(self._getters)  # woken, but cannot take it: the next in line
                raise
        item = items.popleft()
        _wake_next(self._putters)
        return item

    def get_nowait(self) -> T:
        items = self._items
        if not items:
            raise asyncio.QueueEmpty
        item = items.popleft()
        _wake_next(self._putters)
        return item

    def qsize(self) -> int:
        return len(self._items)

    def empty(self) -> bool:
        return not self._items

    def statistics(self) -> QueueStatistics:
        return _new_queue_statistics(
            stage=self._stage,
            station=self._station,
            policy=self._policy_name,
            capacity=self._maxsize,
            depth=len(self._items),
            peak=self._peak,
            put_total=self._put,
            dropped_total=self._dropped,
        )
