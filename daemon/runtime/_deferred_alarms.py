"""A station's alarms as the daemon runs them: a snapshot's evaluation waits for the station's
background turn, so its summary goes out first.

Receivers align their epochs to the GPS second, so every station's urgent step runs in the same
burst (``StepLane``) and the last station's summary waits for all the others. The summary does not
depend on the alarms, so the urgent step only hands the snapshot over (:meth:`DeferredAlarms.defer`)
and publishes the summary; ``observe_snapshot`` and the publishing of its transitions run in
:meth:`DeferredAlarms.settle`, which the station's runner calls in its background turn
(``also_settle``), after every waiting urgent step.

The alarms see their inputs in the same order as if each snapshot were evaluated at once, so the
transitions, their sequence numbers and their payloads are the same: a pending snapshot is
evaluated before any later input of the station (another snapshot, a fix, the stall check) and
when the station stops (:meth:`DeferredAlarms.flush`, which the daemon calls).

The same turn formats and queues the station's satellites message when one is due
(:meth:`DeferredAlarms.defer_satellites`; every ``satellites_interval_s``): its payload costs
about six summaries to format (~0.26 ms here, 2026-12-04), which otherwise delayed every summary
after it in the burst. It is queued by the next of the station's inputs or its stop at the latest,
as the alarms' evaluation is, so none is lost.

Reads of the alarms' state (``StationAlarms.statuses``) between a snapshot's urgent step and its
evaluation see the state of the epoch before. The daemon's status tick flushes first, so the
exporter and the health message do not; any other reader may be one epoch behind.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ionwarden.daemon.alarms import AlarmTransition, StationAlarms
    from ionwarden.daemon.estimator import FixStatus, StationSnapshot
    from ionwarden.daemon.outputs import MqttPublisher
    from ionwarden.parsers import GpsTime

__all__ = ["DeferredAlarms"]


class DeferredAlarms:
    """One station's :class:`StationAlarms`, its pending snapshot and the publisher of its
    transitions (None: evaluated, not published). Satisfies the runner's ``Settles``."""

    __slots__ = ("_pending", "_publisher", "_sats", "alarms")

    def __init__(self, alarms: StationAlarms, publisher: MqttPublisher | None) -> None:
        self.alarms = alarms
        self._publisher = publisher
        #: The snapshot whose evaluation waits for settle() (None: nothing pending).
        self._pending: StationSnapshot | None = None
        #: The snapshot whose satellites message waits for settle() (None: none).
        self._sats: StationSnapshot | None = None

    def defer(self, snap: StationSnapshot) -> None:
        """Leave ``snap``'s evaluation for :meth:`settle` (an earlier one still pending, as when
        one chunk completes two epochs, is evaluated now: the order of inputs is kept; the test
        spares the urgent step a call)."""
        if self._pending is not None:
            self.flush()
        self._pending = snap

    def defer_satellites(self, snap: StationSnapshot) -> None:
        """Leave the satellites message of ``snap`` (due: ``publish_summary_nowait``) for
        :meth:`settle` (one still pending is queued now)."""
        if self._sats is not None:
            self._publish_satellites()
        self._sats = snap

    def _publish_satellites(self) -> None:
        snap, self._sats = self._sats, None
        if snap is not None and self._publisher is not None:
            self._publisher.publish_satellites_nowait(snap)

    def fix(self, fix: FixStatus) -> None:
        """Evaluate and publish an NMEA fix, after the pending snapshot (an earlier input)."""
        self.flush()
        self._publish(self.alarms.observe_fix(fix))

    def stall(self, age_s: float, now: GpsTime) -> None:
        """Evaluate and publish the stream-stall alarm, after the pending snapshot."""
        self.flush()
        self._publish(self.alarms.observe_stall(age_s, now))

    def flush(self) -> None:
        """Evaluate the pending snapshot now and publish its transitions, and queue a pending
        satellites message (a no-op without either). Each is taken off first: one that fails is
        not tried again."""
        if self._sats is not None:
            self._publish_satellites()
        snap = self._pending
        if snap is not None:
            self._pending = None
            self._publish(self.alarms.observe_snapshot(snap))

    def unsettled(self) -> bool:
        return self._pending is not None or self._sats is not None or self.alarms.unsettled()

    def settle(self) -> None:
        """The background part: the satellites message and the pending evaluation, then the
        alarms' own deferred learning."""
        self.flush()
        self.alarms.settle()

    def _publish(self, transitions: list[AlarmTransition]) -> None:
        # (the alarm engine logs each transition itself)
        if transitions and self._publisher is not None:
            self._publisher.publish_transitions_nowait(transitions)
