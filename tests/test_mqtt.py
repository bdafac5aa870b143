"""MQTT publisher against a real Mosquitto: payloads, retained status, last will, storm alarms,
broker restart. Shared broker from IONWARDEN_TEST_MQTT_HOST/PORT; a private one where killed."""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import aiomqtt
import pytest

from ionwarden.daemon.alarms import AlarmKind, AlarmState, StationAlarms
from ionwarden.daemon.config import AlarmSettings, MqttSettings
from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.outputs import DaemonSnapshot, MqttPublisher, StationFigures, resolve_password
from tests._mqtt_support import (
    BROKER_HOST,
    BROKER_PORT,
    collect,
    free_port,
    need,
    persistent_client,
    port_open,
    private_broker,
    schema_of,
    unique_prefix,
)
from tests._outputs_support import T0, make_snapshot, storm_roti
from tests.test_outputs_payloads import validate

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def broker():
    need(f"MQTT broker at {BROKER_HOST}:{BROKER_PORT}", port_open(BROKER_HOST, BROKER_PORT))
    return BROKER_HOST, BROKER_PORT


def settings(host: str, port: int, prefix: str, **kw) -> MqttSettings:
    base = {"timeout_s": 3.0, "reconnect_initial_s": 0.2, "reconnect_cap_s": 1.0}
    base.update(kw)
    return MqttSettings(host=host, port=port, topic_prefix=prefix, **base)


def subscriber(host: str, port: int, **kw) -> aiomqtt.Client:
    return aiomqtt.Client(host, port, protocol=aiomqtt.ProtocolVersion.V5, timeout=5, **kw)


async def storm_feed(pub: MqttPublisher, station: str, seconds: int, step: int = 5) -> list:
    """Feed the invented storm as snapshots + alarm transitions; returns the transitions."""
    eng = StationAlarms(station, AlarmSettings())
    pub.publish_alarm_states_nowait(eng.statuses())
    transitions = []
    for t in range(0, seconds, step):
        snap = make_snapshot(station, T0 + float(t), roti=storm_roti(t))
        tr = eng.observe_snapshot(snap)
        pub.publish_snapshot_nowait(snap)
        pub.publish_transitions_nowait(tr)
        transitions += tr
        if t % 100 == 0:
            await asyncio.sleep(0)  # let the publisher task run, as the estimator loop would
    return transitions


def is_daemon_offline(got) -> bool:
    return any(t.endswith("/_daemon/status") and p.get("state") == "offline" for t, p, _ in got)


@pytest.mark.integration
def test_mqtt_publishes_schema_valid_payloads_in_order(broker):
    """MqttPublisher delivers every payload kind, each valid against its schema, summaries in order."""
    host, port = broker
    prefix = unique_prefix()

    async def main():
        async with subscriber(host, port) as sub:
            await sub.subscribe(f"{prefix}/#", qos=1)
            pub = MqttPublisher(settings(host, port, prefix, satellites_interval_s=60.0))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                transitions = await storm_feed(pub, "ALPHA", 3000)
                pub.publish_health_nowait(
                    DaemonSnapshot(stations=(StationFigures(station="ALPHA"),))
                )
                pub.stop()
            got = await collect(sub, until=is_daemon_offline)
            return got, transitions, pub.statistics()

    got, transitions, stats = asyncio.run(main())
    kinds = set()
    for topic, payload, _ in got:
        kind = schema_of(topic)
        validate(kind, json.dumps(payload).encode())
        kinds.add(kind)
    assert kinds == {
        "summary",
        "satellites",
        "station-status",
        "daemon-status",
        "daemon-health",
        "alarm-state",
        "alarm-event",
    }
    summaries = [p["gps_tow_s"] for t, p, _ in got if t.endswith("/summary")]
    assert len(summaries) == 600
    assert summaries == sorted(summaries)
    events = [p for t, p, _ in got if t.endswith("/events")]
    assert [(e["alarm"], e["state"]) for e in events] == [
        (tr.alarm, tr.state.value) for tr in transitions
    ]
    assert stats.dropped_epoch_total == 0
    assert stats.dropped_alarm_total == 0


