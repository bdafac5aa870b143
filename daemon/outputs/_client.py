"""The MQTT client the publisher uses: aiomqtt's, plus two hooks for a pipelined window.

* ``TCP_QUICKACK`` re-armed after every PUBACK read (Linux; a no-op elsewhere): see
  :func:`_quickack`.
* A callback when the connection is lost, so publishes in flight are abandoned at once instead of
  each waiting for its acknowledgement timeout.
* :meth:`QuickAckClient.iw_publish`: publish without a task per message; the packet is written
  during the call, and a future completes on its acknowledgement.
* A lean QoS 0/1 path (:class:`_LeanPaho`): a QoS 1 PUBLISH is encoded here (MQTT 5.0 §3.3) and
  written at once, and the PUBACKs of those publishes (§3.4) are read in one ``recv`` and settled
  without paho's per-packet machinery (three ``recv`` calls, a dict, a ``Properties`` object and
  two callbacks per PUBACK). The MQTT client's share of a station-second went from 0.40 M
  instructions to 0.08 M (callgrind, 20 stations, with the publisher's changes). Every other packet
  (CONNACK, PINGRESP, DISCONNECT, a PUBACK of a publish paho sent itself) still goes through paho,
  from the same buffer. The publisher keeps its own record of what is unacknowledged and sends it
  again on the next connection (``_publisher``), so paho's in-flight bookkeeping is not needed for
  these publishes. A QoS 0 PUBLISH (the satellites message) is encoded and written the same way:
  paho's own publish builds a message, its info with a lock and condition, a ``Properties`` and
  a queue entry, and calls back twice, about ten times the instructions of the lean one.

They hook aiomqtt 2.x's paho callbacks (``_on_socket_open``, ``_on_publish``, ``_on_disconnect``,
``_on_socket_register_write``) and use its paho client (``_client``, ``_loop``) and paho 2.x's
packet read/queue methods (``_packet_read``, ``_sock_recv``, ``_sock_send``, ``_packet_queue``,
``_handle_pubackcomp``, ``_mid_generate``); ``bench/bench_outputs.py`` shows the effect against a
default mosquitto, and ``tests/test_outputs_lean_mqtt.py`` checks the bytes on the wire.
"""

# size: ~430 lines: the lean PUBLISH encoder and PUBACK reader sit beside the paho and aiomqtt
# hooks they stand in for, so the whole wire path of a publish reads in one place.
from __future__ import annotations

import asyncio
import contextlib
import logging
import socket
from typing import TYPE_CHECKING, Any

import aiomqtt
import paho.mqtt.client as mqtt
from paho.mqtt.properties import Properties

if TYPE_CHECKING:
    import ssl
    from collections.abc import Callable

    from paho.mqtt.enums import MQTTErrorCode

    from ionwarden.daemon.config import MqttSettings

__all__ = [
    "PackedOnce",
    "QuickAckClient",
    "encode_publish",
    "new_client",
    "raise_if_cancelled",
]

#: PUBLISH's first byte (MQTT 5.0 §3.3.1: packet type 3 in the high nibble; bits 2-1 the QoS,
#: bit 0 RETAIN).
_PUBLISH = 0x30
_QOS_BITS = 0x06
#: PUBACK's first byte (MQTT 5.0 §3.4.1: packet type 4, flags 0).
_PUBACK = 0x40
#: Bytes asked of the socket per read (PUBACKs are 4-5 bytes; a burst of 20 stations' is < 100).
_READ_SIZE = 65536
#: Largest payload MQTT can carry (MQTT 5.0 §1.5.5: the Remaining Length is at most 268,435,455).
_MAX_REMAINING = 268_435_455
#: Encoded (topic, retain, properties) headers kept (topics are per station and kind: a few
#: hundred at most; the cache starts again past this).
_HEADS_MAX = 4096


