"""Monitoring assets under config/: Prometheus rules (promtool), Grafana dashboard, Mosquitto TLS/ACL."""

from __future__ import annotations

import asyncio
import dataclasses
import json
import re
import shutil
import subprocess
import time
from pathlib import Path

import aiomqtt
import pytest
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from ionwarden.daemon.alarms import AlarmKind, AlarmState, AlarmStatus, Severity
from ionwarden.daemon.config import MqttSettings, PrometheusSettings
from ionwarden.daemon.outputs import Exporter
from tests._mqtt_support import collect, free_port, need, port_open, unique_prefix
from tests._outputs_support import make_snapshot
from tests.test_exporter import daemon_snapshot

CONFIG = Path(__file__).resolve().parents[1] / "config"
RULES = CONFIG / "prometheus" / "ionwarden.rules.yml"
RULES_TEST = CONFIG / "prometheus" / "ionwarden.rules.test.yml"
DASHBOARD = CONFIG / "grafana" / "ionwarden-dashboard.json"
METRIC = re.compile(r"\bionwarden_[a-z0-9_]+")


def exported_names() -> set[str]:
    """Every sample name the exporter serves for a full snapshot (incl. _total, _bucket, …)."""
    registry = CollectorRegistry()
    exp = Exporter(PrometheusSettings(), registry=registry)
    snap = daemon_snapshot()
    cn0 = AlarmStatus(
        station="ST00",
        alarm="cn0-drop-g2",
        kind=AlarmKind.CN0_DROP,
        band="G2",
        severity=Severity.SEVERE,
        state=AlarmState.NORMAL,
        pending=False,
        value=0.5,
        unit="dB",
        raise_at=6.0,
        clear_at=3.0,
        since=None,
    )
    exp.update(dataclasses.replace(snap, alarms=(*snap.alarms, cn0)))
    exp.observe_epoch_latency("ST00", 0.01)
    names = set()
    for fam in text_string_to_metric_families(generate_latest(registry).decode()):
        names.update(s.name for s in fam.samples)
    return names


def promtool() -> str:
    exe = shutil.which("promtool")
    need("promtool (Debian package prometheus)", exe is not None)
    assert exe is not None
    return exe


