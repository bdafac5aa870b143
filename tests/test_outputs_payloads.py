"""Pure formatting: golden bytes with a frozen clock, JSON Schema validation, topic validation."""

from __future__ import annotations

import datetime as dt
import functools
import json
from pathlib import Path

import jsonschema
import pytest

from ionwarden.daemon.alarms import AlarmKind, AlarmState, AlarmTransition, Severity, StationAlarms
from ionwarden.daemon.config import AlarmSettings
from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.outputs import (
    SCHEMA_NAMES,
    DaemonSnapshot,
    IngestFigures,
    MqttStatistics,
    QueueFigures,
    StationFigures,
    Topic,
    TopicTree,
    alarm_event_payload,
    alarm_state_payload,
    daemon_status_payload,
    health_payload,
    satellites_payload,
    station_status_payload,
    summary_payload,
)
from tests._outputs_support import T0, make_snapshot

SCHEMAS = Path(__file__).resolve().parents[1] / "config" / "schemas"
#: A frozen "now": 5.25 s after the invented epoch T0 (2025-12-02T12:00:00Z).
NOW = dt.datetime(2025, 12, 2, 12, 0, 5, 250000, tzinfo=dt.UTC)

TRANSITION = AlarmTransition(
    seq=3,
    station="ALPHA",
    alarm="cn0-drop-g2",
    kind=AlarmKind.CN0_DROP,
    band="G2",
    severity=Severity.SEVERE,
    previous=AlarmState.NORMAL,
    state=AlarmState.ACTIVE,
    time=T0,
    value=7.25,
    unit="dB",
    raise_at=6.0,
    clear_at=3.0,
)
HEALTH_INPUT = DaemonSnapshot(
    stations=(
        StationFigures(
            station="ALPHA",
            ingest=IngestFigures(
                bytes_total=1000, frames_total=10, crc_errors_total=1, connected=True
            ),
            last_epoch_monotonic_s=100.0,
            epochs_total=10,
        ),
    ),
    queues=(
        QueueFigures(
            stage="estimator", station="ALPHA", depth=1, capacity=256, peak=5, dropped_total=0
        ),
    ),
    mqtt=MqttStatistics(
        connected=True,
        buffered_alarm=0,
        buffered_epoch=2,
        published_total=50,
        dropped_epoch_total=3,
        dropped_alarm_total=0,
        connects_total=1,
        disconnects_total=0,
    ),
    started_monotonic_s=90.0,
)


def _schema(name: str) -> dict:
    return json.loads((SCHEMAS / f"{name}.schema.json").read_text(encoding="utf-8"))


@functools.cache
def _validator(name: str) -> jsonschema.Draft202012Validator:
    schema = _schema(name)
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def validate(name: str, payload: bytes) -> dict:
    """Parse ``payload`` and validate it against config/schemas/<name>.schema.json."""
    doc = json.loads(payload)
    _validator(name).validate(doc)
    assert doc["schema"] == f"ionwarden.{name}/{SCHEMA_NAMES[name]}"
    return doc


def all_payloads() -> dict[str, bytes]:
    snap = make_snapshot(n=2, nan_sat=True)
    status = StationAlarms("ALPHA", AlarmSettings()).statuses()[0]
    return {
        "summary": summary_payload(snap),
        "satellites": satellites_payload(snap),
        "station-status": station_status_payload("ALPHA", "online", NOW, T0),
        "daemon-status": daemon_status_payload("online", NOW, "0.1.0"),
        "alarm-event": alarm_event_payload(TRANSITION),
        "alarm-state": alarm_state_payload(status, NOW),
        "daemon-health": health_payload(HEALTH_INPUT, NOW, 101.5),
    }


