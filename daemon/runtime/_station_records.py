"""The records of a station at run time: its config, state, source events and statistics, and
what its deferred outputs promise (:class:`Settles`); :class:`~._station.StationRunner` runs it."""

from __future__ import annotations

import enum
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Protocol

from ionwarden.daemon._records import fast_constructor
from ionwarden.daemon.ingest import FileSource, StdinSource

from ._stall import StallLimits

if TYPE_CHECKING:
    from ionwarden.daemon.estimator import FixStatus, StationSnapshot
    from ionwarden.daemon.ingest import SourceSpec

    from ._core import DecoderCounts
    from ._queues import QueueStatistics

__all__ = [
    "Settles",
    "SourceEvent",
    "StationConfig",
    "StationState",
    "StationStatistics",
    "new_station_statistics",
]


class Settles(Protocol):
    """Deferred work that waits for a background step (``DeferredAlarms``: the alarms'
    evaluation of the last snapshot and their learning)."""

    def unsettled(self) -> bool: ...

    def settle(self) -> None: ...


class StationState(enum.StrEnum):
    STARTING = "starting"
    CONNECTING = "connecting"
    STREAMING = "streaming"
    STALLED = "stalled"
    RETRY_WAIT = "retry-wait"
    REFUSED = "refused"
    FINISHED = "finished"
    STOPPED = "stopped"


@dataclass(frozen=True, slots=True, kw_only=True)
class StationConfig:
    """Everything the runtime needs to run one station (built from the config by the CLI)."""

    name: str
    source: SourceSpec
    password: str = field(default="", repr=False)
    read_size: int = 65536
    queue_size: int = 256
    stall: StallLimits = field(default_factory=StallLimits)
    backoff_initial_s: float = 1.0
    backoff_cap_s: float = 30.0
    #: Digest of the station's config; a SIGHUP reload restarts the station only when it changes.
    fingerprint: str = ""

    @property
    def finite(self) -> bool:
        """A source whose end is the end of the station (a file without loop, stdin)."""
        return (isinstance(self.source, FileSource) and not self.source.loop) or isinstance(
            self.source, StdinSource
        )


@dataclass(frozen=True, slots=True, kw_only=True)
class SourceEvent:
    """A state change of a station's source (connect, stall, refusal, retry, end)."""

    station: str
    state: StationState
    detail: str
    monotonic_s: float


@dataclass(frozen=True, slots=True, kw_only=True)
class StationStatistics:
    """One station now (STYLE rule 15): source state, counters since start, queue figures."""

    station: str
    state: StationState
    detail: str
    connected: bool
    bytes_total: int
    connects_total: int
    reconnects_total: int
    stalls_total: int
    epochs_total: int
    fixes_total: int
    decode_errors_total: int
    decoder: DecoderCounts
    queue: QueueStatistics
    last_data_monotonic_s: float | None
    last_epoch_monotonic_s: float | None
    latest: StationSnapshot | None
    latest_fix: FixStatus | None
    #: Monotonic time of the estimate task's last completed step (the watchdog reads it).
    progress_monotonic_s: float
    #: Pipeline steps that raised and were contained (see the module docstring).
    pipeline_errors_total: int = 0
    #: Times the station's core was reset after repeated pipeline failures.
    pipeline_resets_total: int = 0


#: ``StationStatistics(**fields)``, every field given, built without the frozen ``__init__``'s
#: ``object.__setattr__`` per field (the status tick takes one per station each second).
new_station_statistics = fast_constructor(StationStatistics)
