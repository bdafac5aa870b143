"""Configuration: one validated, frozen tree (TOML → environment → secrets), see ``_settings``."""

from ._alarms import AlarmSettings, Cn0BaselineSettings, ThresholdAlarm
from ._estimator import EstimatorSettings
from ._logging import LoggingSettings
from ._mqtt import MqttSettings
from ._prometheus import PrometheusSettings
from ._runtime import RuntimeSettings
from ._settings import ENV_PREFIX, Settings, format_validation_error, load_settings, redacted_dump
from ._stations import StationSettings

__all__ = [
    "ENV_PREFIX",
    "AlarmSettings",
    "Cn0BaselineSettings",
    "EstimatorSettings",
    "LoggingSettings",
    "MqttSettings",
    "PrometheusSettings",
    "RuntimeSettings",
    "Settings",
    "StationSettings",
    "ThresholdAlarm",
    "format_validation_error",
    "load_settings",
    "redacted_dump",
]