@pytest.mark.integration
def test_assets_rules_pass_promtool_check():
    """promtool check rules accepts ionwarden.rules.yml."""
    out = subprocess.run(
        [promtool(), "check", "rules", str(RULES)],
        check=False,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.returncode == 0, out.stdout + out.stderr


@pytest.mark.integration
def test_assets_rules_pass_promtool_unit_tests():
    """promtool test rules passes the alerting unit tests in ionwarden.rules.test.yml."""
    out = subprocess.run(
        [promtool(), "test", "rules", str(RULES_TEST)],
        check=False,
        capture_output=True,
        text=True,
        timeout=60,
        cwd=RULES_TEST.parent,
    )
    assert out.returncode == 0, out.stdout + out.stderr


def test_assets_rules_name_only_exported_metrics():
    """ionwarden.rules.yml names only metrics the exporter serves."""
    names = set(METRIC.findall(RULES.read_text(encoding="utf-8")))
    assert names
    assert names <= exported_names(), names - exported_names()


def _queries(node) -> list[str]:
    out = []
    if isinstance(node, dict):
        for key, value in node.items():
            if key in ("expr", "definition") and isinstance(value, str):
                out.append(value)
            else:
                out += _queries(value)
    elif isinstance(node, list):
        for item in node:
            out += _queries(item)
    return out


def test_assets_dashboard_queries_name_exported_metrics():
    """Every Grafana query names at least one metric, and every metric named is one we export."""
    dash = json.loads(DASHBOARD.read_text(encoding="utf-8"))
    queries = _queries(dash)
    assert len(queries) >= 15
    exported = exported_names()
    for q in queries:
        names = METRIC.findall(q)
        assert names, f"query names no ionwarden metric: {q}"
        assert set(names) <= exported, f"{q}: {set(names) - exported}"


def test_assets_dashboard_has_the_promised_panels():
    """The dashboard has a station overview, a per-satellite ROTI heat map, VTEC and gradient
    series and ingest health."""
    dash = json.loads(DASHBOARD.read_text(encoding="utf-8"))
    titles = {p["title"]: p["type"] for p in dash["panels"]}
    assert titles["Station overview"] == "row"
    assert titles["ROTI per satellite (TECU/min)"] == "heatmap"
    assert titles["VTEC (TECU)"] == "timeseries"
    assert titles["Station gradient (mm/km)"] == "timeseries"
    assert titles["Ingest and daemon health"] == "row"
    ids = [p["id"] for p in dash["panels"]]
    assert len(ids) == len(set(ids))


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def _make_certs(d: Path) -> None:
    ec = ("-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes")
    _openssl(
        "req",
        "-x509",
        *ec,
        "-keyout",
        "ca.key",
        "-out",
        "ca.crt",
        "-subj",
        "/CN=iw-test-ca",
        "-days",
        "1",
        cwd=d,
    )
    _openssl(
        "req", *ec, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=localhost", cwd=d
    )
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n", encoding="utf-8")
    _openssl(
        "x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "server.crt", "-days", "1", "-extfile", "san.ext", cwd=d,
    )  # fmt: skip
    _openssl(
        "req", *ec, "-keyout", "client.key", "-out", "client.csr", "-subj", "/CN=ionwarden", cwd=d
    )
    _openssl(
        "x509", "-req", "-in", "client.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "client.crt", "-days", "1", cwd=d,
    )  # fmt: skip


@pytest.mark.integration
@pytest.mark.parametrize("client_cert", [False, True], ids=["server-tls", "mutual-tls"])
def test_assets_mosquitto_tls_example_serves_the_publisher(tmp_path, client_cert):
    """The example Mosquitto TLS + password + ACL config lets ionwarden publish over TLS (and with
    a client certificate when the broker requires one), and a read-only account receive it."""
    for tool in ("mosquitto", "mosquitto_passwd", "openssl"):
        need(tool, shutil.which(tool) is not None or Path(f"/usr/sbin/{tool}").exists())
    _make_certs(tmp_path)
    passwd = tmp_path / "passwd"
    for user, pw in (("ionwarden", "daemon-pw"), ("ionwarden-reader", "reader-pw")):
        flag = ["-c"] if not passwd.exists() else []
        subprocess.run(
            ["mosquitto_passwd", *flag, "-b", str(passwd), user, pw], check=True, timeout=30
        )
    prefix = unique_prefix().replace("iwtest/", "ionwarden/")
    tls_port = free_port()
    plain_port = free_port()
    while plain_port == tls_port:  # (each is only a port free a moment ago)
        plain_port = free_port()
    conf = (CONFIG / "mosquitto" / "ionwarden-tls.conf").read_text(encoding="utf-8")
    conf = (
        conf.replace("/etc/mosquitto/ionwarden.passwd", str(passwd))
        .replace("/etc/mosquitto/ionwarden.acl", str(CONFIG / "mosquitto" / "ionwarden.acl"))
        .replace("/etc/mosquitto/certs", str(tmp_path))
        .replace("listener 8883", f"listener {tls_port} 127.0.0.1")
        .replace("listener 1883 127.0.0.1", f"listener {plain_port} 127.0.0.1")
    )
    if client_cert:
        conf = conf.replace("# require_certificate true", "require_certificate true")
    (tmp_path / "m.conf").write_text(conf + "user root\nlog_dest none\n", encoding="utf-8")
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    proc = subprocess.Popen([exe, "-c", str(tmp_path / "m.conf")])
    try:
        deadline = time.monotonic() + 10.0
        # Both listeners: mosquitto opens them in the config's order (TLS first), and the
        # reader below connects to the plain one (under load it came up after the test began).
        while proc.poll() is None and not all(
            port_open("127.0.0.1", port) for port in (tls_port, plain_port)
        ):
            assert time.monotonic() < deadline, "mosquitto did not start"
            time.sleep(0.02)  # polling for readiness, not timing logic
        assert proc.poll() is None, "mosquitto rejected the example config"
        (tmp_path / "pw").write_text("daemon-pw\n", encoding="utf-8")
        settings = MqttSettings(
            host="127.0.0.1",
            port=tls_port,
            topic_prefix=prefix,
            username="ionwarden",
            password_file=tmp_path / "pw",
            tls_ca_file=tmp_path / "ca.crt",
            tls_cert_file=tmp_path / "client.crt" if client_cert else None,
            tls_key_file=tmp_path / "client.key" if client_cert else None,
            timeout_s=5.0,
        )

        async def main():
            from ionwarden.daemon.outputs import MqttPublisher

            if client_cert:  # without its certificate the daemon is refused
                bare = MqttPublisher(
                    settings.model_copy(
                        update={"tls_cert_file": None, "tls_key_file": None, "timeout_s": 2.0}
                    )
                )
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(bare.run(), name="daemon.output[mqtt]")
                    await asyncio.wait_for(bare.wait_ready(), 10)
                    refused = bare.statistics()
                    bare.stop()
                assert not refused.connected
                assert refused.connects_total == 0

            reader = aiomqtt.Client(
                "127.0.0.1", plain_port, username="ionwarden-reader", password="reader-pw"
            )
            async with reader:
                await reader.subscribe(f"{prefix}/#", qos=1)
                pub = MqttPublisher(settings)
                async with asyncio.TaskGroup() as tg:
                    tg.create_task(pub.run(), name="daemon.output[mqtt]")
                    await asyncio.wait_for(pub.wait_connected(), 10)
                    pub.publish_snapshot_nowait(make_snapshot("ALPHA"))
                    await asyncio.wait_for(pub.wait_drained(), 10)
                    pub.stop()
                return await collect(
                    reader, until=lambda g: any(t.endswith("/summary") for t, _, _ in g)
                )

        got = asyncio.run(main())
        assert any(t == f"{prefix}/ALPHA/summary" for t, _, _ in got)
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_assets_packaged_schemas_match_config():
    """daemon/schemas (shipped in the wheel) holds byte-identical copies of config/schemas."""
    src = {p.name: p.read_bytes() for p in (CONFIG / "schemas").glob("*.schema.json")}
    pkg_dir = CONFIG.parent / "daemon" / "schemas"
    pkg = {p.name: p.read_bytes() for p in pkg_dir.glob("*.schema.json")}
    assert pkg == src, "copy config/schemas/*.schema.json to daemon/schemas/"
