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


# --- our exposition writer against prometheus_client's (issue 8: fast scrape, same content) ------

OPENMETRICS_ACCEPT = (  # what a Prometheus 3 server sends (its scrape_protocols default)
    "application/openmetrics-text;version=1.0.0;escaping=allow-utf-8;q=0.6,"
    "application/openmetrics-text;version=0.0.1;q=0.5,"
    "text/plain;version=1.0.0;escaping=allow-utf-8;q=0.4,text/plain;version=0.0.4;q=0.3,*/*;q=0.2"
)


def awkward_snapshot() -> DaemonSnapshot:
    """Label values that need escaping, unknown and infinite figures, big and tiny numbers."""
    base = daemon_snapshot(3, 6)
    odd = 'we"ird\\st\nation'
    snap = make_snapshot(odd, T0, n=5, nan_sat=True, vtec=float("nan"), gradient=float("inf"))
    stations = (
        *base.stations,
        StationFigures(
            station=odd,
            snapshot=snap,
            ingest=IngestFigures(bytes_total=12_345_678_901, frames_total=10**6, connected=True),
            last_epoch_monotonic_s=1e-9,
            epochs_total=10**17,
        ),
        StationFigures(station="EMPTY"),
    )
    queues = (
        *base.queues,
        QueueFigures(stage="mqtt", depth=0, capacity=1_000_000, peak=999_999, dropped_total=0),
    )
    return DaemonSnapshot(stations=stations, alarms=base.alarms, queues=queues, mqtt=base.mqtt)


def sample_values(fams) -> dict[tuple[str, tuple[tuple[str, str], ...]], str]:
    """Sample → value as text (so NaN compares equal to NaN)."""
    return {
        (s.name, tuple(sorted(s.labels.items()))): repr(s.value) for f in fams for s in f.samples
    }


def without_created(text: bytes) -> bytes:
    return b"".join(line for line in text.splitlines(True) if b"_created" not in line)


@pytest.mark.parametrize("per_satellite", [True, False])
def test_exporter_exposition_is_prometheus_client_text_byte_for_byte(per_satellite):
    """Exporter's own text 0.0.4 writer produces exactly the bytes prometheus_client writes for the
    same registry (escaped label values, NaN, +Inf, exponent form, histogram and its _created)."""
    exp, registry, _ = make_exporter(per_satellite=per_satellite)
    exp.update(awkward_snapshot())
    exp.observe_epoch_latency("ST00", 0.003)
    exp.observe_epoch_latency('we"ird\\st\nation', 7.5)
    body, content_type = exp.exposition()
    # Source: prometheus_client generate_latest (reference library), format 0.0.4.
    assert content_type == "text/plain; version=0.0.4; charset=utf-8"
    assert body == generate_latest(registry)


def test_exporter_exposition_parses_to_the_registry_samples():
    """Exporter's exposition parses (prometheus_client's parser) to the same samples, sample by
    sample, as the registry's own rendering, and covers every awkward case it was given."""
    exp, registry, _ = make_exporter()
    exp.update(awkward_snapshot())
    exp.observe_epoch_latency("ST00", 0.003)
    ours = sample_values(text_string_to_metric_families(exp.exposition()[0].decode()))
    # Source: prometheus_client generate_latest + text_string_to_metric_families (reference).
    assert ours == sample_values(text_string_to_metric_families(generate_latest(registry).decode()))
    odd = (("station", 'we"ird\\st\nation'),)
    assert ours[("ionwarden_station_vtec_tecu", odd)] == "nan"
    assert ours[("ionwarden_station_gradient_mm_per_km", odd)] == "inf"
    assert ours[("ionwarden_ingest_bytes_total", odd)] == "12345678901.0"
    assert ours[("ionwarden_station_epochs_total", odd)] == "1e+17"
    assert ("ionwarden_satellite_stec_tecu", (("sat", "G01"), *odd)) not in ours  # NaN: left out


def test_exporter_openmetrics_exposition_matches_prometheus_client():
    """Exporter answers an OpenMetrics Accept header with prometheus_client's OpenMetrics bytes."""
    from prometheus_client.exposition import choose_encoder
    from prometheus_client.openmetrics.parser import (
        text_string_to_metric_families as om_families,
    )

    exp, registry, _ = make_exporter()
    exp.update(awkward_snapshot())
    exp.observe_epoch_latency("ST01", 0.02)
    body, content_type = exp.exposition(OPENMETRICS_ACCEPT)
    encoder, expected_type = choose_encoder(OPENMETRICS_ACCEPT)
    # Source: prometheus_client openmetrics generate_latest (reference library).
    assert content_type == expected_type
    assert content_type.startswith("application/openmetrics-text; version=1.0.0")
    assert body == encoder(registry)
    assert body.endswith(b"# EOF\n")
    assert sample_values(om_families(body.decode()))  # well-formed OpenMetrics


@pytest.mark.parametrize(
    "accept",
    [
        "",
        "*/*",
        "application/openmetrics-text",
        "application/openmetrics-text;version=1.0.0;escaping=underscores",
        "text/plain;version=0.0.4",
        "text/plain;version=1.0.0;escaping=allow-utf-8",
        "text/plain;version=1.0.0;escaping=dots",  # rewrites names: prometheus_client writes it
        "application/openmetrics-text;version=1.0.0;escaping=values",
    ],
)
def test_exporter_exposition_follows_content_negotiation(accept):
    """Exporter negotiates the format as prometheus_client does and writes the same bytes."""
    from prometheus_client.exposition import choose_encoder

    exp, registry, _ = make_exporter()
    exp.update(awkward_snapshot())
    exp.observe_epoch_latency("ST02", 0.2)
    encoder, content_type = choose_encoder(accept)
    # Source: prometheus_client choose_encoder and its encoders (reference library).
    assert exp.exposition(accept) == (encoder(registry), content_type)