@pytest.mark.integration
def test_mqtt_storm_raises_then_clears_roti_on_event_stream(broker):
    """MqttPublisher streams the storm's ROTI raise then clear, in order, and retains the final state."""
    host, port = broker
    prefix = unique_prefix()

    async def main():
        async with subscriber(host, port) as sub:
            await sub.subscribe(f"{prefix}/ALPHA/events", qos=1)
            pub = MqttPublisher(settings(host, port, prefix))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                await storm_feed(pub, "ALPHA", 3000)
                pub.stop()
            events = await collect(sub, until=lambda g: len(g) >= 2)
        # A second client, connecting afterwards, sees the retained alarm state.
        async with subscriber(host, port) as late:
            await late.subscribe(f"{prefix}/ALPHA/alarm/roti", qos=1)
            retained = await collect(late, until=lambda g: len(g) >= 1)
        return events, retained

    events, retained = asyncio.run(main())
    assert [(p["alarm"], p["previous"], p["state"]) for _, p, _ in events] == [
        ("roti", "normal", "active"),
        ("roti", "active", "normal"),
    ]
    assert [p["seq"] for _, p, _ in events] == [1, 2]
    ((_, state, is_retained),) = retained
    assert is_retained
    assert state["state"] == "normal"
    assert state["since_utc"] == events[1][1]["time_utc"]


@pytest.mark.integration
def test_mqtt_graceful_stop_leaves_retained_offline(broker):
    """MqttPublisher leaves retained "offline" for the daemon and each station when stopped."""
    host, port = broker
    prefix = unique_prefix()

    async def main():
        pub = MqttPublisher(settings(host, port, prefix))
        async with asyncio.TaskGroup() as tg:
            tg.create_task(pub.run(), name="daemon.output[mqtt]")
            await asyncio.wait_for(pub.wait_connected(), 10)
            pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
            pub.stop()
        async with subscriber(host, port) as late:
            await late.subscribe(f"{prefix}/+/status", qos=1)
            return await collect(late, until=lambda g: len(g) >= 2)

    got = asyncio.run(main())
    states = {t.split("/")[-2]: (p["state"], retained) for t, p, retained in got}
    assert states == {"_daemon": ("offline", True), "ALPHA": ("offline", True)}


@pytest.mark.integration
def test_mqtt_cancelled_publisher_still_says_offline(broker):
    """MqttPublisher publishes retained "offline" when its task is cancelled by the TaskGroup."""
    host, port = broker
    prefix = unique_prefix()

    async def main():
        pub = MqttPublisher(settings(host, port, prefix))
        task = asyncio.get_running_loop().create_task(pub.run(), name="daemon.output[mqtt]")
        await asyncio.wait_for(pub.wait_connected(), 10)
        pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
        await asyncio.sleep(0)
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        async with subscriber(host, port) as late:
            await late.subscribe(f"{prefix}/_daemon/status", qos=1)
            return await collect(late, until=lambda g: len(g) >= 1)

    ((_, payload, retained),) = asyncio.run(main())
    assert retained
    assert payload["state"] == "offline"
    assert payload["time_utc"] is not None  # our goodbye, not the last will


_CHILD = textwrap.dedent(
    """
    import asyncio, sys
    from ionwarden.daemon.config import MqttSettings
    from ionwarden.daemon.outputs import MqttPublisher
    from tests._outputs_support import make_snapshot

    async def main():
        s = MqttSettings(host=sys.argv[1], port=int(sys.argv[2]), topic_prefix=sys.argv[3], keepalive_s=5)
        pub = MqttPublisher(s)
        async with asyncio.TaskGroup() as tg:
            tg.create_task(pub.run(), name="daemon.output[mqtt]")
            await pub.wait_connected()
            pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
            await pub.wait_drained()
            print("ready", flush=True)
            await asyncio.Event().wait()

    asyncio.run(main())
    """
)


@pytest.mark.integration
def test_mqtt_last_will_marks_daemon_offline_when_killed(broker):
    """The broker publishes our last will (daemon offline, null times) when the daemon is killed."""
    host, port = broker
    prefix = unique_prefix()
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.Popen(
        [sys.executable, "-c", _CHILD, host, str(port), prefix],
        stdout=subprocess.PIPE,
        cwd=REPO,
        env=env,
    )
    try:
        assert proc.stdout is not None
        assert proc.stdout.readline().strip() == b"ready"

        async def watch():
            async with subscriber(host, port) as sub:
                await sub.subscribe(f"{prefix}/+/status", qos=1)
                first = await collect(sub, until=lambda g: len(g) >= 2)
                proc.kill()  # SIGKILL: no DISCONNECT packet, so the broker sends the will
                proc.wait(timeout=10)
                will = await collect(sub, until=lambda g: len(g) >= 1)
                return first, will

        first, will = asyncio.run(watch())
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
        if proc.stdout is not None:
            proc.stdout.close()
    retained = {t.split("/")[-2]: (p["state"], r) for t, p, r in first}
    assert retained == {"_daemon": ("online", True), "ALPHA": ("online", True)}
    ((topic, payload, _),) = will
    validate("daemon-status", json.dumps(payload).encode())
    assert topic == f"{prefix}/_daemon/status"
    assert payload["state"] == "offline"
    assert payload["time_utc"] is None


