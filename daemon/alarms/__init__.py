"""Debounced alarms per station: hysteresis, hold times, a per-band C/N0 baseline (docs/alarms.md)."""

from ._cn0 import BAND_NAMES, Cn0Baseline, band_key, band_label
from ._debounce import Debouncer
from ._engine import UNITS, StationAlarms
from ._types import AlarmKind, AlarmState, AlarmStatus, AlarmTransition, Severity

__all__ = [
    "BAND_NAMES",
    "UNITS",
    "AlarmKind",
    "AlarmState",
    "AlarmStatus",
    "AlarmTransition",
    "Cn0Baseline",
    "Debouncer",
    "Severity",
    "StationAlarms",
    "band_key",
    "band_label",
]
