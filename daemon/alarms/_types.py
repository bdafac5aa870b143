"""Alarm values read by every output: the current status of each alarm and each transition.

State names and severities are ionwarden's own. An alarm is ``normal`` or ``active``; ``pending``
says a change has been seen but its hold time has not yet elapsed (so it has not happened).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ionwarden.parsers import GpsTime

__all__ = ["AlarmKind", "AlarmState", "AlarmStatus", "AlarmTransition", "Severity"]


class AlarmState(StrEnum):
    NORMAL = "normal"
    ACTIVE = "active"


class Severity(StrEnum):
    """How much attention an active alarm deserves (ours, in rising order)."""

    ADVISORY = "advisory"
    WARNING = "warning"
    SEVERE = "severe"


class AlarmKind(StrEnum):
    """The bounded set of alarm kinds; a CN0 alarm exists once per band (``cn0-drop-g2``)."""

    ROTI = "roti"
    ROT = "rot"
    VTEC = "vtec"
    GRADIENT = "gradient"
    DUAL_FREQUENCY_LOSS = "dual-frequency-loss"
    CN0_DROP = "cn0-drop"
    STREAM_STALL = "stream-stall"
    FIX_QUALITY = "fix-quality"
    FIX_HDOP = "fix-hdop"
    FIX_SIGMA = "fix-sigma"


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmStatus:
    """One alarm of one station, now.

    ``alarm`` is the unique key (kind, plus ``-<band>`` for CN0: ``cn0-drop-g2``); ``band`` is the
    RINEX system letter and band digit ("G2") or "" ; ``value`` is the last input in ``unit``
    (NaN when the last input was unknown); ``since`` is when the current state began (None before
    the first transition).
    """

    station: str
    alarm: str
    kind: AlarmKind
    band: str
    severity: Severity
    state: AlarmState
    pending: bool
    value: float
    unit: str
    raise_at: float
    clear_at: float
    since: GpsTime | None


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmTransition:
    """An alarm changed state at ``time`` (data time; wall time for a stream stall).

    ``seq`` counts transitions of this station from 1 since start, so a consumer can spot a
    duplicate (at-least-once delivery) or a gap.
    """

    seq: int
    station: str
    alarm: str
    kind: AlarmKind
    band: str
    severity: Severity
    previous: AlarmState
    state: AlarmState
    time: GpsTime
    value: float
    unit: str
    raise_at: float
    clear_at: float

    def status(self) -> AlarmStatus:
        """The alarm's status right after this transition (settled: not pending; since its time),
        as published retained beside the transition event."""
        return AlarmStatus(
            station=self.station,
            alarm=self.alarm,
            kind=self.kind,
            band=self.band,
            severity=self.severity,
            state=self.state,
            pending=False,
            value=self.value,
            unit=self.unit,
            raise_at=self.raise_at,
            clear_at=self.clear_at,
            since=self.time,
        )
