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
import dataclasses
import io
import pickle
import struct
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ._notify import SdNotifier

if TYPE_CHECKING:
    import socket

    from ionwarden.daemon.estimator import StationSnapshot
    from ionwarden.daemon.outputs import DaemonSnapshot

__all__ = [
    "MAX_MESSAGE_BYTES",
    "Assign",
    "Link",
    "LinkNotifier",
    "LinkSink",
    "Notify",
    "Report",
    "report_view",
]

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
    """A worker's status tick: its snapshot, and the ``(station, seconds)`` epoch latencies and
    summary deliveries (frame → PUBACK) since the last report."""

    snapshot: DaemonSnapshot
    latencies: tuple[tuple[str, float], ...] = ()
    deliveries: tuple[tuple[str, float], ...] = ()


#: The per-satellite columns the exporter serves (``outputs/_exporter.py``), with the satellite ids.
#: A report carries only these: a station's full snapshot has ~25 arrays, and pickling arrays one by
#: one is most of a report's cost. ``tests/test_runtime_workers.py`` checks that the exporter's page
#: and the health message are the same from this view as from the full snapshot.
REPORT_SATELLITE_FIELDS = frozenset(
    {"sat", "stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "el_deg"}
)
_EMPTY_F64 = np.zeros(0)
_EMPTY_CELLS: dict[str, Any] = {
    "cell_sat": np.zeros(0, np.int16),
    "cell_sig": np.zeros(0, np.uint16),
    "cell_el_deg": _EMPTY_F64,
    "cell_cn0_dbhz": np.zeros(0, np.float32),
}


def _slim(snap: StationSnapshot, per_satellite: bool) -> StationSnapshot:
    figs = snap.satellites
    dropped: dict[str, Any] = {}
    for f in dataclasses.fields(figs):
        if per_satellite and f.name in REPORT_SATELLITE_FIELDS:
            continue
        value = getattr(figs, f.name)
        if isinstance(value, np.ndarray):
            dropped[f.name] = value[:0] if value.dtype != np.float64 else _EMPTY_F64
        elif isinstance(value, tuple):
            dropped[f.name] = ()
    return dataclasses.replace(
        snap, satellites=dataclasses.replace(figs, **dropped), **_EMPTY_CELLS
    )


def report_view(snapshot: DaemonSnapshot, *, per_satellite: bool = True) -> DaemonSnapshot:
    """What a worker sends of its snapshot: every station figure, counter and alarm; of each
    station's per-satellite arrays only the exporter's columns (none with ``per_satellite`` off)."""
    return dataclasses.replace(
        snapshot,
        stations=tuple(
            st
            if st.snapshot is None
            else dataclasses.replace(st, snapshot=_slim(st.snapshot, per_satellite))
            for st in snapshot.stations
        ),
    )


#: Field names of each frozen slots dataclass pickled so far (``False``: not one of those).
_FIELDS: dict[type, tuple[str, ...] | bool] = {}


def _rebuild(cls: type, values: tuple[Any, ...]) -> object:
    """Unpickle a frozen slots dataclass from its field values (what ``_Pickler`` wrote)."""
    obj: object = object.__new__(cls)
    for name, value in zip(_field_names(cls), values, strict=True):
        object.__setattr__(obj, name, value)
    return obj


def _field_names(cls: type) -> tuple[str, ...]:
    names = _FIELDS.get(cls)
    if not isinstance(names, tuple):
        names = _FIELDS[cls] = tuple(f.name for f in dataclasses.fields(cls))
    return names


class _Pickler(pickle.Pickler):
    """Pickles our frozen slots dataclasses as (class, field values): the standard way calls
    ``dataclasses.fields()`` per object (a generated ``__getstate__``), which was 70% of a report's
    cost (~140 records per 10 stations)."""

    def reducer_override(self, obj: Any) -> Any:
        cls = type(obj)
        names = _FIELDS.get(cls)
        if names is None:
            slotted = dataclasses.is_dataclass(cls) and "__slots__" in cls.__dict__
            names = _FIELDS[cls] = _field_names(cls) if slotted else False
        if names is False:
            return NotImplemented
        return _rebuild, (cls, tuple([getattr(obj, n) for n in names]))  # type: ignore[union-attr]


def _dumps(message: object) -> bytes:
    buf = io.BytesIO()
    _Pickler(buf, protocol=5).dump(message)
    return buf.getvalue()


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
        data = _dumps(message)
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

    def __init__(self, link: Link, *, per_satellite: bool = True) -> None:
        self._link = link
        self._per_satellite = per_satellite
        self._latencies: list[tuple[str, float]] = []
        self._deliveries: list[tuple[str, float]] = []

    def start(self) -> None:
        pass

    def close(self) -> None:
        pass

    def observe_epoch_latency(self, station: str, seconds: float) -> None:
        self._latencies.append((station, seconds))

    def observe_summary_delivery(self, station: str, seconds: float) -> None:
        self._deliveries.append((station, seconds))

    def update(self, snapshot: DaemonSnapshot) -> None:
        view = report_view(snapshot, per_satellite=self._per_satellite)
        self._link.send(Report(view, tuple(self._latencies), tuple(self._deliveries)))
        self._latencies.clear()
        self._deliveries.clear()
