"""End to end on the simulator: band-outage scenario → estimator pipeline → alarms → MQTT."""

from __future__ import annotations

import asyncio
import json

import pytest
from prometheus_client import CollectorRegistry, generate_latest

from ionwarden.daemon.alarms import AlarmState, StationAlarms
from ionwarden.daemon.config import AlarmSettings, MqttSettings, PrometheusSettings
from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.daemon.outputs import (
    DaemonSnapshot,
    Exporter,
    MqttPublisher,
    StationFigures,
    satellites_payload,
    summary_payload,
)
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from tests._mqtt_support import BROKER_HOST, BROKER_PORT, collect, need, port_open, unique_prefix
from tests.test_mqtt import subscriber
from tests.test_outputs_payloads import validate


def run_band_outage(duration_s: float):
    """Simulated HARC stream of the invented band-outage scenario (L2 jammed −20 dB from 600 s to
    1200 s), through the estimator pipeline and the alarms; returns (transitions, scenario)."""
    sc = build_scenario("band-outage", duration_s=duration_s)
    name = sc.stations[0].name
    pipe = StationPipeline(name, reference_time=sc.start)
    alarms = StationAlarms(name, AlarmSettings())
    transitions = []
    last = None
    for _, data in iter_stream(Simulator(sc), 0):
        for out in pipe.feed(data):
            if isinstance(out, StationSnapshot):
                if int(out.time - sc.start) % 300 == 0:  # real estimator output fits our schemas
                    validate("summary", summary_payload(out))
                    validate("satellites", satellites_payload(out))
                transitions += alarms.observe_snapshot(out)
                last = out
            elif isinstance(out, FixStatus):
                transitions += alarms.observe_fix(out)
    # The exporter serves the real estimator output too.
    registry = CollectorRegistry()
    exp = Exporter(PrometheusSettings(port=0), registry=registry)
    exp.update(
        DaemonSnapshot(
            stations=(StationFigures(station=name, snapshot=last),), alarms=alarms.statuses()
        )
    )
    text = generate_latest(registry).decode()
    assert f'ionwarden_station_vtec_tecu{{station="{name}"}}' in text
    assert "ionwarden_satellite_roti_tecu_per_minute{" in text
    return transitions, sc


@pytest.mark.slow
@pytest.mark.integration
def test_alarms_sim_band_outage_raises_and_clears_cn0_drop_on_gps_l2():
    """The CN0-drop alarm names GPS L2, raised after its hold once the simulated jamming starts
    and cleared after its hold once it stops; delivered over MQTT in order."""
    need(f"MQTT broker at {BROKER_HOST}:{BROKER_PORT}", port_open(BROKER_HOST, BROKER_PORT))
    transitions, sc = run_band_outage(1300.0)
    cn0 = [tr for tr in transitions if tr.alarm == "cn0-drop-g2"]
    assert [tr.state for tr in cn0] == [AlarmState.ACTIVE, AlarmState.NORMAL]
    settings = AlarmSettings()
    # Scenario timing (daemon/sim band-outage: 600–1200 s, −20 dB) plus the default holds.
    assert cn0[0].time - sc.start == pytest.approx(600.0 + settings.cn0_drop.raise_after_s, abs=2.0)
    assert cn0[1].time - sc.start == pytest.approx(
        1200.0 + settings.cn0_drop.clear_after_s, abs=2.0
    )
    assert cn0[0].value > 10.0
    assert cn0[0].band == "G2"

    prefix = unique_prefix()
    station = sc.stations[0].name

    async def main():
        async with subscriber(BROKER_HOST, BROKER_PORT) as sub:
            await sub.subscribe(f"{prefix}/{station}/events", qos=1)
            pub = MqttPublisher(
                MqttSettings(host=BROKER_HOST, port=BROKER_PORT, topic_prefix=prefix)
            )
            async with asyncio.TaskGroup() as tg:
                tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                pub.publish_transitions_nowait(transitions)
                pub.stop()
            return await collect(sub, until=lambda g: len(g) >= len(transitions))

    got = asyncio.run(main())
    for _, payload, _ in got:
        validate("alarm-event", json.dumps(payload).encode())
    assert [(p["alarm"], p["state"]) for _, p, _ in got] == [
        (tr.alarm, tr.state.value) for tr in transitions
    ]
    band = [p for _, p, _ in got if p["alarm"] == "cn0-drop-g2"]
    assert band[0]["band_name"] == "GPS L2"
