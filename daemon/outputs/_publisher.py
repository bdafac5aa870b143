"""The MQTT publisher: never blocks the estimator, survives the broker going away (aiomqtt 2.5).

Producers call the ``*_nowait`` methods (``_producers.TopicProducers``: sync, never blocking)
from the event loop; they format the payload and queue it in the :class:`OutboundBuffer` and,
while connected and the window of
``publish_window`` unacknowledged messages has room, hand it to the socket right away (a
non-blocking write; what the socket does not take is written when it can). :meth:`MqttPublisher.run`
— one named task in the runtime's TaskGroup — connects, keeps the window full, settles
acknowledgements in sending order, and on any transient MQTT error waits a backoff delay
(``ionwarden.daemon.runtime`` pure generator) and reconnects with a fresh client (so nothing
half-sent is replayed behind our back; our buffer is the only source).

ionwarden only publishes: it never subscribes and takes no commands over MQTT.
"""

# size: ~410 lines keep the session, the in-flight window and its ack hooks in one class.
from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections import deque
from typing import TYPE_CHECKING

import aiomqtt
from paho.mqtt.packettypes import PacketTypes

from ionwarden.daemon.runtime import backoff_delays

from . import _payloads as fmt
from ._buffer import OutboundMessage
from ._client import PackedOnce, QuickAckClient, new_client, raise_if_cancelled
from ._credentials import resolve_password, tls_context
from ._model import MqttStatistics
from ._producers import TopicProducers, utc_now

if TYPE_CHECKING:
    import datetime as dt
    import random
    from collections.abc import Callable

    from ionwarden.daemon.config import MqttSettings


__all__ = ["TRANSIENT_MQTT_ERRORS", "MqttPublisher"]

log = logging.getLogger("ionwarden.daemon.outputs.mqtt")

#: Errors that mean "the link is down, reconnect after a backoff delay" (STYLE rule 10). aiomqtt
#: maps socket, TLS and protocol failures (and negative CONNACKs) to MqttError; anything else is a
#: bug and crashes the TaskGroup.
TRANSIENT_MQTT_ERRORS: tuple[type[BaseException], ...] = (aiomqtt.MqttError,)
#: Time allowed for the goodbye messages ("offline") on shutdown.
GOODBYE_TIMEOUT_S = 2.0


