"""Pipelined MQTT publishing: the buffer's in-flight bookkeeping (hypothesis), the template
formatters against json.dumps (hypothesis), TCP_QUICKACK re-arming, and a pipelined window against
a private default Mosquitto (Nagle on, ``set_tcp_nodelay`` unset)."""

from __future__ import annotations

import asyncio
import dataclasses
import itertools
import json
import math
import socket

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.config import AlarmSettings, MqttSettings
from ionwarden.daemon.outputs import (
    MqttPublisher,
    OutboundBuffer,
    OutboundMessage,
    Topic,
    _client,
    satellites_payload,
    summary_payload,
)
from ionwarden.parsers import GpsTime, gps_to_utc, sat_name
from tests._mqtt_support import collect, persistent_client, private_broker, unique_prefix
from tests._outputs_support import T0, class_message, make_snapshot

TOPIC = Topic("p/ALPHA/summary")

# Operations on the buffer as the publisher drives it: put (class 0 alarm, 1 summary, 2 bulk),
# take (send the next one), ack (the oldest in flight is acknowledged), "break" (link lost).
OPS = st.lists(
    st.one_of(
        st.tuples(st.just("put"), st.integers(0, 2)),
        st.tuples(st.sampled_from(["take", "ack", "break"]), st.none()),
    ),
    max_size=300,
)


@given(ops=OPS, alarm_bound=st.integers(1, 8), epoch_bound=st.integers(1, 8))
def test_buffer_in_flight_keeps_order_bounds_and_counts(ops, alarm_bound, epoch_bound):
    """OutboundBuffer with messages in flight: a message leaves only when acknowledged or counted
    as dropped; after a broken link every unacknowledged one is sent again, oldest first per
    class; first sends follow the class priority and each class's order."""
    buf = OutboundBuffer(alarm_bound=alarm_bound, epoch_bound=epoch_bound)
    inflight: list[OutboundMessage] = []  # in send order, as the publisher settles them
    acked: list[OutboundMessage] = []
    sent_per_class: dict[tuple[bool, bool], list[int]] = {}
    put = 0
    for n, (op, klass) in enumerate(ops):
        if op == "put":
            put += 1
            buf.put_nowait(class_message(TOPIC, n, klass))
        elif op == "take":
            before_alarm_unsent = buf.alarm_depth - sum(m.alarm_class for m in inflight)
            msg = buf.take()
            if msg is None:
                assert buf.unsent == 0
            else:
                if before_alarm_unsent > 0:
                    assert msg.alarm_class  # alarm class goes first
                inflight.append(msg)
                sent_per_class.setdefault((msg.alarm_class, msg.bulk), []).append(int(msg.payload))
        elif op == "ack":
            if inflight:
                msg = inflight.pop(0)
                before = len(buf)
                buf.pop(msg)
                if len(buf) < before:
                    acked.append(msg)
        else:  # the link broke: in-flight publishes are abandoned and resent later
            inflight.clear()
            buf.resend_all()
        assert buf.alarm_depth <= alarm_bound
        assert buf.epoch_depth <= 2 * epoch_bound
        assert 0 <= buf.in_flight <= len(buf)
    assert put == len(acked) + len(buf) + buf.dropped_alarm + buf.dropped_epoch
    for klass in ((True, False), (False, False), (False, True)):
        order = [int(m.payload) for m in acked if (m.alarm_class, m.bulk) == klass]
        assert order == sorted(order)  # acknowledged in order, each exactly once
        assert len(set(order)) == len(order)


def test_buffer_resends_unacknowledged_in_order():
    """OutboundBuffer.resend_all hands out again the messages in flight, oldest first."""
    buf = OutboundBuffer(alarm_bound=10, epoch_bound=10)
    msgs = [
        OutboundMessage(topic=TOPIC, payload=bytes([i]), qos=1, retain=False, alarm_class=True)
        for i in range(3)
    ]
    for m in msgs:
        buf.put_nowait(m)
    assert [buf.take(), buf.take()] == msgs[:2]
    buf.pop(msgs[0])
    buf.resend_all()
    assert buf.in_flight == 0
    assert [buf.take(), buf.take(), buf.take()] == [msgs[1], msgs[2], None]


