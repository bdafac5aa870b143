"""The MQTT client the publisher uses: aiomqtt's, plus two hooks for a pipelined window.

* ``TCP_QUICKACK`` re-armed after every PUBACK read (Linux; a no-op elsewhere): see
  :func:`_quickack`.
* A callback when the connection is lost, so publishes in flight are abandoned at once instead of
  each waiting for its acknowledgement timeout.
* :meth:`QuickAckClient.iw_publish`: publish without a task per message; the packet is written
  during the call, and a future completes on its acknowledgement.

They hook aiomqtt 2.x's paho callbacks (``_on_socket_open``, ``_on_publish``, ``_on_disconnect``,
``_on_socket_register_write``) and use its paho client (``_client``, ``_loop``);
``bench/bench_outputs.py`` shows the effect against a default mosquitto.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
from typing import TYPE_CHECKING, Any

import aiomqtt
import paho.mqtt.client as mqtt
from paho.mqtt.properties import Properties

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["PackedOnce", "QuickAckClient"]

#: Linux only; elsewhere the re-arming below is skipped.
_TCP_QUICKACK: int | None = getattr(socket, "TCP_QUICKACK", None)


def _quickack(sock: object) -> None:
    """Ask the kernel to acknowledge what we received at once instead of after the delayed-ACK
    timer (Linux ``TCP_QUICKACK``; the kernel clears it again, so it is re-armed after each read).

    Why: with Nagle's algorithm on the broker (mosquitto's default ``set_tcp_nodelay false``) the
    broker holds each PUBACK after the first until our ACK of the previous segment arrives; with a
    pipelined window and nothing more to send, that ACK would wait ~40 ms for the timer."""
    if _TCP_QUICKACK is None or not isinstance(sock, socket.socket):
        return
    with contextlib.suppress(OSError):
        sock.setsockopt(socket.IPPROTO_TCP, _TCP_QUICKACK, 1)


class QuickAckClient(aiomqtt.Client):
    """The aiomqtt client, re-arming ``TCP_QUICKACK`` (see :func:`_quickack`) when the socket opens
    and after each PUBACK it reads (the broker sends us nothing else but CONNACK and PINGRESP).

    Hooks aiomqtt's paho callbacks ``_on_socket_open`` / ``_on_publish`` (aiomqtt 2.x; the
    bench ``bench/bench_outputs.py`` shows the effect against a default mosquitto)."""

    _iw_sock: object = None
    _iw_acks: dict[int, asyncio.Future[None]] | None = None
    #: Called (on the event loop) after each acknowledgement (PUBACK, or a QoS 0 write).
    iw_on_ack: Callable[[], None] | None = None
    #: Called (on the event loop) when the connection is lost: the publisher stops waiting for
    #: acknowledgements that cannot come any more, instead of waiting for each one's timeout.
    iw_on_lost: Callable[[], None] | None = None

    def _on_disconnect(self, client: Any, userdata: Any, *args: Any) -> None:
        super()._on_disconnect(client, userdata, *args)
        fut = self._disconnected
        if fut.done() and not fut.cancelled():
            fut.exception()  # seen: the publisher reports the loss as its own MqttError
        if self.iw_on_lost is not None:
            self._loop.call_soon_threadsafe(self.iw_on_lost)

    def _on_socket_open(self, client: Any, userdata: Any, sock: Any) -> None:
        super()._on_socket_open(client, userdata, sock)
        self._iw_sock = sock
        _quickack(sock)

    def _on_publish(
        self, client: Any, userdata: Any, mid: int, reason_code: Any, properties: Any
    ) -> None:
        super()._on_publish(client, userdata, mid, reason_code, properties)
        _quickack(self._iw_sock)
        ack = self._iw_acks.pop(mid, None) if self._iw_acks is not None else None
        if ack is not None and not ack.done():
            ack.set_result(None)
            if self.iw_on_ack is not None:
                self.iw_on_ack()

    def iw_publish(
        self, topic: str, payload: bytes, qos: int, retain: bool, properties: Properties | None
    ) -> asyncio.Future[None]:
        """Publish without waiting: the packet is written now when the socket takes it (see
        :meth:`_on_socket_register_write`); the future completes on its PUBACK (QoS 0: once
        written). Raises ``MqttCodeError`` when the client cannot publish (not connected)."""
        info = self._client.publish(topic, payload, qos, retain, properties)
        if info.rc != mqtt.MQTT_ERR_SUCCESS:
            raise aiomqtt.MqttCodeError(info.rc, "Could not publish message")
        ack: asyncio.Future[None] = self._loop.create_future()
        if info.is_published():
            ack.set_result(None)
        else:
            if self._iw_acks is None:
                self._iw_acks = {}
            self._iw_acks[info.mid] = ack
        return ack

    def _on_socket_register_write(self, client: Any, userdata: Any, sock: Any) -> None:
        """paho has bytes to write. aiomqtt would register a writer and write one loop iteration
        later (after every other ready task, e.g. the other stations' estimate steps); on the event
        loop we write at once instead, and register the writer only for what the socket did not
        take. From paho's connect thread, aiomqtt's way."""
        try:
            on_loop = asyncio.get_running_loop() is self._loop
        except RuntimeError:
            on_loop = False
        if on_loop:
            # A failure here leaves the bytes queued: aiomqtt's writer meets it again, reports it.
            with contextlib.suppress(Exception):
                client.loop_write()
            if not client.want_write():
                return
        super()._on_socket_register_write(client, userdata, sock)


class PackedOnce(Properties):
    """PUBLISH properties that never change once built (the message expiry): paho serialises
    them for every publish; this keeps the bytes of the first time."""

    _packed: bytes | None = None

    def pack(self) -> bytes:
        packed = self._packed
        if packed is None:
            packed = bytes(super().pack())  # type: ignore[no-untyped-call]
            # paho's __setattr__ accepts only property names
            object.__setattr__(self, "_packed", packed)
        return packed
