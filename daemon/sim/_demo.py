"""The bundled demo capture (``daemon/data/demo.bin``): where it lives and how it is made.

See ``daemon/data/demo.md`` for the invented story. ``scripts/make-demo`` writes
:func:`build_demo` to :func:`demo_path`; a test checks that the two agree byte for byte.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from ._engine import Simulator
from ._output import iter_stream
from ._scenario import build_scenario

__all__ = ["DEMO_LIMIT_BYTES", "DEMO_SEED", "DEMO_STATION", "build_demo", "demo_path"]

DEMO_SEED = 2026
#: The demo's station (RTCM station id 41).
DEMO_STATION = "HARC"
#: Package-data budget for the demo (issue 5: under 2 MB).
DEMO_LIMIT_BYTES = 2 * 1024 * 1024


def demo_path() -> Path:
    """Path of the installed demo capture (package data of ``ionwarden.daemon``)."""
    return Path(str(resources.files("ionwarden.daemon") / "data" / "demo.bin"))


def build_demo() -> bytes:
    """The demo bytes: scenario ``demo``, seed 2026, MSM4, GSV every 5 s (deterministic)."""
    sim = Simulator(build_scenario("demo", seed=DEMO_SEED))
    return b"".join(d for _, d in iter_stream(sim, 0, msm_level=4, gsv_every_s=5.0))
