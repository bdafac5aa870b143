"""The root settings tree and how it is loaded (STYLE rule 24).

Sources, lowest precedence first — each later one overrides the earlier:

1. the TOML file (``--config FILE``),
2. environment variables ``IONWARDEN_<SECTION>__<KEY>`` (e.g. ``IONWARDEN_MQTT__HOST``),
3. the secrets directory: systemd's ``$CREDENTIALS_DIRECTORY`` (``LoadCredential=``), one file per
   key named like the variable without prefix (e.g. ``mqtt__password``).

Every error becomes one :class:`ConfigError` line naming the key path, never a traceback.
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path
from typing import Any

from pydantic import Field, ValidationError, model_validator
from pydantic_settings import (
    BaseSettings,
    NestedSecretsSettingsSource,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    TomlConfigSettingsSource,
)

from ionwarden.daemon.errors import ConfigError

from ._alarms import AlarmSettings
from ._estimator import EstimatorSettings
from ._logging import LoggingSettings
from ._mqtt import MqttSettings
from ._prometheus import PrometheusSettings
from ._runtime import RuntimeSettings
from ._stations import StationSettings

__all__ = ["ENV_PREFIX", "Settings", "format_validation_error", "load_settings", "redacted_dump"]

ENV_PREFIX = "IONWARDEN_"


class Settings(BaseSettings):
    """Everything ionwarden can be told."""

    model_config = SettingsConfigDict(
        frozen=True,
        extra="forbid",
        env_prefix=ENV_PREFIX,
        env_nested_delimiter="__",
        secrets_nested_delimiter="__",
        secrets_prefix="",
        secrets_dir_missing="ok",
    )

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

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        # First in the tuple wins: secrets > environment > TOML file. Explicit keyword arguments
        # (tests only) win over all. No .env files.
        return (
            init_settings,
            NestedSecretsSettingsSource(file_secret_settings),
            env_settings,
            TomlConfigSettingsSource(settings_cls),
        )


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
    if path is not None:
        if not path.is_file():
            raise ConfigError(str(path), "no such file")
        try:
            with path.open("rb") as fh:
                tomllib.load(fh)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(str(path), f"invalid TOML: {exc}") from exc
        except OSError as exc:
            raise ConfigError(str(path), f"cannot read: {exc.strerror}") from exc
    if secrets_dir is None and os.environ.get("CREDENTIALS_DIRECTORY"):
        secrets_dir = Path(os.environ["CREDENTIALS_DIRECTORY"])

    class _Bound(Settings):
        model_config = SettingsConfigDict(toml_file=path, secrets_dir=secrets_dir)

    try:
        bound = _Bound(**overrides)
    except ValidationError as exc:
        raise ConfigError("", format_validation_error(exc)) from exc
    except ValueError as exc:  # pydantic-settings raises plain ValueError for unparsable env JSON
        raise ConfigError("", str(exc).splitlines()[0]) from exc
    return bound  # a Settings (subclassed only to bind this file and secrets directory)


def redacted_dump(settings: Settings) -> dict[str, Any]:
    """The effective settings as JSON-able data; pydantic renders every secret as ``**********``."""
    return settings.model_dump(mode="json")
