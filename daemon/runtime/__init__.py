"""The daemon at run time: stations (ingest + estimate tasks), supervision, queues, systemd.

One root ``asyncio.TaskGroup`` owns every task (STYLE rule 13); queues are bounded with counted
overflow (rule 15); reconnects use a pure backoff generator (rule 16).
"""

from ._backoff import BACKOFF_CAP_S, BACKOFF_INITIAL_S, backoff_delays, max_delay_s
from ._checkpoint import CHECKPOINT_FORMAT, fingerprint, load_checkpoint, save_checkpoint
from ._core import DecoderCounts, FrameConsumer, FramingCore, StationCore
from ._lane import StepLane
from ._notify import SdNotifier, watchdog_interval_s
from ._pacer import ReplayPacer
from ._queues import BoundedQueue, Overflow, QueueStatistics
from ._stall import StallDetector, StallKind, StallLimits
from ._station import (
    PIPELINE_LOG_INTERVAL_S,
    PIPELINE_RESET_AFTER,
    RETRYABLE_ERRORS,
    TOLERATED_DECODE_ERRORS,
    UNCONTAINED_ERRORS,
    StationRunner,
)
from ._station_records import SourceEvent, StationConfig, StationState, StationStatistics
from ._vclock import VirtualClockLoop, run_virtual

__all__ = [
    "BACKOFF_CAP_S",
    "BACKOFF_INITIAL_S",
    "CHECKPOINT_FORMAT",
    "PIPELINE_LOG_INTERVAL_S",
    "PIPELINE_RESET_AFTER",
    "RETRYABLE_ERRORS",
    "TOLERATED_DECODE_ERRORS",
    "UNCONTAINED_ERRORS",
    "BoundedQueue",
    "DecoderCounts",
    "FrameConsumer",
    "FramingCore",
    "Overflow",
    "QueueStatistics",
    "ReplayPacer",
    "SdNotifier",
    "SourceEvent",
    "StallDetector",
    "StallKind",
    "StallLimits",
    "StationConfig",
    "StationCore",
    "StationRunner",
    "StationState",
    "StationStatistics",
    "StepLane",
    "VirtualClockLoop",
    "backoff_delays",
    "fingerprint",
    "load_checkpoint",
    "max_delay_s",
    "run_virtual",
    "save_checkpoint",
    "watchdog_interval_s",
]
