"""The root settings tree and how it is loaded (STYLE rule 24).

Sources, lowest precedence first — each later one overrides the earlier, key by key within a
section (see ``_sources`` for the naming rules):

1. the TOML file (``--config FILE``),
2. environment variables ``IONWARDEN_<SECTION>__<KEY>`` (e.g. ``IONWARDEN_MQTT__HOST``), any case;
   lists, tables and whole sections as JSON (e.g. ``IONWARDEN_STATIONS='[{…}]'``),
3. the secrets directory: systemd's ``$CREDENTIALS_DIRECTORY`` (``LoadCredential=``), one file per
   key named like the variable without prefix (e.g. ``mqtt__password``), surrounding whitespace
   stripped,
4. keyword overrides given to :func:`load_settings` (tests and tools).

``Settings()`` alone is the defaults. Every error becomes one :class:`ConfigError` line naming the
key path (or the variable or file whose JSON is malformed), never a traceback.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from ionwarden.daemon.errors import ConfigError

from ._alarms import AlarmSettings
from ._estimator import EstimatorSettings
from ._logging import LoggingSettings
from ._mqtt import MqttSettings
from ._prometheus import PrometheusSettings
from ._runtime import RuntimeSettings
from ._sources import merge, read_env, read_secrets, read_toml
from ._stations import StationSettings

__all__ = ["ENV_PREFIX", "Settings", "format_validation_error", "load_settings", "redacted_dump"]

ENV_PREFIX = "IONWARDEN_"


class Settings(BaseModel):
    """Everything ionwarden can be told."""

    # validate_default as under pydantic-settings' BaseSettings, which this root replaced.
    model_config = ConfigDict(frozen=True, extra="forbid", validate_default=True)

    stations: list[StationSettings] = Field(default_factory=list)
    estimator: EstimatorSettings = EstimatorSettings()
    alarms: AlarmSettings = AlarmSettings()
    mqtt: MqttSettings = MqttSettings()
    prometheus: PrometheusSettings = PrometheusSettings()
    logging: LoggingSettings = LoggingSettings()
    runtime: RuntimeSettings = RuntimeSettings()

    @model_validator(mode="after")
    def _unique_station_names(self) -> Settings:
        seen: set[str] = set()
        for i, station in enumerate(self.stations):
            if station.name in seen:
                raise ValueError(f"stations[{i}].name: duplicate station name {station.name!r}")
            seen.add(station.name)
        return self


def _key_path(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out


def format_validation_error(exc: ValidationError) -> str:
    """The first problem as one line: ``stations[1].source: unknown scheme 'tpc' (known: …)``."""
    err = exc.errors(include_url=False)[0]
    msg = str(err["msg"])
    if err["type"] == "extra_forbidden":
        msg = "unknown key"
    elif msg.startswith("Value error, "):
        msg = msg.removeprefix("Value error, ")
    loc = _key_path(tuple(err["loc"]))
    if ": " in msg and msg.split(": ", 1)[0].startswith(("stations[",)):
        return msg  # a model-level check already named its key
    more = len(exc.errors()) - 1
    suffix = f" (and {more} more problem{'s' if more > 1 else ''})" if more else ""
    return f"{loc}: {msg}{suffix}" if loc else f"{msg}{suffix}"


def load_settings(
    path: Path | None = None, *, secrets_dir: Path | None = None, **overrides: Any
) -> Settings:
    """Load and validate the settings; raise ConfigError with one line on any problem.

    ``secrets_dir`` defaults to ``$CREDENTIALS_DIRECTORY`` when set.
    """
    toml = read_toml(path) if path is not None else {}
    if secrets_dir is None and os.environ.get("CREDENTIALS_DIRECTORY"):
        secrets_dir = Path(os.environ["CREDENTIALS_DIRECTORY"])
    env = read_env(Settings, os.environ, ENV_PREFIX)
    secrets = read_secrets(Settings, secrets_dir)
    try:
        return Settings.model_validate(merge(toml, env, secrets, overrides))
    except ValidationError as exc:
        raise ConfigError("", format_validation_error(exc)) from exc


def redacted_dump(settings: Settings) -> dict[str, Any]:
    """The effective settings as JSON-able data; pydantic renders every secret as ``**********``."""
    return settings.model_dump(mode="json")