def test_buffer_overflow_drops_in_flight_message_first():
    """An epoch-class overflow drops the oldest (in flight) message; its late acknowledgement is
    a no-op and the count stays exact."""
    buf = OutboundBuffer(alarm_bound=10, epoch_bound=2)
    m = [OutboundMessage(topic=TOPIC, payload=bytes([i]), qos=1, retain=False) for i in range(3)]
    buf.put_nowait(m[0])
    buf.put_nowait(m[1])
    assert buf.take() is m[0]
    assert not buf.put_nowait(m[2])  # m[0] dropped while in flight
    assert buf.dropped_epoch == 1
    assert buf.in_flight == 0
    buf.pop(m[0])  # its PUBACK arrives: nothing else leaves
    assert len(buf) == 2
    assert [buf.take(), buf.take()] == [m[1], m[2]]


# --- template formatting == json.dumps ----------------------------------------------------------

FLOATS = (
    st.floats(allow_nan=True, allow_infinity=True, width=64)
    | st.floats(-2e8, 2e8)
    | st.floats(-1.0, 1.0)
    | st.integers(-(10**9), 10**9).map(lambda i: i / 10**4)
) | st.sampled_from([0.0, -0.0, 0.00005, -0.00015, 1e15, 1e16, 123456789.98765, 2.675, 0.285, 1e-7])


def _num(x: float, digits: int):
    v = float(x)
    return round(v, digits) if math.isfinite(v) else None


