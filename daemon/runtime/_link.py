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
import operator
import pickle
import struct
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.daemon._records import fast_constructor
from ionwarden.daemon.estimator import SatelliteFigures, StationSnapshot

from ._notify import SdNotifier

if TYPE_CHECKING:
    import socket
    from collections.abc import Callable

    from ionwarden.daemon.outputs import DaemonSnapshot

__all__ = [
    "MAX_MESSAGE_BYTES",
    "Assign",
    "Link",
    "LinkNotifier",
    "LinkSink",
    "Notify",
    "Report",
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
#: and the health message are the same from a report as from the full snapshot.
REPORT_SATELLITE_FIELDS = frozenset(
    {"sat", "stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "el_deg"}
)
#: The per-cell arrays of a station snapshot (C/N0 learning's input): never in a report.
_CELL_FIELDS = frozenset({"cell_sat", "cell_sig", "cell_el_deg", "cell_cn0_dbhz"})

#: Per frozen slots dataclass pickled so far: its field names and a getter of their values in
#: that order (``False``: not one of those).
_FIELDS: dict[type, tuple[tuple[str, ...], Callable[[Any], tuple[Any, ...]]] | bool] = {}
#: Per class and report kind (with or without per-satellite columns): the positions of the fields
#: a report leaves empty (``()`` when it carries them all).
_DROPPED: dict[tuple[type, bool], tuple[int, ...]] = {}
#: One empty array per dtype: what a report carries in place of a dropped array (pickle writes it
#: once per report and refers back to it after).
_EMPTY: dict[np.dtype[Any], npt.NDArray[Any]] = {}


#: Per class and message kind (``slim``): what the pickler writes in place of some of its fields,
#: as (position, function of the field's value) pairs: a report's dropped fields emptied
#: (:func:`_empty_like`), tuples of records as columns (:func:`_as_columns`); ``()``: none.
_FIXUPS: dict[tuple[type, bool | None], tuple[tuple[int, Callable[[Any], object]], ...]] = {}

#: Per frozen slots dataclass unpickled so far: its positional fast constructor.
_BUILDERS: dict[type, Callable[..., object]] = {}
#: A tuple of records goes as columns from this many records on.
_COLUMNS_FROM = 2


def _builder(cls: type) -> Callable[..., object]:
    """``cls``'s positional fast constructor, made at its first use."""
    build = _BUILDERS.get(cls)
    if build is None:
        build = _BUILDERS[cls] = fast_constructor(cls, positional=True)
    return build


def _rebuild(cls: type, values: tuple[Any, ...]) -> object:
    """Unpickle a frozen slots dataclass from its field values (what ``_Pickler`` wrote)."""
    return _builder(cls)(*values)


def _rebuild_columns(cls: type, columns: tuple[tuple[Any, ...], ...]) -> tuple[object, ...]:
    """Unpickle a tuple of records of ``cls`` from its columns (what ``_Pickler`` wrote for a
    :class:`_Columns`): the same records, in the same order, as one ``_rebuild`` each."""
    return tuple(map(_builder(cls), *columns))


class _Columns:
    """A tuple of records of one frozen slots dataclass with fields, on its way into a pickle as
    one tuple of values per field instead of one reduce per record: a report's alarm statuses
    (~21 a station: 210 of the ~340 records of a 10-station report, and 1.0–1.3 ms a report in a
    worker, 2026-12-04) were most of its reduce calls. Made by :class:`_Pickler` only."""

    __slots__ = ("cls", "records")

    def __init__(self, cls: type, records: tuple[Any, ...]) -> None:
        self.cls = cls
        self.records = records


def _columnar(cls: type, names: tuple[str, ...]) -> tuple[int, ...]:
    """Positions of the fields of ``cls`` (names ``names``) pickled as columns when they hold
    records of one class: ``DaemonSnapshot.alarms`` and ``.queues``."""
    # (imported here: the outputs import the runtime)
    from ionwarden.daemon.outputs import DaemonSnapshot  # noqa: PLC0415

    if cls is not DaemonSnapshot:
        return ()
    return tuple(i for i, n in enumerate(names) if n in ("alarms", "queues"))


def _fixups(
    cls: type, names: tuple[str, ...], slim: bool | None
) -> tuple[tuple[int, Callable[[Any], object]], ...]:
    """The entry of ``_FIXUPS`` for ``cls`` (names ``names``) in a message of kind ``slim``."""
    key = (cls, slim)
    found = _FIXUPS.get(key)
    if found is None:
        dropped = () if slim is None else _dropped(cls, names, slim)
        fixed = sorted({*dropped, *_columnar(cls, names)})
        found = tuple((i, _empty_like if i in dropped else _as_columns) for i in fixed)
        _FIXUPS[key] = found
    return found


def _as_columns(value: object) -> object:
    """``value`` as a :class:`_Columns` if it is a tuple of enough records of one frozen slots
    dataclass with fields, none of them dropped in a report; else ``value`` itself."""
    if type(value) is not tuple or len(value) < _COLUMNS_FROM:
        return value
    cls = type(value[0])
    for record in value:
        if type(record) is not cls:
            return value
    found = _FIELDS.get(cls)
    if found is None:
        found = _layout(cls)
    if not isinstance(found, tuple):  # (``False``: not one of ours)
        return value
    names = found[0]
    if not names or _dropped(cls, names, True) or _dropped(cls, names, False):
        return value
    return _Columns(cls, value)


def _layout(cls: type) -> tuple[tuple[str, ...], Callable[[Any], tuple[Any, ...]]] | bool:
    """``cls``'s field names and values getter (``False`` unless a frozen slots dataclass)."""
    found = _FIELDS.get(cls)
    if found is None:
        if dataclasses.is_dataclass(cls) and "__slots__" in cls.__dict__:
            names = tuple(f.name for f in dataclasses.fields(cls))
            found = (names, _values_getter(names))
        else:
            found = False
        _FIELDS[cls] = found
    return found


def _values_getter(names: tuple[str, ...]) -> Callable[[Any], tuple[Any, ...]]:
    """A getter of the attributes ``names`` of an object, as a tuple in that order."""
    if not names:
        return lambda _obj: ()
    get = operator.attrgetter(*names)
    if len(names) == 1:  # (attrgetter of one name gives the value, not a tuple)
        return lambda obj: (get(obj),)
    return get


def _dropped(cls: type, names: tuple[str, ...], per_satellite: bool) -> tuple[int, ...]:
    """Positions of the fields of ``cls`` (names ``names``) that a report leaves empty.

    By class, wherever the record sits in the message: a report's snapshots are its stations'
    (``DaemonSnapshot.stations[i].snapshot``), and no other record of a report holds one; a
    record that ever carries a snapshot the main process needs whole must not go in a report."""
    key = (cls, per_satellite)
    found = _DROPPED.get(key)
    if found is None:
        if cls is SatelliteFigures:
            keep = REPORT_SATELLITE_FIELDS if per_satellite else frozenset()
            found = tuple(i for i, n in enumerate(names) if n not in keep)
        elif cls is StationSnapshot:
            found = tuple(i for i, n in enumerate(names) if n in _CELL_FIELDS)
        else:
            found = ()
        _DROPPED[key] = found
    return found


def _empty_like(value: object) -> object:
    """What a report carries for a dropped field: an empty array of its dtype, or ``()``. (The
    same array for every field of that dtype: pickle writes it once, and the main process gets
    one writeable empty array per dtype and report, which no code can write an element into.)"""
    if isinstance(value, np.ndarray):
        empty = _EMPTY.get(value.dtype)
        if empty is None:
            empty = _EMPTY[value.dtype] = np.empty(0, value.dtype)
        return empty
    return () if isinstance(value, tuple) else value


class _Pickler(pickle.Pickler):
    """Pickles our frozen slots dataclasses as (class, field values): the standard way calls
    ``dataclasses.fields()`` per object (a generated ``__getstate__``), which was 70% of a report's
    cost (~140 records per 10 stations).

    With ``slim`` set (``True``: keep the exporter's per-satellite columns, ``False``: none), it
    writes a report's view of each station snapshot: every station figure, counter and alarm; of
    the per-satellite arrays only :data:`REPORT_SATELLITE_FIELDS` (or none); no per-cell arrays.
    Dropped fields are written as empty arrays of their dtype (or empty tuples), in the same pass
    (no intermediate copies of the records). A daemon snapshot's alarm statuses and queue figures
    go as columns (:class:`_Columns`), in any message."""

    def __init__(self, file: io.BytesIO, slim: bool | None) -> None:
        super().__init__(file, protocol=5)
        self._slim = slim

    def reducer_override(self, obj: Any) -> Any:
        cls = type(obj)
        if cls is _Columns:
            _names, get_row = _FIELDS[obj.cls]  # type: ignore[misc]
            return _rebuild_columns, (obj.cls, tuple(zip(*map(get_row, obj.records), strict=True)))
        found = _FIELDS.get(cls)
        if found is None:
            found = _layout(cls)
        if found is False:
            return NotImplemented
        names, get = found  # type: ignore[misc]
        values = get(obj)
        slim = self._slim
        fixups = _FIXUPS.get((cls, slim))
        if fixups is None:
            fixups = _fixups(cls, names, slim)
        if fixups:
            as_list = list(values)
            for i, fix in fixups:
                as_list[i] = fix(as_list[i])
            values = tuple(as_list)
        return _rebuild, (cls, values)


def _dumps(message: object, slim: bool | None = None) -> bytes:
    """``message`` pickled; ``slim``: as a report's view (see :class:`_Pickler`)."""
    buf = io.BytesIO()
    _Pickler(buf, slim).dump(message)
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

    def send(self, message: Assign | Notify | Report, *, slim: bool | None = None) -> None:
        """Queue ``message`` (never blocks; a closed link drops it: the peer is gone). ``slim``:
        send a report's view of its snapshots (``True``: with the exporter's per-satellite
        columns, ``False``: without any; ``None``: whole)."""
        if self._writer.is_closing():
            return
        data = _dumps(message, slim)
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
        report = Report(snapshot, tuple(self._latencies), tuple(self._deliveries))
        self._link.send(report, slim=self._per_satellite)
        self._latencies.clear()
        self._deliveries.clear()
