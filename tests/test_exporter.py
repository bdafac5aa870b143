"""Prometheus exporter: custom collector over a snapshot, injected registry, real HTTP scrape."""

from __future__ import annotations

import socket
import urllib.request

import pytest
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.config import AlarmSettings, PrometheusSettings
from ionwarden.daemon.errors import OutputError
from ionwarden.daemon.estimator import FixStatus
from ionwarden.daemon.outputs import (
    DaemonSnapshot,
    Exporter,
    IngestFigures,
    MqttStatistics,
    QueueFigures,
    StationFigures,
)
from tests._outputs_support import T0, make_snapshot, storm_roti


class FakeClock:
    """An injected monotonic clock (s)."""

    def __init__(self, t: float = 1000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def daemon_snapshot(n_stations: int = 2, n_sats: int = 4, *, roti: float = 0.1) -> DaemonSnapshot:
    stations = []
    alarms = []
    for i in range(n_stations):
        name = f"ST{i:02d}"
        eng = StationAlarms(name, AlarmSettings())
        snap = make_snapshot(name, T0, n=n_sats, roti=roti)
        eng.observe_snapshot(snap)
        alarms += eng.statuses()
        stations.append(
            StationFigures(
                station=name,
                snapshot=snap,
                fix=FixStatus(
                    station=name,
                    time=T0,
                    quality=4,
                    n_sats_used=12,
                    hdop=0.8,
                    sigma_lat_m=0.03,
                    sigma_lon_m=0.04,
                ),
                ingest=IngestFigures(
                    bytes_total=12345, frames_total=100, crc_errors_total=2, connected=True
                ),
                last_epoch_monotonic_s=990.0,
                epochs_total=100,
            )
        )
    return DaemonSnapshot(
        stations=tuple(stations),
        alarms=tuple(alarms),
        queues=(
            QueueFigures(
                stage="estimator", station="ST00", depth=3, capacity=256, peak=9, dropped_total=1
            ),
        ),
        mqtt=MqttStatistics(
            connected=True,
            buffered_alarm=0,
            buffered_epoch=4,
            published_total=77,
            dropped_epoch_total=5,
            dropped_alarm_total=0,
            connects_total=2,
            disconnects_total=1,
        ),
        started_monotonic_s=0.0,
    )


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def make_exporter(**kw) -> tuple[Exporter, CollectorRegistry, FakeClock]:
    registry = CollectorRegistry()
    clock = FakeClock()
    exp = Exporter(PrometheusSettings(port=0, **kw), registry=registry, monotonic=clock)
    return exp, registry, clock


def test_exporter_serves_station_figures_from_snapshot():
    """Exporter exports station VTEC, ROTI, gradient and dual-frequency ratio from the snapshot."""
    exp, registry, _ = make_exporter()
    exp.update(daemon_snapshot())
    s = samples(generate_latest(registry).decode())
    st = (("station", "ST01"),)
    assert s[("ionwarden_station_vtec_tecu", st)] == 20.0
    assert s[("ionwarden_station_roti_max_tecu_per_minute", st)] == pytest.approx(0.1)
    assert s[("ionwarden_station_gradient_mm_per_km", st)] == 3.0
    assert s[("ionwarden_station_dual_frequency_ratio", st)] == 1.0
    assert s[("ionwarden_station_fix_quality", st)] == 4
    assert s[("ionwarden_ingest_bytes_total", st)] == 12345
    assert s[("ionwarden_ingest_crc_errors_total", st)] == 2
    assert s[("ionwarden_queue_dropped_total", (("stage", "estimator"), ("station", "ST00")))] == 1
    assert s[("ionwarden_mqtt_connected", ())] == 1
    assert s[("ionwarden_mqtt_dropped_messages_total", (("class", "epoch"),))] == 5
    sat = (("sat", "G03"), ("station", "ST00"))
    assert s[("ionwarden_satellite_stec_tecu", sat)] == 12.0
    assert s[("ionwarden_satellite_elevation_degrees", sat)] == pytest.approx(60.0)


def test_exporter_last_epoch_age_grows_without_updates():
    """Exporter computes last-epoch age at scrape time, so it grows while the pipeline stalls."""
    exp, registry, clock = make_exporter()
    exp.update(daemon_snapshot(1))
    key = ("ionwarden_station_last_epoch_age_seconds", (("station", "ST00"),))
    assert samples(generate_latest(registry).decode())[key] == 10.0
    clock.t += 50.0
    assert samples(generate_latest(registry).decode())[key] == 60.0


def test_exporter_alarm_states_are_exported():
    """Exporter exports each alarm's active flag with its severity label."""
    exp, registry, _ = make_exporter()
    eng = StationAlarms("ST00", AlarmSettings())
    for t in range(1200):
        eng.observe_snapshot(make_snapshot("ST00", T0 + float(t), roti=storm_roti(t)))
    exp.update(DaemonSnapshot(alarms=eng.statuses()))
    s = samples(generate_latest(registry).decode())
    key = (
        "ionwarden_alarm_active",
        (("alarm", "roti"), ("severity", "warning"), ("station", "ST00")),
    )
    assert s[key] == 1.0
    key = (
        "ionwarden_alarm_active",
        (("alarm", "vtec"), ("severity", "advisory"), ("station", "ST00")),
    )
    assert s[key] == 0.0


def test_exporter_per_satellite_can_be_turned_off():
    """Exporter leaves out every satellite series when per_satellite is false."""
    exp, registry, _ = make_exporter(per_satellite=False)
    exp.update(daemon_snapshot())
    text = generate_latest(registry).decode()
    assert "ionwarden_satellite_" not in text
    assert "ionwarden_station_vtec_tecu" in text


def test_exporter_latency_histogram_counts_observations():
    """Exporter's epoch latency histogram counts each observation in the right bucket."""
    exp, registry, _ = make_exporter()
    exp.observe_epoch_latency("ST00", 0.003)
    exp.observe_epoch_latency("ST00", 0.2)
    s = samples(generate_latest(registry).decode())
    b = "ionwarden_estimator_epoch_processing_seconds_bucket"
    assert s[(b, (("le", "0.005"), ("station", "ST00")))] == 1
    assert s[(b, (("le", "+Inf"), ("station", "ST00")))] == 2


def test_exporter_uses_only_the_injected_registry():
    """Exporter registers nothing in the global registry."""
    from prometheus_client import REGISTRY

    before = set(REGISTRY._names_to_collectors)
    exp, _, _ = make_exporter()
    exp.update(daemon_snapshot())
    assert set(REGISTRY._names_to_collectors) == before


def test_exporter_nan_satellite_values_are_left_out():
    """Exporter omits a satellite series whose value is unknown (NaN) instead of exporting NaN."""
    exp, registry, _ = make_exporter()
    snap = make_snapshot("ST00", T0, nan_sat=True)
    exp.update(DaemonSnapshot(stations=(StationFigures(station="ST00", snapshot=snap),)))
    s = samples(generate_latest(registry).decode())
    assert ("ionwarden_satellite_stec_tecu", (("sat", "G01"), ("station", "ST00"))) not in s
    assert ("ionwarden_satellite_stec_tecu", (("sat", "G02"), ("station", "ST00"))) in s


@pytest.mark.integration
def test_exporter_http_scrape_on_loopback():
    """Exporter serves the snapshot over real HTTP on a free loopback port and stops on exit."""
    exp, _, _ = make_exporter()
    exp.update(daemon_snapshot())
    with exp:
        port = exp.port
        assert port > 0
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            assert resp.status == 200
            text = resp.read().decode()
    assert samples(text)[("ionwarden_station_vtec_tecu", (("station", "ST00"),))] == 20.0
    with socket.socket() as sock:
        sock.settimeout(1)
        with pytest.raises(OSError):
            sock.connect(("127.0.0.1", port))


@pytest.mark.integration
def test_exporter_is_reusable_but_not_reentrant():
    """Exporter raises on re-entry, closes idempotently, and can serve again after closing."""
    exp, _, _ = make_exporter()
    with exp, pytest.raises(RuntimeError, match="re-entrant"):
        exp.start()
    exp.close()
    with exp:
        assert exp.port > 0


@pytest.mark.integration
def test_exporter_bind_failure_is_an_output_error():
    """Exporter raises OutputError naming the address when the port is taken."""
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        exp = Exporter(PrometheusSettings(port=port), registry=CollectorRegistry())
        with pytest.raises(OutputError, match=f"127.0.0.1:{port}"):
            exp.start()