class MqttPublisher(TopicProducers):
    """Publishes the topic tree of docs/mqtt.md; one instance per daemon, one :meth:`run` each.

    The runtime starts ``run()`` as a named task of its TaskGroup, awaits :meth:`wait_ready`
    before READY=1 (first connect done or failed — then it keeps buffering and retrying), feeds it
    with the ``*_nowait`` methods, and calls :meth:`stop` (flush, "offline", disconnect) at
    shutdown; cancelling the task also says "offline" (bounded by ``GOODBYE_TIMEOUT_S``).
    ``clock`` (UTC now) and ``monotonic`` are injectable for tests; ``rng`` seeds the backoff
    jitter; ``on_published(msg, queued_to_ack_s)`` is called after each acknowledgement.

    ``daemon_status=False`` is a worker's publisher (``[runtime] workers`` > 1): it publishes its
    stations' topics only. The daemon's status (and its last will) and the health message belong
    to the main process's publisher, which sees every worker.
    """

    def __init__(
        self,
        settings: MqttSettings,
        *,
        clock: Callable[[], dt.datetime] = utc_now,
        monotonic: Callable[[], float] = time.monotonic,
        rng: random.Random | None = None,
        on_published: Callable[[OutboundMessage, float], None] | None = None,
        daemon_status: bool = True,
    ) -> None:
        super().__init__(settings, clock=clock, monotonic=monotonic, daemon_status=daemon_status)
        self._password = resolve_password(settings)
        self._tls = tls_context(settings)
        self._rng = rng
        self._on_published = on_published
        self._wake = asyncio.Event()
        self._stop = asyncio.Event()
        self._ready = asyncio.Event()
        self._connected_event = asyncio.Event()
        self._disconnected_event = asyncio.Event()
        self._disconnected_event.set()
        self._running = False
        self._connected = False
        self._published = 0
        self._connects = 0
        self._disconnects = 0
        self._expiry: dict[int, PackedOnce] = {}
        self._failed: BaseException | None = None
        self._live: QuickAckClient | None = None  # the connected client, during a session
        #: The loop run() runs on (asyncio.get_running_loop() is a getpid() system call each).
        self._loop: asyncio.AbstractEventLoop | None = None
        #: Messages in flight, in sending order: (message, acknowledged, deadline (loop time)).
        self._inflight: deque[tuple[OutboundMessage, asyncio.Future[None], float]] = deque()
        self._lost = False
        #: (station, seconds) of each acknowledged summary: frame received → PUBACK (the exporter).
        self.on_summary_delivered: Callable[[str, float], None] | None = None
        #: Called after a read's acknowledgements settled (``StepLane.open``: see
        #: :meth:`awaiting_acks`).
        self.on_acked: Callable[[], None] | None = None

    def _kick(self) -> None:
        if self._live is not None:
            self._fill()
            if len(self._inflight) > 1:
                return  # the pump already sleeps until an older message's deadline
        self._wake.set()

    def cork(self, on: bool) -> None:
        """While on, messages queued leave the socket together (the burst tick's summaries: one
        wake-up of the broker; ``QuickAckClient.iw_cork``); off sends what was held at once."""
        if self._live is not None:
            self._live.iw_cork(on)

    def awaiting_acks(self) -> bool:
        """Messages sent on a live link wait for their acknowledgement (the step lane holds
        background work back meanwhile, for the broker's turn on the CPU: ``StepLane``)."""
        return bool(self._inflight) and self._live is not None and not self._lost

    def statistics(self) -> MqttStatistics:
        b = self._buffer
        return MqttStatistics(
            connected=self._connected,
            buffered_alarm=b.alarm_depth,
            buffered_epoch=b.epoch_depth,
            published_total=self._published,
            dropped_epoch_total=b.dropped_epoch,
            dropped_alarm_total=b.dropped_alarm,
            connects_total=self._connects,
            disconnects_total=self._disconnects,
        )

    # --- lifecycle --------------------------------------------------------------------------

    async def wait_ready(self) -> None:
        """Return once the first connect succeeded or failed (then we run on, buffering)."""
        await self._ready.wait()

    async def wait_connected(self) -> None:
        await self._connected_event.wait()

    async def wait_disconnected(self) -> None:
        await self._disconnected_event.wait()

    async def wait_drained(self) -> None:
        """Return once every queued message has been acknowledged by the broker."""
        await self._drained.wait()

    def _set_connected(self, connected: bool) -> None:
        self._connected = connected
        if connected:
            self._connected_event.set()
            self._disconnected_event.clear()
        else:
            self._connected_event.clear()
            self._disconnected_event.set()

    def stop(self) -> None:
        """Ask :meth:`run` to flush, say "offline" and return (idempotent, non-blocking)."""
        self._stop.set()
        self._wake.set()

    def _client(self) -> QuickAckClient:
        s = self._s
        will = (
            aiomqtt.Will(
                topic=self._tree.daemon_status().value,
                payload=fmt.daemon_status_payload("offline", None, self._version),
                qos=s.qos_status,
                retain=True,
            )
            if self._daemon_status
            else None
        )
        return new_client(s, will=will, password=self._password, tls=self._tls)

    async def run(self) -> None:
        """Connect, publish, reconnect with backoff until :meth:`stop` (or cancellation)."""
        if self._running:
            raise RuntimeError("MqttPublisher.run is already running")
        self._running = True
        self._loop = asyncio.get_running_loop()
        s = self._s
        delays = backoff_delays(
            initial_s=s.reconnect_initial_s, cap_s=s.reconnect_cap_s, rng=self._rng
        )
        try:
            while not self._stop.is_set():
                try:
                    async with self._client() as client:
                        raise_if_cancelled()
                        self._set_connected(True)
                        self._connects += 1
                        self._ready.set()
                        log.info("MQTT connected to %s:%d", s.host, s.port)
                        delays = backoff_delays(
                            initial_s=s.reconnect_initial_s, cap_s=s.reconnect_cap_s, rng=self._rng
                        )
                        await self._session(client)
                        return
                except TRANSIENT_MQTT_ERRORS as exc:
                    if self._connected:
                        self._disconnects += 1
                    self._set_connected(False)
                    self._ready.set()
                    delay = next(delays)
                    log.warning(
                        "MQTT broker %s:%d: %s; %d messages buffered; reconnecting in %.2f s",
                        s.host,
                        s.port,
                        exc,
                        len(self._buffer),
                        delay,
                    )
                    with contextlib.suppress(TimeoutError):
                        async with asyncio.timeout(delay):
                            await self._stop.wait()
        finally:
            self._set_connected(False)
            self._running = False

    def _props(self, msg: OutboundMessage) -> PackedOnce | None:
        if msg.expiry_s is None:
            return None
        props = self._expiry.get(msg.expiry_s)
        if props is None:
            props = PackedOnce(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
            props.MessageExpiryInterval = msg.expiry_s
            self._expiry[msg.expiry_s] = props
        return props

    async def _publish(self, client: aiomqtt.Client, msg: OutboundMessage) -> None:
        """One publish, awaited (the "online" and goodbye messages, outside the window)."""
        await client.publish(
            msg.topic.value,
            msg.payload,
            qos=msg.qos,
            retain=msg.retain,
            properties=self._props(msg),
        )

    def _link_lost(self) -> None:
        self._lost = True
        self._wake.set()

    def _fill(self) -> None:
        """Send buffered messages while the window has room (sync: called by the producers too,
        so a summary leaves on the socket during the estimate step that made it)."""
        client = self._live
        if client is None:
            return
        buf = self._buffer
        inflight = self._inflight
        window = self._s.publish_window
        expiry = self._expiry
        deadline = None  # read from the loop's clock once a message is sent (often none is)
        while len(inflight) < window:
            msg = buf.take()
            if msg is None:
                return
            if deadline is None:
                loop = self._loop
                if loop is None:  # (a session run() did not start)
                    self._loop = loop = asyncio.get_running_loop()
                deadline = loop.time() + self._s.timeout_s
            props = None if msg.expiry_s is None else expiry.get(msg.expiry_s)
            try:
                ack = client.iw_publish(
                    msg.topic.value,
                    msg.payload,
                    msg.qos,
                    msg.retain,
                    props if props is not None else self._props(msg),
                )
            except TRANSIENT_MQTT_ERRORS as exc:  # the link is down: the session ends
                if self._failed is None:
                    self._failed = exc
                self._wake.set()
                return
            inflight.append((msg, ack, deadline))

    def _settle(self) -> None:
        """Settle acknowledged messages, in sending order (also called on each PUBACK)."""
        inflight = self._inflight
        buf = self._buffer
        while inflight and inflight[0][1].done():
            msg, _, _ = inflight.popleft()
            buf.pop(msg)
            self._published += 1
            if self._on_published is not None:
                self._on_published(msg, self._monotonic() - msg.queued_s)
            if msg.origin_s is not None and self.on_summary_delivered is not None:
                self.on_summary_delivered(msg.station, self._monotonic() - msg.origin_s)

    def _on_ack(self) -> None:
        self._settle()
        self._fill()  # the window has room again
        # The pump sleeps until the oldest message's deadline (a stale, earlier one is only a
        # spurious wake-up): it needs waking only to see the buffer drained.
        if not self._inflight:
            self._wake.set()
        if self.on_acked is not None:
            self.on_acked()

    async def _session(self, client: QuickAckClient) -> None:
        online = OutboundMessage(
            topic=self._tree.daemon_status(),
            payload=fmt.daemon_status_payload("online", self._clock(), self._version),
            qos=self._s.qos_status,
            retain=True,
        )
        self._lost = False
        self._failed = None
        client.iw_on_lost = self._link_lost
        client.iw_on_ack = self._on_ack
        try:
            if self._daemon_status:
                await self._publish(client, online)
                raise_if_cancelled()
            try:
                self._live = client
                await self._pump()
            finally:
                self._abandon()
        except asyncio.CancelledError:
            with contextlib.suppress(TimeoutError, *TRANSIENT_MQTT_ERRORS):
                async with asyncio.timeout(GOODBYE_TIMEOUT_S):
                    await self._goodbye(client)
            raise
        await self._goodbye(client)

    async def _pump(self) -> None:
        """Keep up to ``publish_window`` messages in flight until stopped or the link breaks.

        Each message is handed to the client at once (producers send too, see :meth:`_fill`) and
        settled in sending order when its PUBACK arrives (QoS 0: once written). A message leaves
        the buffer only when it and every message sent before it are settled, so the buffer's
        order and at-least-once guarantees hold; a failed publish, a lost connection or a PUBACK
        missing after ``timeout_s`` ends the session (reconnect, then everything unacknowledged
        is sent again, in order)."""
        loop = asyncio.get_running_loop()
        inflight = self._inflight
        wake = self._wake
        while True:
            wake.clear()
            self._settle()
            if self._failed is not None:
                raise self._failed
            if self._lost:
                raise aiomqtt.MqttError("connection to the broker lost")
            self._fill()
            if inflight and inflight[0][1].done():  # e.g. QoS 0, complete once written
                continue
            if not inflight:
                self._drained.set()
                if self._stop.is_set():
                    return
                await wake.wait()
            else:
                deadline = inflight[0][2]
                try:
                    async with asyncio.timeout_at(deadline):
                        await wake.wait()
                except TimeoutError:
                    # acknowledgements settle without waking the pump: the head may have moved on
                    if inflight and not inflight[0][1].done() and loop.time() >= inflight[0][2]:
                        raise aiomqtt.MqttError(
                            f"no acknowledgement within {self._s.timeout_s:g} s"
                        ) from None
            raise_if_cancelled()

    def _abandon(self) -> None:
        """The session ends: forget the publishes in flight; their messages stay buffered and are
        sent again, in order, on the next connection."""
        self._live = None
        self._inflight.clear()
        self._buffer.resend_all()

    async def _goodbye(self, client: aiomqtt.Client) -> None:
        """Retained "offline" for every station we announced, then for the daemon."""
        now = self._clock()
        for station in list(self._station_state):
            self._station_state[station] = "offline"
            payload = fmt.station_status_payload(
                station, "offline", now, self._last_epoch.get(station)
            )
            await client.publish(
                self._tree.station_status(station).value,
                payload,
                qos=self._s.qos_status,
                retain=True,
            )
        if self._daemon_status:
            await client.publish(
                self._tree.daemon_status().value,
                fmt.daemon_status_payload("offline", now, self._version),
                qos=self._s.qos_status,
                retain=True,
            )
        log.info("MQTT: announced offline, disconnecting")