def _varint(n: int) -> bytes:
    """MQTT 5.0 §1.5.5 Variable Byte Integer."""
    out = bytearray()
    while True:
        byte, n = n & 0x7F, n >> 7
        if not n:
            out.append(byte)
            return bytes(out)
        out.append(byte | 0x80)


#: What a lean PUBLISH keeps of its topic, QoS, retain flag and properties (:func:`_publish_head`).
_Head = tuple[int, bytes, bytes, int]


def _publish_head(topic: str, qos: int, retain: bool, props: bytes) -> _Head:
    """The parts of a QoS 0 or 1 PUBLISH that do not change between payloads: the first byte
    (§3.3.1), the topic name with its length (§3.3.2.1, a UTF-8 string §1.5.4), the properties,
    and the Remaining Length without the payload (topic, packet identifier for QoS 1 only
    (§3.3.2.2), properties). Raises ``ValueError`` for a topic paho would refuse (wildcards,
    longer than 65,535 bytes)."""
    name = topic.encode("utf-8")
    if b"+" in name or b"#" in name:
        raise ValueError("Publish topic cannot contain wildcards.")
    if len(name) > 65535:
        raise ValueError("Publish topic is too long.")
    first = _PUBLISH | qos << 1 | (1 if retain else 0)
    return first, len(name).to_bytes(2, "big") + name, props, 2 + len(name) + 2 * qos + len(props)


def _publish_packet(head: _Head, payload: bytes, mid: int) -> bytes:
    """The PUBLISH of ``payload`` from its unchanging parts (:func:`_publish_head`), with packet
    identifier ``mid`` when its QoS is 1. Raises ``ValueError`` past MQTT's size limit."""
    first, name, props, fixed = head
    n = fixed + len(payload)
    # The Remaining Length (§1.5.5): one byte below 128, two below 16,384 (a summary's
    # ~500 bytes), written here without _varint's loop; longer through it.
    if n < 128:
        lead = bytes((first, n))
    elif n < 16384:
        lead = bytes((first, n & 0x7F | 0x80, n >> 7))
    elif n > _MAX_REMAINING:
        raise ValueError("Payload too large.")
    else:
        lead = bytes((first,)) + _varint(n)
    if first & _QOS_BITS:
        return b"".join((lead, name, mid.to_bytes(2, "big"), props, payload))
    return b"".join((lead, name, props, payload))


def encode_publish(
    topic: str, payload: bytes, *, qos: int, retain: bool, props: bytes, mid: int
) -> bytes:
    """One QoS 0 or 1 PUBLISH packet (MQTT 5.0 §3.3): ``props`` are the packed properties with
    their length (``b"\\x00"`` for none), ``mid`` the packet identifier (1-65535; not written
    for QoS 0)."""
    return _publish_packet(_publish_head(topic, qos, retain, props), payload, mid)


