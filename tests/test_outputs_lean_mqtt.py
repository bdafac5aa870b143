"""The lean QoS 0/1 MQTT path (``outputs/_client.py``): PUBLISH bytes against paho's encoder and
MQTT 5.0 §3.3, PUBACK reading through a real socket in any chunking, mixed with packets paho
handles, and the whole path against the local Mosquitto; the publisher's acknowledgement deadline
when acknowledgements settle without waking its pump."""

from __future__ import annotations

import asyncio
import contextlib
import socket

import aiomqtt
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from ionwarden.daemon.config import MqttSettings
from ionwarden.daemon.outputs import MqttPublisher, Topic, _client
from tests._mqtt_support import (
    BROKER_HOST,
    BROKER_PORT,
    CONNACK_V5,
    ScriptedBroker,
    need,
    port_open,
    unique_prefix,
)

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def _paho() -> mqtt.Client:
    return mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)


def _paho_publish_bytes(topic: str, payload: bytes, qos: int, retain: bool,
                        props: Properties | None, mid: int) -> bytes:  # fmt: skip
    """What paho 2.x itself queues for this QoS 0 or 1 PUBLISH (its ``_send_publish``), captured
    from its out-queue on a client whose writes go nowhere."""
    c = _paho()
    c._sock = object()  # "connected": _send_publish only checks it is not None
    c.on_socket_register_write = lambda *_: None  # queue, do not write
    rc = c._send_publish(mid, topic.encode(), payload, qos, retain, False, None, props)
    assert rc == mqtt.MQTT_ERR_SUCCESS
    c._sock = None  # nothing to close
    return bytes(c._out_packet[-1]["packet"])


def _expiry(seconds: int) -> Properties:
    p = Properties(PacketTypes.PUBLISH)
    p.MessageExpiryInterval = seconds
    return p


def _varint_decode(data: bytes, pos: int) -> tuple[int, int]:
    """MQTT 5.0 §1.5.5 Variable Byte Integer, written out from the clause (value, next pos)."""
    value, mult = 0, 1
    while True:
        byte = data[pos]
        pos += 1
        value += (byte & 0x7F) * mult
        if not byte & 0x80:
            return value, pos
        mult *= 128


# Payload lengths at the Remaining Length's 1/2/3/4-byte boundaries (MQTT 5.0 §1.5.5, Table 1-1).
SIZES = [0, 1, 100, 127 - 20, 127 - 19, 16383 - 20, 16383 - 19, 16400, 2_097_151 - 20,
         2_097_151 - 19]  # fmt: skip


