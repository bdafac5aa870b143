"""Scenario simulator: invented sites, invented ionosphere, truth to test against (issue 5).

Deterministic (same scenario and seed → byte-identical output), vectorised over epochs ×
satellites × signals, no wall clock. Outputs: an RTCM 3 + NMEA byte stream per station, RINEX 3.04
observation and navigation files, truth CSV tables; loopback TCP / NTRIP servers for tests.
"""

from ._constellation import Constellation, EphemerisSeries, build_constellation
from ._demo import DEMO_LIMIT_BYTES, DEMO_SEED, DEMO_STATION, build_demo, demo_path
from ._engine import BLOCK_EPOCHS, Simulator
from ._observe import BlockGeometry, SimBlock
from ._output import SimSummary, Sinks, iter_stream, nav_ephemerides, rinex_header, run_to_sinks
from ._scenario import (
    SCENARIO_HELP,
    BandOutage,
    LossOfLock,
    ReceiverRestart,
    Scenario,
    ScintillationWindow,
    SlipEvent,
    Station,
    StormFront,
    StreamGap,
    build_scenario,
    scenario_names,
)
from ._serve import ServeOptions, serve_ntrip, serve_tcp
from ._stream import StreamComposer, block_epochs, epoch_of
from ._truth import BIAS_COLUMNS, GRADIENT_COLUMNS, TRUTH_COLUMNS

__all__ = [
    "BIAS_COLUMNS",
    "BLOCK_EPOCHS",
    "DEMO_LIMIT_BYTES",
    "DEMO_SEED",
    "DEMO_STATION",
    "GRADIENT_COLUMNS",
    "SCENARIO_HELP",
    "TRUTH_COLUMNS",
    "BandOutage",
    "BlockGeometry",
    "Constellation",
    "EphemerisSeries",
    "LossOfLock",
    "ReceiverRestart",
    "Scenario",
    "ScintillationWindow",
    "ServeOptions",
    "SimBlock",
    "SimSummary",
    "Simulator",
    "Sinks",
    "SlipEvent",
    "Station",
    "StormFront",
    "StreamComposer",
    "StreamGap",
    "block_epochs",
    "build_constellation",
    "build_demo",
    "build_scenario",
    "demo_path",
    "epoch_of",
    "iter_stream",
    "nav_ephemerides",
    "rinex_header",
    "run_to_sinks",
    "scenario_names",
    "serve_ntrip",
    "serve_tcp",
]
