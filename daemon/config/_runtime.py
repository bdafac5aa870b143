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