@pytest.mark.parametrize("size", SIZES)
@pytest.mark.parametrize("retain", [False, True])
@pytest.mark.parametrize("expiry", [None, 30, 86400])
@pytest.mark.parametrize("qos", [0, 1])
def test_lean_publish_bytes_equal_paho_and_mqtt5(size, retain, expiry, qos):
    """Lean QoS 0/1 PUBLISH == paho 2.x's bytes (reference library); fields as MQTT 5.0 §3.3.1
    (first byte 0x30 | QoS << 1 | retain), §1.5.5 (Remaining Length), §3.3.2 (topic, packet
    identifier for QoS 1 only, properties) and the payload."""
    topic = "ionwarden/ST-Ω/summary"  # a UTF-8 topic name (§1.5.4)
    payload = bytes(range(256)) * (size // 256) + bytes(range(size % 256))
    props = None if expiry is None else _expiry(expiry)
    for mid in (1, 258, 65535):
        packed = b"\x00" if props is None else bytes(props.pack())
        ours = _client.encode_publish(topic, payload, qos=qos, retain=retain, props=packed, mid=mid)
        assert ours == _paho_publish_bytes(topic, payload, qos, retain, props, mid)
        assert ours[0] == 0x30 | qos << 1 | retain
        remaining, pos = _varint_decode(ours, 1)
        assert remaining == len(ours) - pos
        name_len = int.from_bytes(ours[pos : pos + 2], "big")
        assert ours[pos + 2 : pos + 2 + name_len].decode() == topic
        pos += 2 + name_len
        if qos:
            assert int.from_bytes(ours[pos : pos + 2], "big") == mid
            pos += 2
        props_len, pos = _varint_decode(ours, pos)
        if expiry is None:
            assert props_len == 0
        else:  # Message Expiry Interval: identifier 0x02, four-byte integer (§3.3.2.3.3)
            assert ours[pos : pos + props_len] == b"\x02" + expiry.to_bytes(4, "big")
        assert ours[pos + props_len :] == payload


@pytest.mark.parametrize("topic", ["a/+/b", "a/#", "x" * 65536])
def test_lean_publish_refuses_what_paho_refuses(topic):
    """Wildcards and over-long topic names are refused as paho refuses them (MQTT 5.0 §3.3.2.1,
    §1.5.4: at most 65,535 bytes)."""
    with pytest.raises(ValueError) as ours:
        _client.encode_publish(topic, b"x", qos=1, retain=False, props=b"\x00", mid=1)
    with pytest.raises(ValueError) as paho:
        _paho().publish(topic, b"x", qos=1)
    assert str(ours.value) == str(paho.value)


def test_lean_publishes_the_socket_does_not_take_whole_are_finished_by_paho_in_order():
    """With the socket's send buffer full, lean QoS 0 and QoS 1 publishes leave their bytes to
    paho's queue: the peer receives the packets whole and in publishing order (each as paho would write it: ``_paho_publish_bytes``), the QoS 0 future
    completes once its packet is written (as paho's own QoS 0 publish), the QoS 1 future on its
    PUBACK (MQTT 5.0 §3.4)."""

    async def main() -> None:
        a, b = socket.socketpair()
        a.setblocking(False)
        b.setblocking(False)
        a.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 4096)
        pub = _client.QuickAckClient("127.0.0.1", 1883, protocol=aiomqtt.ProtocolVersion.V5)
        paho = pub._client
        assert isinstance(paho, _client._LeanPaho)
        paho._sock = a
        filled = 0
        with contextlib.suppress(BlockingIOError):
            while True:
                filled += a.send(b"\xff" * 65536)
        payload = bytes(range(256)) * 40  # 10 kB: more than the socket takes at once
        props = _expiry(60)
        first = paho._last_mid + 1
        ack0 = pub.iw_publish("t/qos0", payload, 0, False, props)
        ack1 = pub.iw_publish("t/qos1", payload, 1, True, None)
        assert not ack0.done()
        assert paho._out_packet  # queued behind the full socket
        expected = _paho_publish_bytes(
            "t/qos0", payload, 0, False, props, first
        ) + _paho_publish_bytes("t/qos1", payload, 1, True, None, first + 1)
        got = bytearray()
        loop = asyncio.get_running_loop()
        async with asyncio.timeout(10):
            while len(got) < filled + len(expected):
                got += await loop.sock_recv(b, 65536)
            await ack0
        assert bytes(got[filled:]) == expected
        assert not ack1.done()
        b.sendall(_puback(first + 1))
        async with asyncio.timeout(10):
            while not ack1.done():
                paho.loop_read()
                await asyncio.sleep(0.01)
        assert not paho._out_packet
        assert not pub._iw_acks
        loop.remove_writer(a.fileno())
        paho._sock = None
        a.close()
        b.close()

    asyncio.run(main())


# -- PUBACK reading -----------------------------------------------------------------------------
def _puback(mid: int, reason: int | None = None, reason_string: str | None = None) -> bytes:
    """A PUBACK (MQTT 5.0 §3.4): Remaining Length 2 (success, nothing else), 3 (with a reason
    code) or more (with properties: here a Reason String, identifier 0x1F, §3.4.2.2.2)."""
    body = mid.to_bytes(2, "big")
    if reason is not None or reason_string is not None:
        body += bytes((reason or 0,))
    if reason_string is not None:
        s = reason_string.encode()
        prop = b"\x1f" + len(s).to_bytes(2, "big") + s
        body += bytes((len(prop),)) + prop
    return bytes((0x40, len(body))) + body


PINGRESP = b"\xd0\x00"  # MQTT 5.0 §3.13