class _LeanPaho(mqtt.Client):
    """paho's client, reading what the socket has in one ``recv`` and settling the PUBACKs of the
    lean QoS 1 publishes itself (``_iw_puback``: True when the packet identifier was one of
    them); paho parses everything else from the same buffer (``_sock_recv`` serves it first).

    The class of the paho client aiomqtt makes is switched to this one (same layout: only methods
    differ), by :class:`QuickAckClient`."""

    _iw_rbuf: bytearray
    _iw_puback: Callable[[int], bool] | None = None
    #: Called after each read whose PUBACKs ``_iw_puback`` took: they are settled together, once
    #: per read, not once per packet.
    _iw_after_read: Callable[[], None] | None = None

    def _sock_recv(self, bufsize: int) -> bytes:
        buf = self._iw_rbuf
        if buf:
            out = bytes(buf[:bufsize])
            del buf[:bufsize]
            return out
        return super()._sock_recv(bufsize)

    def _packet_read(self) -> MQTTErrorCode:
        puback = self._iw_puback
        if puback is None:
            return super()._packet_read()
        try:
            return self._iw_read(puback)
        finally:
            after = self._iw_after_read
            if after is not None:
                after()

    def _iw_read(self, puback: Callable[[int], bool]) -> MQTTErrorCode:
        if self._in_packet["command"]:  # paho is in the middle of a packet: let it finish it
            rc = super()._packet_read()
            if rc != mqtt.MQTT_ERR_SUCCESS or self._in_packet["command"]:
                return rc
        buf = self._iw_rbuf
        try:
            data = super()._sock_recv(_READ_SIZE)
        except BlockingIOError:
            if not buf:
                return mqtt.MQTT_ERR_AGAIN
        except OSError as err:  # as paho's own read reports it
            self._easy_log(mqtt.MQTT_LOG_ERR, "failed to receive on socket: %s", err)
            return mqtt.MQTT_ERR_CONN_LOST
        else:
            if not data:
                return mqtt.MQTT_ERR_CONN_LOST
            buf += data
            self._last_bytes_received = mqtt.time_func()
            _quickack(self._sock)
        n = len(buf)
        while True:
            pos = 0
            # PUBACKs without properties (Remaining Length 2 or 3, §3.4.2) of our publishes
            while n - pos >= 4 and buf[pos] == _PUBACK and 2 <= buf[pos + 1] <= 3:
                end = pos + 2 + buf[pos + 1]
                if end > n or not puback((buf[pos + 2] << 8) | buf[pos + 3]):
                    break
                pos = end
            if pos:
                del buf[:pos]
                n -= pos
            if not n:
                return mqtt.MQTT_ERR_AGAIN
            rc = super()._packet_read()  # one other packet, from the buffer (then the socket)
            if rc != mqtt.MQTT_ERR_SUCCESS:
                return rc
            n = len(buf)

    def _handle_pubackcomp(self, cmd: Any) -> MQTTErrorCode:
        """A PUBACK that reached paho's parser (with properties, or split across reads)."""
        packet = self._in_packet["packet"]
        puback = self._iw_puback
        if (
            cmd == "PUBACK"
            and puback is not None
            and len(packet) >= 2
            and puback((packet[0] << 8) | packet[1])
        ):
            return mqtt.MQTT_ERR_SUCCESS
        return super()._handle_pubackcomp(cmd)


#: Linux only; elsewhere the re-arming below is skipped.
_TCP_QUICKACK: int | None = getattr(socket, "TCP_QUICKACK", None)
#: Linux: hold partial segments until uncorked (None elsewhere: corking is a no-op).
_TCP_CORK: int | None = getattr(socket, "TCP_CORK", None)
_IPPROTO_TCP = socket.IPPROTO_TCP


def _quickack(sock: object) -> None:
    """Ask the kernel to acknowledge what we received at once instead of after the delayed-ACK
    timer (Linux ``TCP_QUICKACK``; the kernel clears it again, so it is re-armed after each read).

    Why: with Nagle's algorithm on the broker (mosquitto's default ``set_tcp_nodelay false``) the
    broker holds each PUBACK after the first until our ACK of the previous segment arrives; with a
    pipelined window and nothing more to send, that ACK would wait ~40 ms for the timer."""
    if _TCP_QUICKACK is None or not isinstance(sock, socket.socket):
        return
    # (not contextlib.suppress: a context manager object per read)
    try:  # noqa: SIM105
        sock.setsockopt(_IPPROTO_TCP, _TCP_QUICKACK, 1)
    except OSError:
        pass


