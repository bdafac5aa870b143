"""The producers of the MQTT topic tree (docs/mqtt.md): format each payload and queue it.

:class:`TopicProducers` holds what the ``*_nowait`` methods need (the topic tree, the outbound
buffer, each station's announced state and satellites schedule) and is sync and non-blocking
throughout: the estimator's steps call it. :class:`~._publisher.MqttPublisher` adds the
connection that empties the buffer (``_kick`` hands a queued message to the socket at once).
"""

from __future__ import annotations

import asyncio
import datetime as dt
import logging
import time
from importlib import metadata
from typing import TYPE_CHECKING

from ionwarden.daemon.alarms import AlarmKind, AlarmState, AlarmStatus

from . import _payloads as fmt
from ._buffer import OutboundBuffer, OutboundMessage, new_outbound_message
from ._topics import Topic, TopicTree

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable

    from ionwarden.daemon.alarms import AlarmTransition
    from ionwarden.daemon.config import MqttSettings
    from ionwarden.daemon.estimator import StationSnapshot
    from ionwarden.parsers import GpsTime

    from ._model import DaemonSnapshot

__all__ = ["TopicProducers", "utc_now"]

log = logging.getLogger("ionwarden.daemon.outputs.mqtt")


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class _StationRoute:
    """What a station's per-epoch messages need, found with one look-up per epoch: its summary and
    satellites topics (validated once) and the satellites message's schedule in GPS seconds: when
    the last one was queued, and when the next is due (None before the first)."""

    __slots__ = ("satellites", "sats_due_s", "sats_last_s", "summary")

    def __init__(self, summary: Topic, satellites: Topic) -> None:
        self.summary = summary
        self.satellites = satellites
        self.sats_last_s = 0.0
        self.sats_due_s: float | None = None


def _version() -> str:
    try:
        return metadata.version("ionwarden")
    except metadata.PackageNotFoundError:
        return "0+unknown"