class _Reader:
    """A lean paho client (as QuickAckClient switches it) reading one end of a socket pair."""

    def __init__(self, ours: set[int]) -> None:
        self.a, self.b = socket.socketpair()
        self.a.setblocking(False)
        self.ours = ours
        self.settled: list[int] = []
        self.paho_acks: list[int] = []
        c = _paho()
        c.__class__ = _client._LeanPaho
        c._iw_rbuf = bytearray()
        c._iw_puback = self._puback
        c._sock = self.a
        c.on_publish = lambda _c, _u, mid, _rc, _p: self.paho_acks.append(mid)
        self.client = c

    def _puback(self, mid: int) -> bool:
        if mid not in self.ours:
            return False
        self.ours.discard(mid)
        self.settled.append(mid)
        return True

    def paho_owns(self, mid: int) -> None:
        """A publish paho sent itself: in its own bookkeeping, acknowledged through on_publish."""
        msg = mqtt.MQTTMessage(mid, b"t")
        msg.qos = 1
        self.client._out_messages[mid] = msg
        self.client._inflight_messages += 1

    def feed(self, data: bytes) -> None:
        self.b.sendall(data)
        rc = self.client.loop_read()
        assert rc == mqtt.MQTT_ERR_SUCCESS

    def close(self) -> None:
        self.a.close()
        self.b.close()


def _stream() -> tuple[bytes, list[int], list[int]]:
    """PUBACKs of ours (plain, with a reason code, with properties), a PINGRESP, and PUBACKs of
    publishes paho made itself, interleaved; (bytes, our mids in order, paho's mids in order)."""
    parts = [
        (_puback(1), 1, None),
        (_puback(2, 0x10), 2, None),  # No matching subscribers: still a success (Table 3-4)
        (PINGRESP, None, None),
        (_puback(900), None, 900),
        (_puback(3, 0x00, "fine"), 3, None),
        (_puback(4), 4, None),
        (_puback(901, 0x10), None, 901),
        (_puback(5), 5, None),
    ]
    return (
        b"".join(p for p, _, _ in parts),
        [m for _, m, _ in parts if m is not None],
        [m for _, _, m in parts if m is not None],
    )


def test_pubacks_in_one_read_settle_ours_and_leave_the_rest_to_paho():
    """One read with every packet: ours settled by the lean path in order, paho's through paho's
    on_publish, the PINGRESP through paho (packet layouts: MQTT 5.0 §3.4, §3.13)."""
    data, ours, pahos = _stream()
    r = _Reader(set(ours))
    for mid in pahos:
        r.paho_owns(mid)
    r.client._ping_t = 1.0  # a PINGREQ outstanding: paho clears it on PINGRESP
    r.feed(data)
    assert r.settled == ours
    assert r.paho_acks == pahos
    assert r.client._ping_t == 0
    assert not r.client._iw_rbuf
    assert r.client._in_packet["command"] == 0
    r.close()


@pytest.mark.parametrize("step", [1, 2, 3, 5, 7])
def test_pubacks_split_across_reads_settle_the_same(step):
    """The same stream delivered ``step`` bytes at a time (a packet may end up in paho's parser
    half-read): the same settlements in the same order."""
    data, ours, pahos = _stream()
    r = _Reader(set(ours))
    for mid in pahos:
        r.paho_owns(mid)
    for i in range(0, len(data), step):
        r.feed(data[i : i + step])
    assert r.settled == ours
    assert r.paho_acks == pahos
    assert not r.client._iw_rbuf
    assert r.client._in_packet["command"] == 0
    r.close()


@pytest.mark.parametrize("step", [None, 1, 3])
def test_pubacks_of_one_read_are_reported_once_after_it(step):
    """The lean path settles each PUBACK of ours as it parses it, and calls the after-read hook
    once per read, after the read's last packet (the publisher then settles its window once per
    read, not once per packet): the same settlements, in the same order, as one at a time."""
    data, ours, pahos = _stream()
    r = _Reader(set(ours))
    for mid in pahos:
        r.paho_owns(mid)
    seen: list[list[int]] = []
    r.client._iw_after_read = lambda: seen.append(list(r.settled))
    chunks = [data] if step is None else [data[i : i + step] for i in range(0, len(data), step)]
    for chunk in chunks:
        r.feed(chunk)
    assert r.settled == ours
    assert len(seen) == len(chunks)  # once per read, whatever it held
    assert seen[0] == (ours if step is None else [])  # after the whole read, not per packet
    assert seen[-1] == ours
    r.close()