@pytest.mark.integration
def test_mqtt_survives_broker_restart_without_losing_transitions(tmp_path):
    """MqttPublisher keeps running through a broker restart: every transition arrives in order,
    per-epoch overflow is counted, and it reconnects within the backoff bound."""
    prefix = unique_prefix()
    sub_id = f"iwtest-sub-{prefix.rsplit('/', 1)[-1]}"
    with private_broker(tmp_path) as brk:
        cfg = settings("127.0.0.1", brk.port, prefix, epoch_buffer=5, satellites_interval_s=1e6)

        async def main():
            eng = StationAlarms("ALPHA", AlarmSettings(stall_after_s=5.0))
            async with persistent_client(brk.port, sub_id) as sub:
                await sub.subscribe(f"{prefix}/ALPHA/events", qos=1)
            pub = MqttPublisher(cfg)
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                # Before the outage: one stall raise + clear, delivered.
                pub.publish_snapshot_nowait(make_snapshot("ALPHA", T0))
                pub.publish_transitions_nowait(eng.observe_stall(6.0, T0 + 6.0))
                pub.publish_transitions_nowait(eng.observe_stall(0.0, T0 + 7.0))
                await asyncio.wait_for(pub.wait_drained(), 10)
                await asyncio.to_thread(brk.stop)
                # During the outage: 20 epochs (5 kept, 15 dropped) and 5 transitions.
                for i in range(20):
                    pub.publish_snapshot_nowait(make_snapshot("ALPHA", T0 + 10.0 + i))
                    if i % 4 == 0:
                        tr = eng.observe_stall(6.0 if i % 8 == 0 else 0.0, T0 + 10.0 + i)
                        pub.publish_transitions_nowait(tr)
                    await asyncio.sleep(0.02)
                await asyncio.wait_for(pub.wait_disconnected(), 10)
                down = pub.statistics()
                await asyncio.to_thread(brk.start)
                # Reconnect within the backoff bound (cap 1 s) plus connect time.
                await asyncio.wait_for(pub.wait_connected(), cfg.reconnect_cap_s + 5.0)
                await asyncio.wait_for(pub.wait_drained(), 10)
                pub.stop()
            async with persistent_client(brk.port, sub_id) as sub:
                got = await collect(
                    sub, until=lambda g: {p["seq"] for _, p, _ in g} >= set(range(1, 8))
                )
            return down, pub.statistics(), got

        down, final, got = asyncio.run(main())
    assert not down.connected
    assert down.buffered_epoch == 5
    assert final.dropped_epoch_total == 15
    assert final.dropped_alarm_total == 0
    assert final.connects_total == 2
    assert final.disconnects_total == 1
    seqs = [p["seq"] for _, p, _ in got]
    deduped = list(
        dict.fromkeys(seqs)
    )  # at-least-once: a duplicate may appear, order may not break
    assert deduped == list(range(1, 8))
    states = [p["state"] for _, p, _ in got]
    assert states[:2] == ["active", "normal"]


def test_mqtt_broker_down_at_start_keeps_running_and_buffers(caplog):
    """MqttPublisher keeps running and buffering, logging each retry, when no broker listens."""
    caplog.set_level(logging.WARNING, logger="ionwarden.daemon.outputs.mqtt")
    port = free_port()

    async def main():
        pub = MqttPublisher(
            settings(
                "127.0.0.1", port, unique_prefix(), reconnect_initial_s=5.0, reconnect_cap_s=5.0
            )
        )
        async with asyncio.TaskGroup() as tg:
            tg.create_task(pub.run(), name="daemon.output[mqtt]")
            await asyncio.wait_for(pub.wait_ready(), 10)
            pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
            stats = pub.statistics()
            pub.stop()  # interrupts the backoff wait
        return stats

    stats = asyncio.run(main())
    assert not stats.connected
    assert stats.buffered_epoch == 2  # summary + satellites
    assert stats.buffered_alarm == 1  # station status "online"
    assert any("reconnecting in" in r.getMessage() for r in caplog.records)


def test_mqtt_run_is_not_reentrant():
    """MqttPublisher.run raises RuntimeError when started twice at once."""

    async def main():
        pub = MqttPublisher(settings("127.0.0.1", free_port(), unique_prefix()))
        async with asyncio.TaskGroup() as tg:
            tg.create_task(pub.run(), name="daemon.output[mqtt]")
            await asyncio.sleep(0)
            with pytest.raises(RuntimeError, match="already running"):
                await pub.run()
            pub.stop()

    asyncio.run(main())


