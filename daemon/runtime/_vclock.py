"""An asyncio event loop on a virtual clock, for tests of time-dependent runtime logic.

Timers (``asyncio.sleep``, ``asyncio.timeout``, ``call_later``) run on ``loop.time()``, which here
is the real monotonic clock plus an offset. Whenever the loop would sleep longer than
``real_poll_s`` with nothing to do, it polls real I/O for ``real_poll_s`` (0.1 s by default: long
enough for loopback I/O on a loaded machine) and then jumps the offset to the next timer
("autojump"): a 30 s backoff or a 60 s stall limit passes in a fraction of a second while real
sockets, pipes and ptys still deliver their data. Nothing in production uses it.
"""

from __future__ import annotations

import asyncio
import selectors
import time
from typing import TYPE_CHECKING, Any, TypeVar

if TYPE_CHECKING:
    from collections.abc import Coroutine

__all__ = ["VirtualClockLoop", "run_virtual"]

T = TypeVar("T")


class _JumpingSelector:
    def __init__(self, inner: selectors.BaseSelector, loop: VirtualClockLoop, real_poll_s: float):
        self._inner = inner
        self._loop = loop
        self._poll = real_poll_s

    def select(self, timeout: float | None = None) -> list[tuple[selectors.SelectorKey, int]]:
        if timeout is None or timeout <= self._poll:
            return self._inner.select(timeout)
        events = self._inner.select(self._poll)
        if not events:
            self._loop.offset_s += timeout - self._poll
        return events

    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)


class VirtualClockLoop(asyncio.SelectorEventLoop):
    """``SelectorEventLoop`` whose clock jumps over idle time (see the module docstring)."""

    def __init__(self, real_poll_s: float = 0.1):
        self.offset_s = 0.0
        inner = selectors.DefaultSelector()
        super().__init__(inner)
        self._selector = _JumpingSelector(inner, self, real_poll_s)

    def time(self) -> float:
        return time.monotonic() + self.offset_s


def run_virtual(coro: Coroutine[Any, Any, T], *, real_poll_s: float = 0.1) -> T:
    """``asyncio.run`` on a :class:`VirtualClockLoop`."""
    with asyncio.Runner(loop_factory=lambda: VirtualClockLoop(real_poll_s)) as runner:
        return runner.run(coro)
