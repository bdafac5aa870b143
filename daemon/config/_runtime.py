"""The ``[runtime]`` section: queues, state and supervision of the daemon."""

from __future__ import annotations

from pathlib import Path

from pydantic import Field

from ._base import Section

__all__ = ["RuntimeSettings"]


class RuntimeSettings(Section):
    #: Where checkpoints go; systemd's $STATE_DIRECTORY wins when set.
    state_dir: Path = Path("/var/lib/ionwarden")
    queue_size: int = Field(default=256, ge=1, description="Bound of each inter-stage queue.")
    #: Replay speed of the bundled demo when run without a config (× real time; 0 = flat out).
    demo_speed: float = Field(default=60.0, ge=0.0)
    # -- supervision of sources (daemon/runtime) --
    #: A source that sends no byte for this long is "stalled": status + alarm event, then reconnect.
    stall_no_data_s: float = Field(default=10.0, gt=0.0)
    #: Bytes arrive but no valid frame (CRC/checksum good) for this long: stalled (garbage).
    stall_no_frame_s: float = Field(default=30.0, gt=0.0)
    #: Frames arrive but no observation epoch for this long: stalled (e.g. MSM output switched off).
    stall_no_epoch_s: float = Field(default=60.0, gt=0.0)
    #: Reconnect backoff: first delay and ceiling (s); delays double and are jittered down by 20%.
    backoff_initial_s: float = Field(default=1.0, gt=0.0)
    backoff_cap_s: float = Field(default=30.0, gt=0.0)
    #: Bytes asked of a source per read.
    read_size_bytes: int = Field(default=65536, ge=512, le=1 << 22)
    #: Seconds between checkpoints of long-to-build estimator state (0 = only at shutdown).
    checkpoint_interval_s: float = Field(default=300.0, ge=0.0)
    #: A checkpoint older than this (wall clock) is ignored on start.
    checkpoint_max_age_s: float = Field(default=6 * 3600.0, gt=0.0)
    #: Seconds between the human-readable summary lines `ionwarden run` prints (0 = none).
    summary_interval_s: float = Field(default=10.0, ge=0.0)
    #: Graceful-stop budget after SIGTERM (s): outputs are flushed within it.
    stop_timeout_s: float = Field(default=4.0, gt=0.0, le=30.0)
    #: Processes that share the stations (each runs its stations' ingest, estimator, alarms and
    #: MQTT connection; the main process serves the exporter, the health message and systemd).
    #: 1 = one process. Epochs that arrive together (receivers align them to the GPS second) are
    #: then processed in parallel: use it with many stations on a multi-core machine, leaving a
    #: core for the broker when it runs on the same host. Takes effect at start (not on SIGHUP).
    workers: int = Field(default=1, ge=1, le=64)
    #: Estimate the epochs of a process's stations that arrive together in batched ticks of at
    #: most this many stations (0 or 1: each station alone). Each station's bytes are decoded
    #: in its own step; once this many hold an epoch, or no other station's step waits, the held
    #: epochs are estimated at once (the same figures bit for bit, fewer numpy calls) and their
    #: summaries go out. Less CPU and a shorter tail; the last stations' summaries come sooner,
    #: the first ones' later (DEVELOPERS.md, "Scaling further"). Live sources only.
    batch_estimates: int = Field(default=10, ge=0, le=1000)
    #: Background work (a station's deferred settle and slack work, the status report) waits up
    #: to this long (ms) while the process's MQTT publisher awaits the acknowledgements of
    #: messages it sent, and once a wait ran out, not again until the publisher has caught up:
    #: the broker gets a CPU before that work, and the PUBACKs of a burst's summaries are read as
    #: they come, not after it (0 = no wait; DEVELOPERS.md, "Scaling further").
    ack_priority_ms: float = Field(default=5.0, ge=0.0, le=1000.0)