def test_exporter_exposition_follows_changing_satellite_sets():
    """Exporter's cached label texts follow satellites coming, going and turning unknown."""
    exp, registry, _ = make_exporter()
    for n, nan_sat in ((4, False), (6, False), (3, True), (6, True), (4, False)):
        st = StationFigures(
            station="ST00", snapshot=make_snapshot("ST00", T0, n=n, nan_sat=nan_sat)
        )
        exp.update(DaemonSnapshot(stations=(st,)))
        # Source: prometheus_client generate_latest (reference library).
        assert exp.exposition()[0] == generate_latest(registry)


def test_exporter_exposition_leaves_unusual_families_to_prometheus_client():
    """Exporter hands the whole exposition to prometheus_client when another collector on the
    registry has what our writer does not write (a sample timestamp), and stays identical."""
    from prometheus_client.core import GaugeMetricFamily

    class Stamped:
        def collect(self):
            g = GaugeMetricFamily("other_stamped", "A gauge with a timestamp.", labels=["k"])
            g.add_metric(["v"], 1.0, timestamp=1700000000.5)
            yield g

    exp, registry, _ = make_exporter()
    registry.register(Stamped())
    exp.update(daemon_snapshot())
    body, _ = exp.exposition()
    # Source: prometheus_client generate_latest (reference library).
    assert body == generate_latest(registry)
    assert b'other_stamped{k="v"} 1.0 1700000000500\n' in body


def test_go_float_matches_prometheus_client():
    """Exporter formats numbers as prometheus_client's floatToGoString does (Go's 'g' rule)."""
    from hypothesis import given
    from hypothesis import strategies as st
    from prometheus_client.utils import floatToGoString

    from ionwarden.daemon.outputs._exposition import go_float

    fixed = [0.0, -0.0, 1.0, 999_999.0, 1e6, 1_234_567.0, 1e15, 1e16, 123456789012.5, -1e7, 1e-7]
    fixed += [float("nan"), float("inf"), float("-inf"), 12345, True]
    for v in fixed:
        assert go_float(v) == floatToGoString(v)  # Source: prometheus_client (reference library)

    @given(st.floats(allow_nan=True, allow_infinity=True))
    def check(v: float) -> None:
        assert go_float(v) == floatToGoString(v)  # Source: prometheus_client (reference library)

    check()


@pytest.mark.integration
def test_exporter_http_gzip_only_when_asked():
    """Exporter compresses the scrape only for clients that ask for gzip; both decode to the same
    exposition; an OpenMetrics Accept header gets OpenMetrics."""
    import gzip

    exp, registry, _ = make_exporter()
    exp.update(daemon_snapshot())
    with exp:
        url = f"http://127.0.0.1:{exp.port}/metrics"
        with urllib.request.urlopen(url, timeout=5) as resp:
            assert resp.headers.get("Content-Encoding") is None
            plain = resp.read()
        req = urllib.request.Request(url, headers={"Accept-Encoding": "gzip"})
        with urllib.request.urlopen(req, timeout=5) as resp:
            assert resp.headers["Content-Encoding"] == "gzip"
            zipped = resp.read()
        req = urllib.request.Request(url, headers={"Accept": OPENMETRICS_ACCEPT})
        with urllib.request.urlopen(req, timeout=5) as resp:
            assert resp.headers["Content-Type"].startswith("application/openmetrics-text")
            om = resp.read()
    # Source: prometheus_client generate_latest (reference library); _created is the clock.
    assert without_created(plain) == without_created(generate_latest(registry))
    assert gzip.decompress(zipped) == plain
    assert om.endswith(b"# EOF\n")


@pytest.mark.integration
def test_exporter_http_keeps_prometheus_client_behaviour_for_other_requests():
    """Exporter still filters by name[] and refuses methods other than GET/OPTIONS (405)."""
    import urllib.error

    exp, _, _ = make_exporter()
    exp.update(daemon_snapshot())
    with exp:
        url = f"http://127.0.0.1:{exp.port}/metrics"
        with urllib.request.urlopen(f"{url}?name[]=ionwarden_station_vtec_tecu", timeout=5) as r:
            text = r.read().decode()
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(urllib.request.Request(url, method="POST", data=b""), timeout=5)
        err.value.close()
    assert {k[0] for k in samples(text)} == {"ionwarden_station_vtec_tecu"}
    assert err.value.code == 405


@pytest.mark.integration
def test_exporter_concurrent_scrapes_get_whole_expositions():
    """Exporter serves overlapping scrapes (one thread each), each a complete exposition."""
    from concurrent.futures import ThreadPoolExecutor

    exp, _, _ = make_exporter()
    snaps = [daemon_snapshot(2, n) for n in (3, 5, 7)]
    exp.update(snaps[0])
    with exp:
        url = f"http://127.0.0.1:{exp.port}/metrics"

        def scrape(i: int) -> bytes:
            exp.update(snaps[i % 3])
            with urllib.request.urlopen(url, timeout=10) as resp:
                return resp.read()

        with ThreadPoolExecutor(max_workers=6) as pool:
            bodies = list(pool.map(scrape, range(24)))
    for body in bodies:
        s = samples(body.decode())
        n = sum(1 for name, labels in s if name == "ionwarden_satellite_stec_tecu")
        assert n in (6, 10, 14)  # 2 stations × 3, 5 or 7 satellites, never a mix
