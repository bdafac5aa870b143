"""The link between the main process and its workers (``[runtime] workers`` > 1).

One Unix stream socket pair per worker, made by the main process with ``socketpair()``; the worker
inherits its end (``pass_fds``) and is told the descriptor on its command line. Messages are
length-prefixed pickles (a 4-byte big-endian length, then ``pickle`` protocol 5). Pickle is safe
here only because nothing else can reach the socket: it is never bound to a path, and both ends
belong to one service running one program; the link carries our own records (snapshots with numpy
arrays, alarm statuses), which JSON would flatten at a cost on every tick.

What crosses it:

* main → worker: :class:`Assign` (the worker's stations; the first one starts it, later ones are a
  reload);
* worker → main: :class:`Notify` (what the worker would have told systemd: ``READY=1``,
  ``STATUS=…``, ``WATCHDOG=1``, ``STOPPING=1``, ``RELOADING=1``) and :class:`Report` (once per status
  tick: the worker's snapshot for the exporter and the health message, and the epoch latencies
  observed since the last report, for the exporter's histogram).

A worker whose link reaches end-of-file (the main process died) stops: see ``cli/_run.py``.
"""

from __future__ import annotations

import asyncio
import contextlib
import pickle
import struct
from dataclasses import dataclass
from typing import TYPE_CHECKING

from ._notify import SdNotifier

if TYPE_CHECKING:
    import socket

    from ionwarden.daemon.outputs import DaemonSnapshot

__all__ = ["MAX_MESSAGE_BYTES", "Assign", "Link", "LinkNotifier", "LinkSink", "Notify", "Report"]

_HEADER = struct.Struct(">I")
#: Largest message accepted (a snapshot of 100 stations × 100 satellites is ~2 MB); past it the
#: link is broken (a bug or a corrupted stream), never allocated.
MAX_MESSAGE_BYTES = 64 << 20


@dataclass(frozen=True, slots=True)
class Assign:
    """The stations (config names) a worker runs; ``worker`` is its index (0-based)."""

    stations: tuple[str, ...]
    worker: int = 0


@dataclass(frozen=True, slots=True)
class Notify:
    """Fields a worker would have sent to systemd (sd_notify(3) lines)."""

    fields: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Report:
    """A worker's status tick: its snapshot, and ``(station, seconds)`` epoch latencies since the
    last report."""

    snapshot: DaemonSnapshot
    latencies: tuple[tuple[str, float], ...] = ()


class LinkError(Exception):
    """The link carried something that is not a message of ours (never expected)."""


class Link:
    """One end of the socket pair, on the running event loop."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self._reader = reader
        self._writer = writer

    @classmethod
    async def open(cls, sock: socket.socket) -> Link:
        reader, writer = await asyncio.open_unix_connection(sock=sock)
        return cls(reader, writer)

    def send(self, message: Assign | Notify | Report) -> None:
        """Queue ``message`` (never blocks; a closed link drops it: the peer is gone)."""
        if self._writer.is_closing():
            return
        data = pickle.dumps(message, protocol=5)
        self._writer.write(_HEADER.pack(len(data)) + data)

    async def receive(self) -> Assign | Notify | Report | None:
        """The next message, or ``None`` at end-of-file (the peer closed or died)."""
        try:
            head = await self._reader.readexactly(_HEADER.size)
            (size,) = _HEADER.unpack(head)
            if size > MAX_MESSAGE_BYTES:
                raise LinkError(f"message of {size} bytes (limit {MAX_MESSAGE_BYTES})")
            data = await self._reader.readexactly(size)
        except (asyncio.IncompleteReadError, ConnectionError):
            return None
        message = pickle.loads(data)  # noqa: S301 - our own process at the other end (see above)
        if not isinstance(message, Assign | Notify | Report):
            raise LinkError(f"unexpected {type(message).__name__} on the worker link")
        return message

    async def drain(self) -> None:
        with contextlib.suppress(ConnectionError):
            await self._writer.drain()

    def close(self) -> None:
        self._writer.close()


class LinkNotifier(SdNotifier):
    """A worker's notifier: what would go to systemd goes to the main process instead."""

    def __init__(self, link: Link) -> None:
        super().__init__("")
        self._link = link

    @property
    def enabled(self) -> bool:
        return True

    def notify(self, *fields: str) -> None:
        self.sent = [*self.sent[-15:], "\n".join(fields)]
        self._link.send(Notify(fields))


class LinkSink:
    """A worker's exporter: snapshots and epoch latencies go to the main process, which serves
    them (one exporter, one port, whatever the number of workers)."""

    def __init__(self, link: Link) -> None:
        self._link = link
        self._latencies: list[tuple[str, float]] = []

    def start(self) -> None:
        pass

    def close(self) -> None:
        pass

    def observe_epoch_latency(self, station: str, seconds: float) -> None:
        self._latencies.append((station, seconds))

    def update(self, snapshot: DaemonSnapshot) -> None:
        self._link.send(Report(snapshot, tuple(self._latencies)))
        self._latencies.clear()