def test_quickack_client_reports_a_reads_acknowledgements_once():
    """QuickAckClient completes each acknowledged publish's future as its PUBACK is parsed and
    calls ``iw_on_ack`` once after the read (none for a read without one of ours); a PUBACK of
    an unknown or already settled identifier settles nothing (exactly once)."""

    async def main() -> None:
        c = _client.QuickAckClient("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
        calls: list[int] = []
        c.iw_on_ack = lambda: calls.append(1)
        loop = asyncio.get_running_loop()
        futs = {mid: loop.create_future() for mid in (1, 2, 3)}
        c._iw_acks = dict(futs)
        assert c._iw_puback(1)
        assert c._iw_puback(2)
        assert not c._iw_puback(1)  # already settled
        assert not c._iw_puback(7)  # not ours
        assert calls == []  # not per packet
        c._iw_after_read()
        assert calls == [1]
        c._iw_after_read()  # a read without PUBACKs of ours
        assert calls == [1]
        assert [f.done() for f in futs.values()] == [True, True, False]
        assert c._iw_puback(3)
        c._iw_after_read()
        assert calls == [1, 1]

    asyncio.run(main())


def test_closed_connection_is_reported_as_lost():
    """A read of zero bytes (peer closed) is a lost connection, as in paho's own read."""
    r = _Reader(set())
    r.b.close()
    assert r.client._packet_read() == mqtt.MQTT_ERR_CONN_LOST
    r.a.close()


# -- against the local Mosquitto ------------------------------------------------------------------
@pytest.mark.integration
def test_lean_publishes_through_mosquitto_arrive_with_retain_and_expiry():
    """QoS 1 publishes on the lean path through the local Mosquitto: every acknowledgement future
    completes, a v5 subscriber receives each payload in order with its retain flag and Message
    Expiry Interval (MQTT 5.0 §3.3.2.3.3: the broker forwards the remaining lifetime, at most the
    value sent); QoS 2 still goes through paho on the same connection."""
    need("a Mosquitto broker", port_open(BROKER_HOST, BROKER_PORT))
    prefix = unique_prefix()
    n = 300

    async def main() -> list[aiomqtt.Message]:
        sub = aiomqtt.Client(BROKER_HOST, BROKER_PORT, protocol=aiomqtt.ProtocolVersion.V5)
        pub = _client.QuickAckClient(BROKER_HOST, BROKER_PORT,
                                     protocol=aiomqtt.ProtocolVersion.V5)  # fmt: skip
        got: list[aiomqtt.Message] = []
        async with sub, pub:
            assert isinstance(pub._client, _client._LeanPaho)
            await sub.subscribe(f"{prefix}/#", qos=1)
            acks = []
            for i in range(n):
                qos = 1 if i % 10 else (0, 2)[i // 10 % 2]
                props = _expiry(60) if i % 3 == 0 else None
                acks.append(pub.iw_publish(f"{prefix}/m{i % 7}", b"%d" % i, qos, False, props))
            acks.append(pub.iw_publish(f"{prefix}/kept", b"kept", 1, True, None))
            await asyncio.wait_for(asyncio.gather(*acks), 10)
            assert not pub._iw_acks
            async with asyncio.timeout(10):
                async for msg in sub.messages:
                    got.append(msg)
                    if len(got) == n + 1:
                        break
        async with aiomqtt.Client(BROKER_HOST, BROKER_PORT) as clean:  # drop the retained one
            await clean.publish(f"{prefix}/kept", b"", qos=1, retain=True)
        return got

    got = asyncio.run(main())
    # MQTT keeps the order of one publisher's messages per topic (§4.6) for a QoS; the topics are
    # i % 7, and paho's QoS 0/2 messages may be delivered apart: compare per topic and QoS 1.
    per_topic: dict[tuple[str, int], list[int]] = {}
    for msg in got:
        if msg.topic.value.endswith("/kept"):
            continue
        i = int(bytes(msg.payload))
        per_topic.setdefault((msg.topic.value, 1 if i % 10 else 0), []).append(i)
        expiry = getattr(msg.properties, "MessageExpiryInterval", None)
        if i % 3 == 0:
            assert expiry is not None
            assert 0 < expiry <= 60
        else:
            assert expiry is None
        assert msg.retain is False
    assert sorted(i for v in per_topic.values() for i in v) == list(range(n))
    for (_, qos), seq in per_topic.items():
        if qos == 1:
            assert seq == sorted(seq)
    kept = [m for m in got if m.topic.value.endswith("/kept")]
    assert len(kept) == 1
    assert bytes(kept[0].payload) == b"kept"


# -- the publisher's deadline -------------------------------------------------------------------
class _FirstAckOnly(ScriptedBroker):
    """A scripted broker: answers CONNECT, acknowledges the "online" status, acknowledges the
    next QoS 1 PUBLISH (A) only when the one after it (B) has arrived, and B never. Records when
    each PUBLISH arrived."""

    def __init__(self) -> None:
        self.publish_times: list[float] = []
        self.held = b""
        self.server: asyncio.Server | None = None
        self.writers: list[asyncio.StreamWriter] = []

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.writers.append(writer)
        loop = asyncio.get_running_loop()
        await reader.readexactly(1)
        n, _ = await self._remaining(reader)
        await reader.readexactly(n)  # CONNECT
        writer.write(CONNACK_V5)
        while True:
            try:
                first = (await reader.readexactly(1))[0]
            except asyncio.IncompleteReadError:
                return
            n, _ = await self._remaining(reader)
            body = await reader.readexactly(n)
            if first >> 4 == 3 and (first >> 1) & 3 == 1:  # PUBLISH, QoS 1 (§3.3.1)
                self.publish_times.append(loop.time())
                name_len = int.from_bytes(body[:2], "big")
                mid = body[2 + name_len : 4 + name_len]
                if len(self.publish_times) == 1:  # "online": at once
                    writer.write(b"\x40\x02" + mid)
                elif len(self.publish_times) == 2:  # A: once B has been sent too
                    self.held = mid
                elif len(self.publish_times) == 3:
                    writer.write(b"\x40\x02" + self.held)

    @staticmethod
    async def _remaining(reader: asyncio.StreamReader) -> tuple[int, int]:
        value, mult, used = 0, 1, 0
        while True:
            b = (await reader.readexactly(1))[0]
            used += 1
            value += (b & 0x7F) * mult
            mult *= 128
            if not b & 0x80:
                return value, used


def test_missing_puback_ends_the_session_at_its_own_deadline_not_an_earlier_ones():
    """Messages A and B are in flight (B sent 0.6 s after A); A is acknowledged once B is sent, B
    never is. The session ends on B's missing acknowledgement no earlier than ``timeout_s`` after
    B was sent (A's deadline, the one the pump was sleeping on, is 0.6 s earlier), and within a
    few seconds of it."""
    timeout_s = 1.5

    async def main() -> tuple[list[float], float]:
        loop = asyncio.get_running_loop()
        async with _FirstAckOnly() as broker:
            settings = MqttSettings(host="127.0.0.1", port=broker.port, timeout_s=timeout_s,
                                    reconnect_initial_s=30.0, reconnect_cap_s=30.0)  # fmt: skip
            pub = MqttPublisher(settings, monotonic=loop.time)
            task = asyncio.create_task(pub.run())
            await asyncio.wait_for(pub.wait_connected(), 10)
            pub._put(Topic("t/a"), b"A", qos=1, retain=False, alarm_class=True)
            await asyncio.sleep(0.6)
            pub._put(Topic("t/b"), b"B", qos=1, retain=False, alarm_class=True)
            await asyncio.wait_for(pub.wait_disconnected(), 10)
            ended = loop.time()
            pub.stop()
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
            return broker.publish_times, ended

    times, ended = asyncio.run(main())
    assert len(times) >= 3  # online, A, B
    b_sent = times[2]
    assert ended - b_sent >= timeout_s - 0.05  # not at A's deadline (0.6 s earlier)
    assert ended - b_sent < timeout_s + 3.0  # a bound, generous for a loaded machine