class QuickAckClient(aiomqtt.Client):
    """The aiomqtt client, re-arming ``TCP_QUICKACK`` (see :func:`_quickack`) when the socket opens
    and after each PUBACK it reads (the broker sends us nothing else but CONNACK and PINGRESP).

    Hooks aiomqtt's paho callbacks ``_on_socket_open`` / ``_on_publish`` (aiomqtt 2.x; the
    bench ``bench/bench_outputs.py`` shows the effect against a default mosquitto)."""

    _iw_sock: object = None
    _iw_acks: dict[int, asyncio.Future[None]] | None = None
    #: (topic, QoS, retain, properties) → the unchanging parts of a lean PUBLISH.
    _iw_heads: dict[tuple[str, int, bool, object], _Head] | None = None
    #: Called (on the event loop) after acknowledgements: once per read that brought PUBACKs of
    #: lean publishes, after each of paho's own (a PUBACK, or a QoS 0 write).
    iw_on_ack: Callable[[], None] | None = None
    #: Called (on the event loop) when the connection is lost: the publisher stops waiting for
    #: acknowledgements that cannot come any more, instead of waiting for each one's timeout.
    iw_on_lost: Callable[[], None] | None = None

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        paho = self._client
        if type(paho) is mqtt.Client:  # as aiomqtt 2.x makes it; otherwise paho's path only
            paho.__class__ = _LeanPaho
            paho._iw_rbuf = bytearray()  # type: ignore[attr-defined]
            paho._iw_puback = self._iw_puback  # type: ignore[attr-defined]
            paho._iw_after_read = self._iw_after_read  # type: ignore[attr-defined]

    def _iw_puback(self, mid: int) -> bool:
        """The PUBACK of ``mid`` arrived: complete its future (True if it was a lean publish);
        ``iw_on_ack`` is called once after the read that brought it (:meth:`_iw_after_read`)."""
        acks = self._iw_acks
        ack = acks.pop(mid, None) if acks else None
        if ack is None:
            return False
        if not ack.done():
            ack.set_result(None)
            self._iw_acked = True
        return True

    _iw_acked = False

    def _iw_after_read(self) -> None:
        """A read ended: ``iw_on_ack`` once for every PUBACK it settled (the publisher settles
        its window in sending order and refills it once, not once per packet)."""
        if self._iw_acked:
            self._iw_acked = False
            if self.iw_on_ack is not None:
                self.iw_on_ack()

    def _on_disconnect(self, client: Any, userdata: Any, *args: Any) -> None:
        super()._on_disconnect(client, userdata, *args)
        fut = self._disconnected
        if fut.done() and not fut.cancelled():
            fut.exception()  # seen: the publisher reports the loss as its own MqttError
        if self.iw_on_lost is not None:
            self._loop.call_soon_threadsafe(self.iw_on_lost)

    def iw_cork(self, on: bool) -> None:
        """Hold what is written until uncorked (Linux ``TCP_CORK``), so that messages written
        together leave in as few segments as fit, waking the broker once; uncorking sends what
        is held at once. A no-op elsewhere, or without a TCP socket."""
        sock = self._iw_sock
        if _TCP_CORK is None or not isinstance(sock, socket.socket):
            return
        try:  # noqa: SIM105 - (not contextlib.suppress: a context manager object per call)
            sock.setsockopt(_IPPROTO_TCP, _TCP_CORK, 1 if on else 0)
        except OSError:
            pass

    def _on_socket_open(self, client: Any, userdata: Any, sock: Any) -> None:
        super()._on_socket_open(client, userdata, sock)
        self._iw_sock = sock
        if isinstance(client, _LeanPaho):
            client._iw_rbuf.clear()  # a new connection: nothing of the old one is left to parse
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
        written). Raises ``MqttCodeError`` when the client cannot publish (not connected).

        QoS 0 and 1 take the lean path (see the module's docstring): the same bytes paho would
        send, written here; QoS 2 goes through paho."""
        client = self._client
        if qos > 1 or not isinstance(client, _LeanPaho):
            return self._iw_publish_paho(topic, payload, qos, retain, properties)
        if client._sock is None:
            raise aiomqtt.MqttCodeError(mqtt.MQTT_ERR_NO_CONN, "Could not publish message")
        heads = self._iw_heads
        if heads is None:
            self._iw_heads = heads = {}
        # A PackedOnce never changes: its header is found by the object (no pack() per publish);
        # other properties by their bytes, which may change between publishes.
        packed: object = properties
        if properties is not None and type(properties) is not PackedOnce:
            packed = bytes(properties.pack())  # type: ignore[no-untyped-call]
        key = (topic, qos, retain, packed)
        head = heads.get(key)
        if head is None:
            if len(heads) >= _HEADS_MAX:
                heads.clear()
            props = b"\x00" if properties is None else bytes(properties.pack())  # type: ignore[no-untyped-call]
            heads[key] = head = _publish_head(topic, qos, retain, props)
        # paho numbers every publish, QoS 0 too; the identifier is written for QoS 1 only.
        mid = client._mid_generate()
        packet = _publish_packet(head, payload, mid)
        ack: asyncio.Future[None] = self._loop.create_future()
        sent = 0
        if not client._out_packet:  # nothing queued before it: write now
            # A failed write leaves the packet to paho's queue, which meets the error again and
            # reports the lost connection its own way (BlockingIOError included). Not
            # contextlib.suppress: that is a context manager object per publish.
            try:  # noqa: SIM105
                sent = client._sock_send(packet)
            except OSError:
                pass
        if sent == len(packet):
            client._last_msg_out = mqtt.time_func()
            if not qos:
                ack.set_result(None)  # QoS 0: done once written
                return ack
        elif qos:
            client._packet_queue(mqtt.PUBLISH, packet[sent:], mid, 1)
        else:
            # paho writes the rest (perhaps at once: _on_socket_register_write), then marks the
            # message info published, as for a QoS 0 publish of its own; the future is
            # registered only after, so its completion never re-enters the caller's _fill.
            info = mqtt.MQTTMessageInfo(mid)
            client._packet_queue(mqtt.PUBLISH, packet[sent:], mid, 0, info)
            if info.is_published():
                ack.set_result(None)
                return ack
        acks = self._iw_acks
        if acks is None:
            self._iw_acks = acks = {}
        acks[mid] = ack
        return ack

    def _iw_publish_paho(
        self, topic: str, payload: bytes, qos: int, retain: bool, properties: Properties | None
    ) -> asyncio.Future[None]:
        """:meth:`iw_publish` through paho's own publish (QoS 2, or a client not switched)."""
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


def raise_if_cancelled() -> None:
    """Re-raise a cancellation that ``asyncio.wait_for`` swallowed.

    aiomqtt 2.x waits for CONNACK and PUBACK with ``asyncio.wait_for``, which on Python < 3.12 can
    drop a cancellation that arrives as the awaited future completes (CPython gh-86296); the task
    then stays "cancelling" but runs on. Called after each such await, so shutdown never hangs.
    """
    task = asyncio.current_task()
    if task is not None and task.cancelling():
        raise asyncio.CancelledError


def new_client(
    s: MqttSettings, *, will: aiomqtt.Will | None, password: str | None, tls: ssl.SSLContext | None
) -> QuickAckClient:
    """A fresh MQTT v5 client for one connection attempt of the publisher."""
    return QuickAckClient(
        s.host,
        s.port,
        username=s.username or None,
        password=password,
        identifier=s.client_id or None,
        protocol=aiomqtt.ProtocolVersion.V5,
        will=will,
        keepalive=s.keepalive_s,
        timeout=s.timeout_s,
        tls_context=tls,
        # Small QoS 1 packets and their PUBACKs must not wait for Nagle + delayed ACK (~40 ms).
        socket_options=((socket.IPPROTO_TCP, socket.TCP_NODELAY, 1),),
        # Our window is the bound: paho's own in-flight limit must not hold messages back
        # (a little room on top for the status messages sent outside the window).
        max_inflight_messages=s.publish_window + 4,
        logger=logging.getLogger("ionwarden.daemon.outputs.mqtt.client"),
    )
