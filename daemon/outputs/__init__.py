"""Outputs: the MQTT publisher, the Prometheus exporter and their pure formatting (STYLE rules 19–20).

Topic tree and payloads: docs/mqtt.md; metrics: docs/metrics.md. The input model the runtime fills
is :class:`DaemonSnapshot` (``_model``).
"""

from ._buffer import OutboundBuffer, OutboundMessage
from ._credentials import resolve_password, tls_context
from ._exporter import Exporter, SnapshotCollector
from ._model import DaemonSnapshot, IngestFigures, MqttStatistics, QueueFigures, StationFigures
from ._payloads import (
    SCHEMA_NAMES,
    alarm_event_payload,
    alarm_state_payload,
    daemon_status_payload,
    health_payload,
    satellites_payload,
    schema_id,
    station_status_payload,
    summary_payload,
)
from ._publisher import GOODBYE_TIMEOUT_S, TRANSIENT_MQTT_ERRORS, MqttPublisher
from ._topics import DAEMON_SEGMENT, Topic, TopicTree

__all__ = [
    "DAEMON_SEGMENT",
    "GOODBYE_TIMEOUT_S",
    "SCHEMA_NAMES",
    "TRANSIENT_MQTT_ERRORS",
    "DaemonSnapshot",
    "Exporter",
    "IngestFigures",
    "MqttPublisher",
    "MqttStatistics",
    "OutboundBuffer",
    "OutboundMessage",
    "QueueFigures",
    "SnapshotCollector",
    "StationFigures",
    "Topic",
    "TopicTree",
    "alarm_event_payload",
    "alarm_state_payload",
    "daemon_status_payload",
    "health_payload",
    "resolve_password",
    "satellites_payload",
    "schema_id",
    "station_status_payload",
    "summary_payload",
    "tls_context",
]
