"""The ``[mqtt]`` section: where and how to publish (topic tree: docs/mqtt.md)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal, Self

from pydantic import BeforeValidator, Field, SecretStr, model_validator

from ._base import Section

__all__ = ["MqttSettings"]


def _qos_text(value: Any) -> Any:
    """ "0", "1", "2" from the environment or a secret file as the numbers they name."""
    return int(value) if isinstance(value, str) and value.strip() in ("0", "1", "2") else value


#: MQTT QoS level (MQTT 3.1.1 §4.3), also given as text by an ``IONWARDEN_MQTT__QOS_*`` variable.
QoS = Annotated[Literal[0, 1, 2], BeforeValidator(_qos_text)]


class MqttSettings(Section):
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = Field(default=1883, ge=1, le=65535)
    topic_prefix: str = Field(default="ionwarden", pattern=r"^[^#+\s]+$")
    client_id: str = ""
    username: str = ""
    #: Prefer a secret: the file ``mqtt__password`` in $CREDENTIALS_DIRECTORY, or IONWARDEN_MQTT__PASSWORD.
    password: SecretStr | None = None
    #: Or a file holding the password (first line; trailing newline ignored), e.g. a systemd credential path.
    password_file: Path | None = None
    tls_ca_file: Path | None = None
    tls_cert_file: Path | None = None
    tls_key_file: Path | None = None
    #: Use TLS with the system CA store even without ``tls_ca_file`` (e.g. port 8883 on a public broker).
    tls: bool = False
    keepalive_s: int = Field(default=30, ge=5, le=65535)
    #: Per-publish and connect timeout; a publish not acknowledged in time counts as a broken link.
    timeout_s: float = Field(default=5.0, gt=0.0)
    qos_status: QoS = 1
    qos_alarm: QoS = 1
    qos_summary: QoS = 1
    qos_satellites: QoS = 0
    qos_health: QoS = 0
    #: Per-satellite figures at most this often per station (0 = every epoch).
    satellites_interval_s: float = Field(default=10.0, ge=0.0)
    #: MQTT v5 message expiry of per-epoch data (summary, satellites): stale data is not delivered late.
    epoch_expiry_s: int = Field(default=60, ge=1)
    health_interval_s: float = Field(default=10.0, gt=0.0)
    #: While the broker is away: per-epoch messages kept (oldest dropped and counted) …
    epoch_buffer: int = Field(default=1000, ge=1)
    #: … and alarm/status messages kept, in order (a large bound; past it the oldest are dropped and counted).
    alarm_buffer: int = Field(default=100_000, ge=1)
    #: Messages sent and not yet acknowledged at once (1 = one at a time, awaiting each PUBACK).
    publish_window: int = Field(default=32, ge=1, le=65535)
    reconnect_initial_s: float = Field(default=1.0, gt=0.0)
    reconnect_cap_s: float = Field(default=30.0, gt=0.0)

    @model_validator(mode="after")
    def _tls_pair(self) -> Self:
        if (self.tls_cert_file is None) != (self.tls_key_file is None):
            raise ValueError("tls_cert_file and tls_key_file go together")
        if self.reconnect_cap_s < self.reconnect_initial_s:
            raise ValueError("reconnect_cap_s must be ≥ reconnect_initial_s")
        return self