def test_mqtt_password_comes_from_file(tmp_path):
    """resolve_password reads the first line of password_file and rejects two sources."""
    f = tmp_path / "mqtt_password"
    f.write_text("s3cret\n", encoding="utf-8")
    assert resolve_password(MqttSettings(password_file=f)) == "s3cret"
    assert resolve_password(MqttSettings(password="direct")) == "direct"
    assert resolve_password(MqttSettings()) is None
    with pytest.raises(ConfigError, match=r"mqtt\.password_file"):
        resolve_password(MqttSettings(password="x", password_file=f))
    with pytest.raises(ConfigError, match="cannot read"):
        resolve_password(MqttSettings(password_file=tmp_path / "missing"))


def test_mqtt_missing_tls_material_is_a_config_error(tmp_path):
    """MqttPublisher raises ConfigError naming the TLS key when the CA file is missing."""
    with pytest.raises(ConfigError, match=r"mqtt\.tls_ca_file"):
        MqttPublisher(MqttSettings(tls_ca_file=tmp_path / "nope.pem"))


def test_mqtt_stall_transition_marks_station_stale():
    """MqttPublisher queues a retained "stale" station status when stream-stall is raised."""
    pub = MqttPublisher(settings("127.0.0.1", free_port(), "p"))
    eng = StationAlarms("ALPHA", AlarmSettings(stall_after_s=5.0))
    pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
    tr = eng.observe_stall(9.0, T0 + 9.0)
    assert tr[0].kind is AlarmKind.STREAM_STALL
    assert tr[0].state is AlarmState.ACTIVE
    pub.publish_transitions_nowait(tr)
    msgs = []
    buf = pub._buffer
    while (m := buf.peek()) is not None:
        msgs.append((m.topic.value, m.retain, m.alarm_class))
        buf.pop(m)
    assert msgs[:4] == [
        ("p/ALPHA/status", True, True),
        ("p/ALPHA/events", False, True),
        ("p/ALPHA/alarm/stream-stall", True, True),
        ("p/ALPHA/status", True, True),
    ]


def test_mqtt_swallowed_cancellation_is_raised_again():
    """raise_if_cancelled re-raises when a cancellation was swallowed (asyncio.wait_for on
    Python < 3.12, CPython gh-86296), so a cancelled publisher never keeps waiting."""
    from ionwarden.daemon.outputs._client import raise_if_cancelled

    async def body():
        asyncio.current_task().cancel()
        # Swallow it, as wait_for does when the inner future completes at the same moment.
        with contextlib.suppress(asyncio.CancelledError):
            await asyncio.sleep(0)
        raise_if_cancelled()

    async def main():
        task = asyncio.get_running_loop().create_task(body())
        with pytest.raises(asyncio.CancelledError):
            await task

    asyncio.run(main())


def test_mqtt_health_is_rate_limited():
    """MqttPublisher queues at most one health message per health_interval_s of its clock."""
    clock = [100.0]
    pub = MqttPublisher(
        settings("127.0.0.1", free_port(), "p", health_interval_s=10.0), monotonic=lambda: clock[0]
    )
    snap = DaemonSnapshot(stations=(StationFigures(station="ALPHA"),))
    for t in (100.0, 101.0, 109.9, 110.0, 115.0, 120.5):
        clock[0] = t
        pub.publish_health_nowait(snap)
    assert pub.statistics().buffered_epoch == 3  # at 100, 110 and 120.5


@pytest.mark.integration
def test_mqtt_per_epoch_data_carries_v5_message_expiry(broker):
    """MqttPublisher sets the MQTT v5 message expiry on per-epoch data (none on alarm events) and
    the documented QoS per topic class."""
    host, port = broker
    prefix = unique_prefix()

    async def main():
        async with subscriber(host, port) as sub:
            await sub.subscribe(f"{prefix}/ALPHA/#", qos=1)
            pub = MqttPublisher(settings(host, port, prefix, epoch_expiry_s=42))
            eng = StationAlarms("ALPHA", AlarmSettings(stall_after_s=5.0))
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
                pub.publish_transitions_nowait(eng.observe_stall(9.0, T0 + 9.0))
                pub.stop()
            expiry = {}
            qos = {}
            async with asyncio.timeout(20):
                async for msg in sub.messages:
                    leaf = msg.topic.value.split("/")[-1]
                    props = msg.properties
                    expiry[leaf] = getattr(props, "MessageExpiryInterval", None)
                    qos[leaf] = msg.qos
                    if {"summary", "satellites", "events", "stream-stall"} <= set(expiry):
                        return expiry, qos
        return expiry, qos

    expiry, qos = asyncio.run(main())
    # Subscribed at QoS 1, so the delivered QoS is min(published, 1) (MQTT 5.0 §3.8.4).
    assert qos == {"status": 1, "summary": 1, "satellites": 0, "events": 1, "stream-stall": 1}
    assert 0 < expiry["satellites"] <= 42
    assert 0 < expiry["summary"] <= 42  # the broker counts it down while holding the message
    assert expiry["events"] is None
