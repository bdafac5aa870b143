"""What the outputs read: one immutable snapshot of the whole daemon (the exporter's input).

The runtime builds a :class:`DaemonSnapshot` from each stage's ``statistics()`` (STYLE rule 15) and
hands it to :meth:`Exporter.update` (a reference swap; the scrape thread only ever reads a complete
snapshot). Counters are totals since start (``*_total``); ``*_monotonic_s`` times are on the clock
the runtime injects into the exporter, so ages are computed at scrape time and keep growing when
the pipeline stalls.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ionwarden.daemon.alarms import AlarmStatus
    from ionwarden.daemon.estimator import FixStatus, StationSnapshot

__all__ = [
    "DaemonSnapshot",
    "IngestFigures",
    "MqttStatistics",
    "QueueFigures",
    "StationFigures",
]


@dataclass(frozen=True, slots=True, kw_only=True)
class IngestFigures:
    """Byte-stream counters of one station's source (totals since start)."""

    bytes_total: int = 0
    frames_total: int = 0
    crc_errors_total: int = 0
    discarded_bytes_total: int = 0
    reconnects_total: int = 0
    connected: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class QueueFigures:
    """One bounded queue between stages: ``stage`` names it ("estimator", "mqtt", …), ``station``
    is "" for a daemon-wide queue."""

    stage: str
    station: str = ""
    depth: int
    capacity: int
    peak: int
    dropped_total: int


@dataclass(frozen=True, slots=True, kw_only=True)
class MqttStatistics:
    """The MQTT publisher, now (see :meth:`MqttPublisher.statistics`)."""

    connected: bool
    buffered_alarm: int
    buffered_epoch: int
    published_total: int
    dropped_epoch_total: int
    dropped_alarm_total: int
    connects_total: int
    disconnects_total: int


@dataclass(frozen=True, slots=True, kw_only=True)
class StationFigures:
    """One station: its latest estimator snapshot and fix (None before the first), its ingest
    counters, and when (monotonic s) the last valid epoch arrived (None: never)."""

    station: str
    snapshot: StationSnapshot | None = None
    fix: FixStatus | None = None
    ingest: IngestFigures = field(default_factory=IngestFigures)
    last_epoch_monotonic_s: float | None = None
    epochs_total: int = 0
    #: Pipeline steps that raised and were contained, and resets after repeated failures.
    pipeline_errors_total: int = 0
    pipeline_resets_total: int = 0


@dataclass(frozen=True, slots=True, kw_only=True)
class DaemonSnapshot:
    """Everything the exporter serves, frozen at one moment."""

    stations: tuple[StationFigures, ...] = ()
    alarms: tuple[AlarmStatus, ...] = ()
    queues: tuple[QueueFigures, ...] = ()
    mqtt: MqttStatistics | None = None
    started_monotonic_s: float = 0.0