# Golden bytes: our own format (docs/mqtt.md). Times: T0 = GPS week 2395, tow 216018 s is
# 2025-12-02T12:00:00Z with GPS−UTC = 18 s (IERS Bulletin C, via parsers/_gnsstime.py).
GOLDEN = {
    "summary": b'{"schema":"ionwarden.summary/1","station":"ALPHA","time_utc":"2025-12-02T12:00:00.000Z","gps_week":2395,"gps_tow_s":216018.0,"n_sats":2,"vtec_tecu":20.0,"roti_max_tecu_per_min":0.1,"roti_median_tecu_per_min":0.08,"rot_max_abs_tecu_per_min":0.2,"gradient_mm_per_km":3.0,"gradient_tecu_per_km":0.01847,"gradient_azimuth_deg":135.0,"dual_freq_fraction":1.0,"receiver_bias_tecu":1.5,"receiver_bias_sigma_tecu":0.2,"geometry_source":"ephemeris"}',
    "satellites": b'{"schema":"ionwarden.satellites/1","station":"ALPHA","time_utc":"2025-12-02T12:00:00.000Z","gps_week":2395,"gps_tow_s":216018.0,"sat":["G01","G02"],"pair":["1C-2W","1C-2W"],"el_deg":[20.0,80.0],"az_deg":[0.0,270.0],"ipp_lat_deg":[45.1,45.1],"ipp_lon_deg":[7.2,7.2],"stec_tecu":[null,11.0],"vtec_tecu":[null,5.5],"rot_tecu_per_min":[0.2,0.2],"roti_tecu_per_min":[0.1,0.1],"iono_l1_m":[null,1.7864],"slip":[false,false],"arc_id":[0,1]}',
    "station-status": b'{"schema":"ionwarden.station-status/1","station":"ALPHA","state":"online","time_utc":"2025-12-02T12:00:05.250Z","gps_week":2395,"gps_tow_s":216023.25,"last_epoch_utc":"2025-12-02T12:00:00.000Z"}',
    "daemon-status": b'{"schema":"ionwarden.daemon-status/1","state":"online","time_utc":"2025-12-02T12:00:05.250Z","gps_week":2395,"gps_tow_s":216023.25,"version":"0.1.0"}',
    "alarm-event": b'{"schema":"ionwarden.alarm-event/1","seq":3,"station":"ALPHA","alarm":"cn0-drop-g2","kind":"cn0-drop","band":"G2","band_name":"GPS L2","severity":"severe","previous":"normal","state":"active","time_utc":"2025-12-02T12:00:00.000Z","gps_week":2395,"gps_tow_s":216018.0,"value":7.25,"unit":"dB","raise_at":6.0,"clear_at":3.0}',
    "alarm-state": b'{"schema":"ionwarden.alarm-state/1","station":"ALPHA","alarm":"roti","kind":"roti","band":null,"band_name":null,"severity":"warning","state":"normal","pending":false,"value":null,"unit":"TECU/min","raise_at":0.5,"clear_at":0.25,"time_utc":"2025-12-02T12:00:05.250Z","gps_week":2395,"gps_tow_s":216023.25,"since_utc":null}',
    "daemon-health": b'{"schema":"ionwarden.daemon-health/1","time_utc":"2025-12-02T12:00:05.250Z","gps_week":2395,"gps_tow_s":216023.25,"uptime_s":11.5,"stations":[{"station":"ALPHA","connected":true,"epochs_total":10,"last_epoch_age_s":1.5,"bytes_total":1000,"frames_total":10,"crc_errors_total":1,"discarded_bytes_total":0}],"queues":[{"stage":"estimator","station":"ALPHA","depth":1,"capacity":256,"peak":5,"dropped_total":0}],"mqtt_buffered":2,"mqtt_dropped_total":3}',
}


@pytest.mark.parametrize("name", sorted(GOLDEN))
def test_payloads_match_golden_bytes(name):
    """payload formatting gives exactly the golden bytes when the clock is frozen."""
    assert all_payloads()[name] == GOLDEN[name]


@pytest.mark.parametrize("name", sorted(SCHEMA_NAMES))
def test_payloads_validate_against_schema(name):
    """every payload kind validates against its JSON Schema in config/schemas."""
    validate(name, all_payloads()[name])


def test_payloads_last_will_validates_with_null_times():
    """daemon_status_payload gives null times when built for the last will (no clock)."""
    doc = validate("daemon-status", daemon_status_payload("offline", None, "0.1.0"))
    assert doc["state"] == "offline"
    assert doc["time_utc"] is None


def test_payloads_are_pure_when_called_twice():
    """payload formatting returns identical bytes when called twice on the same input."""
    assert all_payloads() == all_payloads()


def test_payloads_satellites_nan_becomes_null_when_unknown():
    """satellites_payload writes null (valid JSON) when a figure is NaN."""
    doc = validate("satellites", satellites_payload(make_snapshot(n=3, nan_sat=True)))
    assert doc["stec_tecu"][0] is None
    assert doc["sat"] == ["G01", "G02", "G03"]


def test_payloads_schemas_cover_every_payload_kind():
    """config/schemas holds exactly one schema per payload kind, each a valid 2020-12 schema."""
    files = {p.name.removesuffix(".schema.json") for p in SCHEMAS.glob("*.schema.json")}
    assert files == set(SCHEMA_NAMES)
    for name in files:
        jsonschema.Draft202012Validator.check_schema(_schema(name))


def test_topics_tree_builds_documented_topics():
    """TopicTree builds the documented topic names under the prefix."""
    tree = TopicTree("site/ionwarden")
    assert str(tree.summary("ALPHA")) == "site/ionwarden/ALPHA/summary"
    assert str(tree.alarm("ALPHA", "cn0-drop-g2")) == "site/ionwarden/ALPHA/alarm/cn0-drop-g2"
    assert str(tree.daemon_status()) == "site/ionwarden/_daemon/status"
    assert str(tree.events("B.2")) == "site/ionwarden/B.2/events"


@pytest.mark.parametrize("bad", ["a/+/b", "a/#", "$SYS/x", "a//b", ""])
def test_topics_reject_invalid_names(bad):
    """Topic raises ValueError when a name has wildcards, a leading $ or an empty level."""
    with pytest.raises(ValueError):
        Topic(bad)


@pytest.mark.parametrize("station", ["a/b", "_daemon", "x+", "", "sp ace"])
def test_topics_reject_station_names_that_break_the_tree(station):
    """TopicTree raises ConfigError naming the key when a station name is not one topic level."""
    with pytest.raises(ConfigError, match=r"stations\.name"):
        TopicTree().summary(station)
