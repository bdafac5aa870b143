"""The daemon end to end against a real Mosquitto: demo capture in, every epoch's summary out,
flushed before a graceful stop returns."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import aiomqtt
import pytest
from prometheus_client import CollectorRegistry

from ionwarden.daemon.config import PrometheusSettings, load_settings
from ionwarden.daemon.outputs import Exporter, MqttPublisher
from ionwarden.daemon.runtime._app import make_factory, options_from_settings
from ionwarden.daemon.runtime._supervisor import Daemon
from tests._mqtt_support import BROKER_HOST, BROKER_PORT, need, port_open, unique_prefix

from .conftest import REPO

DEMO = REPO / "daemon" / "data" / "demo.bin"


@pytest.mark.integration
@pytest.mark.skipif(not DEMO.is_file(), reason="bundled demo capture not built yet")
def test_daemon_publishes_every_epoch_and_flushes_before_stopping(tmp_path: Path) -> None:
    """Daemon publishes one summary per epoch to a real broker and flushes all before run returns."""
    need(f"MQTT broker at {BROKER_HOST}:{BROKER_PORT}", port_open(BROKER_HOST, BROKER_PORT))
    cap = tmp_path / "head.bin"
    cap.write_bytes(DEMO.read_bytes()[:150_000])  # the first ~100 epochs of the demo
    prefix = unique_prefix()
    settings = load_settings(
        stations=[{"name": "harc", "source": f"file://{cap}?speed=0"}],
        mqtt={"host": BROKER_HOST, "port": BROKER_PORT, "topic_prefix": prefix},
        prometheus={"enabled": False},
        runtime={"state_dir": str(tmp_path / "state"), "summary_interval_s": 0},
    )

    async def main() -> tuple[int, list[dict[str, object]], str]:
        loop = asyncio.get_running_loop()
        publisher = MqttPublisher(settings.mqtt, monotonic=loop.time)
        exporter = Exporter(
            PrometheusSettings(port=0), registry=CollectorRegistry(), monotonic=loop.time
        )
        got: list[dict[str, object]] = []
        async with aiomqtt.Client(BROKER_HOST, BROKER_PORT) as sub:
            topic = publisher.topics.summary("harc").value
            await sub.subscribe(topic, qos=1)
            daemon = Daemon(
                options_from_settings(settings, environ={}),
                factory=make_factory(settings),
                publisher=publisher,
                exporter=exporter,
            )
            assert await daemon.run() == 0  # the replay ends, the daemon stops and flushes
            epochs = daemon.stopped_statistics["harc"].epochs_total
            async with asyncio.timeout(10):
                async for msg in sub.messages:
                    got.append(json.loads(bytes(msg.payload)))  # type: ignore[arg-type]
                    if len(got) >= epochs:
                        break
        return epochs, got, exporter.exposition()[0].decode()

    epochs, got, page = asyncio.run(main())
    assert epochs > 50
    assert len(got) == epochs
    assert all(m["station"] == "harc" for m in got)
    # every summary's frame → PUBACK latency observed once (the issue 8 latency, in the daemon)
    count = f'ionwarden_mqtt_summary_delivery_seconds_count{{station="harc"}} {float(epochs)}'
    assert count in page
