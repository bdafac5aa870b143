"""The MQTT topic tree as validated value objects (STYLE rule 20).

Every topic ionwarden publishes is built here from the configured prefix, so that a station name or
prefix that would make an invalid or wildcard topic is rejected once, at start-up, with a clear
error — not at the first publish. The tree (documented in ``docs/mqtt.md``)::

    <prefix>/_daemon/status                 retained, QoS 1, last will "offline"
    <prefix>/_daemon/health                 retained, QoS 0
    <prefix>/<station>/status               retained, QoS 1
    <prefix>/<station>/summary              per epoch, QoS 1 (configurable), message expiry
    <prefix>/<station>/satellites           rate-limited, QoS 0 (configurable), message expiry
    <prefix>/<station>/alarm/<alarm>        retained, QoS 1 (one per alarm)
    <prefix>/<station>/events               alarm transitions in order, QoS 1, not retained

ionwarden never subscribes: it is a read-only daemon with no MQTT command input.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from ionwarden.daemon.errors import ConfigError

__all__ = ["DAEMON_SEGMENT", "Topic", "TopicTree"]

#: The level under the prefix that holds daemon-wide topics; station names may not start with "_".
DAEMON_SEGMENT = "_daemon"
#: A station or alarm level: letters, digits, "-", "_", "." (no "/", "+", "#", blanks, "$").
_LEVEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$")
#: MQTT 3.1.1 §4.7.3 / MQTT 5.0 §4.7.3: a topic name is at most 65535 bytes of UTF-8; wildcards
#: "+" and "#" are not allowed in names; "$" at the start is reserved for the broker.
_MAX_TOPIC_BYTES = 65_535


@dataclass(frozen=True, slots=True)
class Topic:
    """A validated MQTT topic name to publish to (no wildcards, no empty levels)."""

    value: str

    def __post_init__(self) -> None:
        v = self.value
        if not v or len(v.encode()) > _MAX_TOPIC_BYTES:
            raise ValueError(f"bad topic length: {v!r}")
        if "+" in v or "#" in v or "\x00" in v:
            raise ValueError(f"wildcards or NUL not allowed in a topic name: {v!r}")
        if v.startswith("$"):
            raise ValueError(f"topics starting with '$' are reserved for the broker: {v!r}")
        if "" in v.split("/"):
            raise ValueError(f"empty topic level in {v!r}")

    def __str__(self) -> str:
        return self.value


def _check_level(key: str, value: str) -> str:
    if not _LEVEL.match(value):
        raise ConfigError(
            key, f"{value!r} is not usable as a topic level (letters, digits, '-', '_', '.')"
        )
    return value


@dataclass(frozen=True, slots=True)
class TopicTree:
    """Builds every topic under ``prefix`` (which may itself have several levels)."""

    prefix: str = "ionwarden"

    def __post_init__(self) -> None:
        try:
            Topic(self.prefix)
        except ValueError as exc:
            raise ConfigError("mqtt.topic_prefix", str(exc)) from exc

    def daemon_status(self) -> Topic:
        return Topic(f"{self.prefix}/{DAEMON_SEGMENT}/status")

    def daemon_health(self) -> Topic:
        return Topic(f"{self.prefix}/{DAEMON_SEGMENT}/health")

    def station(self, station: str, leaf: str) -> Topic:
        """``<prefix>/<station>/<leaf>``; ``leaf`` is one of status, summary, satellites, events."""
        _check_level("stations.name", station)
        return Topic(f"{self.prefix}/{station}/{leaf}")

    def station_status(self, station: str) -> Topic:
        return self.station(station, "status")

    def summary(self, station: str) -> Topic:
        return self.station(station, "summary")

    def satellites(self, station: str) -> Topic:
        return self.station(station, "satellites")

    def events(self, station: str) -> Topic:
        return self.station(station, "events")

    def alarm(self, station: str, alarm: str) -> Topic:
        _check_level("stations.name", station)
        _check_level("alarm", alarm)
        return Topic(f"{self.prefix}/{station}/alarm/{alarm}")