def _reference_summary(snap) -> bytes:
    """The previous dict + json.dumps formatter (common practice: the json module is the
    reference for JSON text)."""
    t = snap.time
    doc = {
        "schema": "ionwarden.summary/1",
        "station": snap.station,
        "time_utc": gps_to_utc(t).strftime("%Y-%m-%dT%H:%M:%S.")
        + f"{gps_to_utc(t).microsecond // 1000:03d}Z",
        "gps_week": t.week,
        "gps_tow_s": round(t.tow_s, 3),
        "n_sats": snap.n_sats,
        "vtec_tecu": _num(snap.vtec_tecu, 3),
        "roti_max_tecu_per_min": _num(snap.roti_max_tecu_per_min, 4),
        "roti_median_tecu_per_min": _num(snap.roti_median_tecu_per_min, 4),
        "rot_max_abs_tecu_per_min": _num(snap.rot_max_abs_tecu_per_min, 4),
        "gradient_mm_per_km": _num(snap.gradient_mm_per_km, 2),
        "gradient_tecu_per_km": _num(snap.gradient_tecu_per_km, 5),
        "gradient_azimuth_deg": _num(snap.gradient_azimuth_deg, 1),
        "dual_freq_fraction": _num(snap.dual_freq_fraction, 3),
        "receiver_bias_tecu": _num(snap.receiver_bias_tecu, 3),
        "receiver_bias_sigma_tecu": _num(snap.receiver_bias_sigma_tecu, 3),
        "geometry_source": snap.geometry_source,
    }
    return json.dumps(doc, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def _col(a, digits: int):
    r = np.round(np.asarray(a, np.float64), digits)
    return [float(v) if math.isfinite(v) else None for v in r.tolist()]


def _reference_satellites(snap) -> bytes:
    """The previous dict + json.dumps formatter of the satellites payload (common practice)."""
    s = snap.satellites
    t = snap.time
    utc = gps_to_utc(t)
    doc = {
        "schema": "ionwarden.satellites/1",
        "station": snap.station,
        "time_utc": utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z",
        "gps_week": t.week,
        "gps_tow_s": round(t.tow_s, 3),
        "sat": [sat_name(int(i)) for i in s.sat],
        "pair": list(s.pair),
        "el_deg": _col(s.el_deg, 2),
        "az_deg": _col(s.az_deg, 2),
        "ipp_lat_deg": _col(s.ipp_lat_deg, 4),
        "ipp_lon_deg": _col(s.ipp_lon_deg, 4),
        "stec_tecu": _col(s.stec_tecu, 3),
        "vtec_tecu": _col(s.vtec_tecu, 3),
        "rot_tecu_per_min": _col(s.rot_tecu_per_min, 4),
        "roti_tecu_per_min": _col(s.roti_tecu_per_min, 4),
        "iono_l1_m": _col(s.iono_l1_m, 4),
        "slip": s.slip.tolist(),
        "arc_id": s.arc_id.tolist(),
    }
    return json.dumps(doc, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


@settings(max_examples=1000)
@given(
    values=st.lists(FLOATS, min_size=10, max_size=10),
    tow=st.floats(0.0, 604799.999),
    station=st.text(min_size=1, max_size=8),
    source=st.sampled_from(["ephemeris", "gsv", "none", 'odd"\\é']),
)
def test_summary_template_equals_json_dumps(values, tow, station, source):
    """summary_payload (template) gives the bytes of the dict + json.dumps formatter."""
    snap = make_snapshot("ALPHA", GpsTime(2395, tow))
    fields = [
        "vtec_tecu",
        "roti_max_tecu_per_min",
        "roti_median_tecu_per_min",
        "rot_max_abs_tecu_per_min",
        "gradient_mm_per_km",
        "gradient_tecu_per_km",
        "gradient_azimuth_deg",
        "dual_freq_fraction",
        "receiver_bias_tecu",
        "receiver_bias_sigma_tecu",
    ]
    kw = dict(zip(fields, values, strict=True))
    snap = dataclasses.replace(snap, station=station, geometry_source=source, **kw)
    assert summary_payload(snap) == _reference_summary(snap)


@settings(max_examples=1000)
@given(
    cols=st.lists(st.lists(FLOATS, min_size=5, max_size=5), min_size=9, max_size=9),
    slips=st.lists(st.booleans(), min_size=5, max_size=5),
)
def test_satellites_template_equals_json_dumps(cols, slips):
    """satellites_payload (template) gives the bytes of the dict + json.dumps formatter."""
    snap = make_snapshot("ALPHA", T0, n=5)
    names = [
        "el_deg",
        "az_deg",
        "ipp_lat_deg",
        "ipp_lon_deg",
        "stec_tecu",
        "vtec_tecu",
        "rot_tecu_per_min",
        "roti_tecu_per_min",
        "iono_l1_m",
    ]
    figs = dataclasses.replace(
        snap.satellites,
        slip=np.array(slips, np.bool_),
        pair=("1C-2W", "1C-5Q", "2W-5Q", "1C-2W", "1C-2L"),
        **{n: np.array(c, np.float64) for n, c in zip(names, cols, strict=True)},
    )
    snap = dataclasses.replace(snap, satellites=figs)
    with np.errstate(over="ignore"):  # np.round of a huge value overflows to ∞: null in both
        assert satellites_payload(snap) == _reference_satellites(snap)


# --- TCP_QUICKACK and a pipelined window on a default broker --------------------------------------


def test_quickack_is_rearmed_on_a_tcp_socket_and_ignores_others():
    """_quickack sets TCP_QUICKACK on a TCP socket (Linux) and is a no-op for anything else."""
    with socket.socket() as srv:
        srv.bind(("127.0.0.1", 0))
        srv.listen(1)
        with socket.create_connection(srv.getsockname()) as cli:
            _client._quickack(cli)
            if _client._TCP_QUICKACK is not None:
                assert cli.getsockopt(socket.IPPROTO_TCP, _client._TCP_QUICKACK) == 1
    _client._quickack(None)  # e.g. a websocket wrapper: ignored


def test_publish_window_setting_is_validated():
    """MqttSettings.publish_window is at least 1 (1 = one message at a time)."""
    assert MqttSettings().publish_window >= 1
    with pytest.raises(ValueError, match="publish_window"):
        MqttSettings(publish_window=0)


async def _drained_then_offline(pub, sub):
    """Wait until every message is acknowledged, stop the publisher, and collect what ``sub``
    received up to the daemon's "offline" status."""
    await asyncio.wait_for(pub.wait_drained(), 20)
    pub.stop()
    return await collect(
        sub,
        until=lambda g: any(
            t.endswith("/_daemon/status") and p.get("state") == "offline" for t, p, _ in g
        ),
    )


@pytest.mark.integration
@pytest.mark.parametrize("window", [1, 4, 32])
def test_pipelined_window_delivers_everything_in_order_on_default_broker(tmp_path, window):
    """MqttPublisher with a window of in-flight messages, against a private Mosquitto with its
    default Nagle setting: never more than the window in flight, every summary and transition
    delivered once, in order, nothing dropped."""
    prefix = unique_prefix()
    with private_broker(tmp_path) as brk:
        cfg = MqttSettings(
            host="127.0.0.1",
            port=brk.port,
            topic_prefix=prefix,
            publish_window=window,
            satellites_interval_s=5.0,
            timeout_s=5.0,
        )
        peak = [0]

        async def main():
            import aiomqtt

            async with aiomqtt.Client(
                "127.0.0.1", brk.port, protocol=aiomqtt.ProtocolVersion.V5, timeout=5
            ) as sub:
                await sub.subscribe(f"{prefix}/#", qos=1)
                pub: MqttPublisher

                def on_published(_msg, _dt):
                    peak[0] = max(peak[0], pub._buffer.in_flight)

                pub = MqttPublisher(cfg, on_published=on_published)
                eng = StationAlarms("ALPHA", AlarmSettings(stall_after_s=5.0))
                transitions = []
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(pub.run(), name="daemon.output[mqtt]")
                    await asyncio.wait_for(pub.wait_connected(), 10)
                    for i in range(200):
                        pub.publish_snapshot_nowait(make_snapshot("ALPHA", T0 + float(i)))
                        if i % 10 == 0:
                            tr = eng.observe_stall(9.0 if i % 20 == 0 else 0.0, T0 + float(i))
                            pub.publish_transitions_nowait(tr)
                            transitions += tr
                        if i % 25 == 0:
                            await asyncio.sleep(0)
                    got = await _drained_then_offline(pub, sub)
                return got, transitions, pub.statistics()

        got, transitions, stats = asyncio.run(main())
    assert peak[0] <= window
    summaries = [p["gps_tow_s"] for t, p, _ in got if t.endswith("/summary")]
    assert summaries == [T0.tow_s + i for i in range(200)]
    events = [p["seq"] for t, p, _ in got if t.endswith("/events")]
    assert events == [tr.seq for tr in transitions]
    assert stats.dropped_epoch_total == 0
    assert stats.dropped_alarm_total == 0


def test_satellites_messages_are_staggered_across_stations():
    """MqttPublisher sends each station's satellites at its first epoch, then at most once per
    satellites_interval_s, with stations spread over the seconds of the interval instead of all
    in the same second."""
    pub = MqttPublisher(MqttSettings(topic_prefix="p", satellites_interval_s=10.0))
    names = [f"ST{i:02d}" for i in range(20)]
    for s in range(60):
        for name in names:
            pub.publish_snapshot_nowait(make_snapshot(name, T0 + float(s)))
    buf = pub._buffer
    sent: dict[str, list[float]] = {}
    while (m := buf.take()) is not None:
        if m.topic.value.endswith("/satellites"):
            doc = json.loads(m.payload)
            sent.setdefault(doc["station"], []).append(doc["gps_tow_s"] - T0.tow_s)
    assert sorted(sent) == names
    for times in sent.values():
        assert times[0] == 0.0
        assert all(b - a >= 10.0 for a, b in itertools.pairwise(times))
        assert len(times) >= 5
    later = [t for times in sent.values() for t in times[1:]]
    per_second = {t: later.count(t) for t in later}
    assert max(per_second.values()) <= 2  # 20 stations over 10 s slots


@pytest.mark.integration
def test_broker_lost_with_window_in_flight_resends_every_transition_in_order(tmp_path):
    """MqttPublisher with a full window in flight when the broker dies: after the reconnect every
    alarm transition arrives, in order (duplicates allowed: at-least-once), none dropped."""

    prefix = unique_prefix()
    sub_id = f"iwtest-sub-{prefix.rsplit('/', 1)[-1]}"
    with private_broker(tmp_path) as brk:
        cfg = MqttSettings(
            host="127.0.0.1",
            port=brk.port,
            topic_prefix=prefix,
            publish_window=8,
            timeout_s=3.0,
            reconnect_initial_s=0.2,
            reconnect_cap_s=1.0,
        )

        async def main():
            eng = StationAlarms("ALPHA", AlarmSettings(stall_after_s=5.0))
            async with persistent_client(brk.port, sub_id) as sub:
                await sub.subscribe(f"{prefix}/ALPHA/events", qos=1)
            pub = MqttPublisher(cfg)
            n = 0
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                for i in range(60):  # 60 transitions (raise, clear, …) queued at once
                    tr = eng.observe_stall(9.0 if i % 2 == 0 else 0.0, T0 + float(i))
                    pub.publish_transitions_nowait(tr)
                    n += len(tr)
                await asyncio.sleep(0)  # let the first window go out
                await asyncio.to_thread(brk.stop)
                await asyncio.wait_for(pub.wait_disconnected(), 10)
                await asyncio.to_thread(brk.start)
                await asyncio.wait_for(pub.wait_connected(), cfg.reconnect_cap_s + 5.0)
                await asyncio.wait_for(pub.wait_drained(), 20)
                pub.stop()
            async with persistent_client(brk.port, sub_id) as sub:
                got = await collect(
                    sub, until=lambda g: {p["seq"] for _, p, _ in g} >= set(range(1, n + 1))
                )
            return n, pub.statistics(), got

        n, stats, got = asyncio.run(main())
    seqs = [p["seq"] for _, p, _ in got]
    assert list(dict.fromkeys(seqs)) == list(range(1, n + 1))
    assert stats.dropped_alarm_total == 0
    assert stats.connects_total == 2


def test_publish_properties_are_packed_once_with_paho_bytes():
    """The cached PUBLISH properties serialise exactly as paho's own Properties (MQTT 5.0
    §3.3.2.3.3 message expiry interval; paho-mqtt is the reference)."""
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    from ionwarden.daemon.outputs._client import PackedOnce

    ours = PackedOnce(PacketTypes.PUBLISH)
    ours.MessageExpiryInterval = 42
    ref = Properties(PacketTypes.PUBLISH)
    ref.MessageExpiryInterval = 42
    assert ours.pack() == ref.pack()
    assert ours.pack() is ours.pack()


@pytest.mark.integration
def test_corked_summaries_are_all_delivered_in_order_once_uncorked(tmp_path):
    """The burst tick's cork (MqttPublisher.cork: Linux TCP_CORK on the client's socket,
    set while its summaries are queued): against a private Mosquitto, 20 summaries queued while
    corked are held (the option set on the socket) and, once uncorked, all delivered once, in
    order, with nothing dropped."""
    prefix = unique_prefix()
    with private_broker(tmp_path) as brk:
        cfg = MqttSettings(host="127.0.0.1", port=brk.port, topic_prefix=prefix, timeout_s=5.0)

        async def main():
            import aiomqtt

            async with aiomqtt.Client(
                "127.0.0.1", brk.port, protocol=aiomqtt.ProtocolVersion.V5, timeout=5
            ) as sub:
                await sub.subscribe(f"{prefix}/#", qos=1)
                pub = MqttPublisher(cfg)
                corked = None
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(pub.run(), name="daemon.output[mqtt]")
                    await asyncio.wait_for(pub.wait_connected(), 10)
                    for _ in range(1000):  # (its "online" status is sent first)
                        if pub._live is not None:
                            break
                        await asyncio.sleep(0.01)
                    pub.cork(True)
                    sock = pub._live._iw_sock
                    if _client._TCP_CORK is not None:
                        corked = sock.getsockopt(socket.IPPROTO_TCP, _client._TCP_CORK)
                    for i in range(20):
                        pub.publish_snapshot_nowait(make_snapshot("ALPHA", T0 + float(i)))
                    pub.cork(False)
                    if _client._TCP_CORK is not None:
                        assert sock.getsockopt(socket.IPPROTO_TCP, _client._TCP_CORK) == 0
                    got = await _drained_then_offline(pub, sub)
                return got, corked, pub.statistics()

        got, corked, stats = asyncio.run(main())
    assert corked in (None, 1)
    summaries = [p["gps_tow_s"] for t, p, _ in got if t.endswith("/summary")]
    assert summaries == [T0.tow_s + i for i in range(20)]
    assert stats.dropped_epoch_total == 0