class TopicProducers:
    """Format and queue the topic tree's messages (the ``*_nowait`` methods); see
    :class:`~._publisher.MqttPublisher`, which sends them."""

    def __init__(
        self,
        settings: MqttSettings,
        *,
        clock: Callable[[], dt.datetime] = utc_now,
        monotonic: Callable[[], float] = time.monotonic,
        daemon_status: bool = True,
    ) -> None:
        self._s = settings
        self._daemon_status = daemon_status
        self._tree = TopicTree(settings.topic_prefix)
        self._clock = clock
        self._monotonic = monotonic
        self._version = _version()
        self._buffer = OutboundBuffer(
            alarm_bound=settings.alarm_buffer, epoch_bound=settings.epoch_buffer
        )
        self._drained = asyncio.Event()
        self._drained.set()
        self._station_state: dict[str, str] = {}
        self._last_epoch: dict[str, GpsTime] = {}
        self._routes: dict[str, _StationRoute] = {}
        self._sats_scheduled = 0  # stations whose satellites message has a due time
        self._last_health_s: float | None = None

    @property
    def topics(self) -> TopicTree:
        return self._tree

    # --- producers (sync, never block) ---------------------------------------------------------

    def _put(
        self,
        topic: Topic,
        payload: bytes,
        *,
        qos: int,
        retain: bool,
        alarm_class: bool,
        expiry_s: int | None = None,
        bulk: bool = False,
        origin_s: float | None = None,
        station: str = "",
    ) -> None:
        self._queue(
            new_outbound_message(
                topic=topic,
                payload=payload,
                qos=qos,
                retain=retain,
                expiry_s=expiry_s,
                alarm_class=alarm_class,
                bulk=bulk,
                queued_s=self._monotonic(),
                origin_s=origin_s,
                station=station,
            )
        )

    def _queue(self, msg: OutboundMessage) -> None:
        if not self._buffer.put_nowait(msg) and msg.alarm_class:
            log.error(
                "MQTT alarm buffer full (%d): dropped the oldest alarm/status message",
                self._buffer.alarm_bound,
            )
        self._drained.clear()
        self._kick()

    def _kick(self) -> None:
        """A message was queued: send it now if connected (the publisher's connection)."""
        raise NotImplementedError

    def _set_station_state(self, station: str, state: str) -> None:
        if self._station_state.get(station) == state:
            return
        self._station_state[station] = state
        self.announce_station_nowait(station, state, self._last_epoch.get(station))

    def announce_station_nowait(self, station: str, state: str, last_epoch: GpsTime | None) -> None:
        """Queue a station's retained status (also for another process: the main process of
        workers says "offline" for a dead worker's stations, whose connection has no last will)."""
        self._put(
            self._tree.station_status(station),
            fmt.station_status_payload(station, state, self._clock(), last_epoch),
            qos=self._s.qos_status,
            retain=True,
            alarm_class=True,
        )

    def _route(self, station: str) -> _StationRoute:
        """A station's topics and satellites schedule (made on its first epoch)."""
        route = self._routes[station] = _StationRoute(
            self._tree.summary(station), self._tree.satellites(station)
        )
        return route

    def publish_snapshot_nowait(
        self, snap: StationSnapshot, arrived_s: float | None = None
    ) -> None:
        """Queue the epoch summary (and the satellite figures when due) of one station;
        ``arrived_s``: when its epoch's last bytes arrived (for :attr:`on_summary_delivered`)."""
        if self.publish_summary_nowait(snap, arrived_s):
            self.publish_satellites_nowait(snap)

    def publish_summary_nowait(self, snap: StationSnapshot, arrived_s: float | None = None) -> bool:
        """Queue the epoch summary of one station (``arrived_s`` as in
        :meth:`publish_snapshot_nowait`); True when its satellites message is due, which
        :meth:`publish_satellites_nowait` of the same snapshot then queues (the daemon leaves
        that for the station's background turn: formatting it costs ~6 summaries)."""
        station = snap.station
        epoch = snap.time
        self._last_epoch[station] = epoch
        if self._station_state.get(station) != "online":
            self._set_station_state(station, "online")
        route = self._routes.get(station) or self._route(station)
        s = self._s
        self._queue(
            new_outbound_message(
                topic=route.summary,
                payload=fmt.summary_payload(snap),
                qos=s.qos_summary,
                retain=False,
                expiry_s=s.epoch_expiry_s,
                alarm_class=False,
                bulk=False,
                queued_s=self._monotonic(),
                origin_s=arrived_s,
                station=station,
            )
        )
        t = epoch.total_s
        due = route.sats_due_s
        if due is not None and route.sats_last_s <= t < due:
            return False  # (most epochs) the satellites message is not due
        route.sats_last_s = t
        gap = s.satellites_interval_s
        if due is None:
            # Stagger stations (receivers align epochs to the second): after its first one,
            # the n-th station's second satellites message waits n mod ⌊interval⌋ seconds
            # more, so the formatting and sending of 20 stations does not land in the same
            # second every interval; still at most one per interval.
            gap += self._sats_scheduled % max(int(gap), 1)
            self._sats_scheduled += 1
        route.sats_due_s = t + gap
        return True

    def publish_satellites_nowait(self, snap: StationSnapshot) -> None:
        """Queue the satellites message of a snapshot whose summary said it was due."""
        route = self._routes.get(snap.station) or self._route(snap.station)
        s = self._s
        self._put(
            route.satellites,
            fmt.satellites_payload(snap),
            qos=s.qos_satellites,
            retain=False,
            alarm_class=False,
            expiry_s=s.epoch_expiry_s,
            bulk=True,
        )

    def publish_alarm_states_nowait(self, statuses: Iterable[AlarmStatus]) -> None:
        """Queue the retained state of each alarm (call once at start so every alarm is visible)."""
        now = self._clock()
        for st in statuses:
            self._put(
                self._tree.alarm(st.station, st.alarm),
                fmt.alarm_state_payload(st, now),
                qos=self._s.qos_alarm,
                retain=True,
                alarm_class=True,
            )

    def publish_transitions_nowait(self, transitions: Iterable[AlarmTransition]) -> None:
        """Queue each transition on the event stream and as the alarm's new retained state."""
        now: dt.datetime | None = None
        for tr in transitions:
            if now is None:  # read once, and only when there is a transition (most epochs: none)
                now = self._clock()
            self._put(
                self._tree.events(tr.station),
                fmt.alarm_event_payload(tr),
                qos=self._s.qos_alarm,
                retain=False,
                alarm_class=True,
            )
            self._put(
                self._tree.alarm(tr.station, tr.alarm),
                fmt.alarm_state_payload(tr.status(), now),
                qos=self._s.qos_alarm,
                retain=True,
                alarm_class=True,
            )
            if tr.kind is AlarmKind.STREAM_STALL:
                stale = tr.state is AlarmState.ACTIVE
                self._set_station_state(tr.station, "stale" if stale else "online")

    def publish_health_nowait(self, daemon: DaemonSnapshot) -> None:
        """Queue the daemon health message (retained, expires after ``epoch_expiry_s``).

        Rate-limited to one per ``health_interval_s``: call it on every status tick. A worker's
        publisher sends none (the main process's does, for every worker)."""
        if not self._daemon_status:
            return
        now = self._monotonic()
        if (
            self._last_health_s is not None
            and now - self._last_health_s < self._s.health_interval_s
        ):
            return
        self._last_health_s = now
        self._put(
            self._tree.daemon_health(),
            fmt.health_payload(daemon, self._clock(), now),
            qos=self._s.qos_health,
            retain=True,
            alarm_class=False,
            expiry_s=self._s.epoch_expiry_s,
            bulk=True,
        )
