"""Config sources: TOML file, IONWARDEN_* environment, secrets directory and overrides, merged.

The naming rules (case-insensitive names, ``__`` nesting, JSON for complex keys, stripped secret
files, ignored foreign names) are the ones ionwarden documented while it used pydantic-settings; where
a test pins such a rule, the comment names what pydantic-settings 2.16.3 did, read in its source
(``sources/providers/env.py``, ``nested_secrets.py``) and run against the old loader before removal.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from ionwarden.daemon.cli import main
from ionwarden.daemon.config import Settings, load_settings, redacted_dump
from ionwarden.daemon.errors import ConfigError

from .conftest import REPO

TOML = """
[[stations]]
name = "base"
source = "tcp://127.0.0.1:5018"

[mqtt]
host = "toml-host"
username = "toml-user"
port = 1001
client_id = "toml-client"
"""


@pytest.fixture(autouse=True)
def _clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """Tests start with no IONWARDEN_* variables (any case) and no systemd credentials directory."""
    for key in list(os.environ):
        if key.upper().startswith("IONWARDEN_") or key == "CREDENTIALS_DIRECTORY":
            monkeypatch.delenv(key)


@pytest.fixture
def toml(tmp_path: Path) -> Path:
    path = tmp_path / "c.toml"
    path.write_text(TOML)
    return path


@pytest.fixture
def secrets(tmp_path: Path) -> Path:
    path = tmp_path / "creds"
    path.mkdir()
    return path


def test_precedence_overrides_over_secrets(toml: Path, secrets: Path) -> None:
    """A keyword override wins over a credential file."""
    (secrets / "mqtt__username").write_text("secret-user")
    settings = load_settings(toml, secrets_dir=secrets, mqtt={"username": "override-user"})
    assert settings.mqtt.username == "override-user"


def test_precedence_overrides_over_env(toml: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A keyword override wins over an IONWARDEN_ variable."""
    monkeypatch.setenv("IONWARDEN_MQTT__HOST", "env-host")
    assert load_settings(toml, mqtt={"host": "override-host"}).mqtt.host == "override-host"


def test_precedence_overrides_over_toml(toml: Path) -> None:
    """A keyword override wins over the TOML file."""
    assert load_settings(toml, mqtt={"port": 1004}).mqtt.port == 1004


def test_sources_merge_key_by_key_when_layered(
    toml: Path, secrets: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Each source overrides only the keys it names; a section's other keys come from below."""
    monkeypatch.setenv("IONWARDEN_MQTT__USERNAME", "env-user")
    monkeypatch.setenv("IONWARDEN_MQTT__PORT", "1002")
    monkeypatch.setenv("IONWARDEN_MQTT__HOST", "env-host")
    (secrets / "mqtt__port").write_text("1003")
    (secrets / "mqtt__password").write_text("hunter2")
    settings = load_settings(toml, secrets_dir=secrets, mqtt={"username": "override-user"})
    assert settings.mqtt.client_id == "toml-client"  # TOML only
    assert settings.mqtt.host == "env-host"  # env over TOML
    assert settings.mqtt.port == 1003  # secret over env over TOML
    assert settings.mqtt.username == "override-user"  # override over env over TOML
    assert settings.mqtt.password is not None
    assert settings.mqtt.password.get_secret_value() == "hunter2"
    assert [s.name for s in settings.stations] == ["base"]  # untouched section kept


def test_env_section_json_merges_with_toml_and_deeper_names(
    toml: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A whole section as JSON overrides only its keys; a deeper variable wins over the JSON."""
    monkeypatch.setenv("IONWARDEN_MQTT", '{"host": "json-host", "port": 1884}')
    monkeypatch.setenv("IONWARDEN_MQTT__PORT", "1999")
    settings = load_settings(toml)
    assert (settings.mqtt.host, settings.mqtt.port) == ("json-host", 1999)
    assert settings.mqtt.username == "toml-user"


@pytest.mark.parametrize(
    "name", ["IONWARDEN_MQTT__HOST", "ionwarden_mqtt__host", "Ionwarden_Mqtt__Host"]
)
def test_env_names_case_insensitive(name: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """Variable names match in any case (pydantic-settings' default case_sensitive=False)."""
    monkeypatch.setenv(name, "any-case")
    assert load_settings(None).mqtt.host == "any-case"


def test_env_stations_json_list_replaces_toml_list(
    toml: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """IONWARDEN_STATIONS takes a JSON list, which replaces the file's stations (lists never merge)."""
    monkeypatch.setenv(
        "IONWARDEN_STATIONS",
        '[{"name": "env-a", "source": "stdin:", "position_ecef_m": [1, 2, 3]},'
        ' {"name": "env-b", "source": "tcp://192.0.2.1:5018"}]',
    )
    settings = load_settings(toml)
    assert [s.name for s in settings.stations] == ["env-a", "env-b"]
    assert settings.stations[0].position_ecef_m == (1.0, 2.0, 3.0)


def test_env_complex_keys_take_json(monkeypatch: pytest.MonkeyPatch) -> None:
    """Tuples, sets, sub-sections and tables below a section are JSON; scalars stay text to coerce."""
    monkeypatch.setenv("IONWARDEN_PROMETHEUS__LATENCY_BUCKETS_S", "[0.1, 1]")
    monkeypatch.setenv("IONWARDEN_ALARMS__FIX_ACCEPTED_QUALITIES", "[1, 2]")
    monkeypatch.setenv("IONWARDEN_ALARMS__ROTI", '{"raise_at": 0.9, "clear_at": 0.2}')
    monkeypatch.setenv("IONWARDEN_ESTIMATOR__PAIRS", '{"G": ["1C-2W"]}')
    monkeypatch.setenv("IONWARDEN_MQTT__ENABLED", "false")
    monkeypatch.setenv("IONWARDEN_RUNTIME__STATE_DIR", "/tmp/iw-state")
    settings = load_settings(None)
    assert settings.prometheus.latency_buckets_s == (0.1, 1.0)
    assert settings.alarms.fix_accepted_qualities == frozenset({1, 2})
    assert (settings.alarms.roti.raise_at, settings.alarms.roti.clear_at) == (0.9, 0.2)
    assert settings.estimator.pairs == {"G": ["1C-2W"]}
    assert settings.mqtt.enabled is False
    assert settings.runtime.state_dir == Path("/tmp/iw-state")


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("IONWARDEN_STATIONS", '[{"name": '),
        ("IONWARDEN_MQTT", "{host: 1}"),
        ("IONWARDEN_PROMETHEUS__LATENCY_BUCKETS_S", "[0.1, 1"),
    ],
)
def test_env_bad_json_one_line_naming_variable(
    name: str, value: str, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Unparsable JSON in a variable is one ConfigError line naming the variable, exit 2 in the CLI."""
    monkeypatch.setenv(name, value)
    with pytest.raises(ConfigError) as info:
        load_settings(None)
    assert str(info.value).startswith(f"{name}: invalid JSON (")
    assert "\n" not in str(info.value)
    assert main(["config", "show"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert name in err
    assert "Traceback" not in err


def test_env_unknown_top_level_names_ignored(monkeypatch: pytest.MonkeyPatch) -> None:
    """IONWARDEN_* names that are no top-level key are ignored, as pydantic-settings did.

    The test broker's IONWARDEN_TEST_MQTT_HOST shares the prefix and must not break loading.
    """
    monkeypatch.setenv("IONWARDEN_TEST_MQTT_HOST", "broker.invalid")
    monkeypatch.setenv("IONWARDEN_BOGUS", "1")
    monkeypatch.setenv("IONWARDEN_", "1")
    assert redacted_dump(load_settings(None)) == redacted_dump(Settings())


@pytest.mark.parametrize(
    ("name", "expected"),
    [
        ("IONWARDEN_MQTT__HOTS", "mqtt.hots: unknown key"),
        (
            "IONWARDEN_ALARMS__CN0_BASELINE__MIN_SAMPLEZ",
            "alarms.cn0_baseline.min_samplez: unknown key",
        ),
    ],
)
def test_env_unknown_key_in_section_one_line(
    name: str, expected: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A misspelt key under a known section is an error naming its path, as pydantic-settings gave."""
    monkeypatch.setenv(name, "1")
    with pytest.raises(ConfigError, match=f"^{expected}$"):
        load_settings(None)


def test_env_scalar_passed_as_text_for_pydantic(monkeypatch: pytest.MonkeyPatch) -> None:
    """A scalar variable reaches pydantic as text: coerced when valid, a one-line key error when not."""
    monkeypatch.setenv("IONWARDEN_MQTT__PORT", "1884")
    assert load_settings(None).mqtt.port == 1884
    monkeypatch.setenv("IONWARDEN_MQTT__PORT", "eighteen")
    with pytest.raises(ConfigError, match=r"^mqtt\.port: Input should be a valid integer"):
        load_settings(None)


def test_secrets_file_surrounding_whitespace_stripped(secrets: Path) -> None:
    """A credential file's trailing newline (and any surrounding whitespace) is stripped.

    pydantic-settings 2.16.3 NestedSecretsSettingsSource.load_secrets: ``read_text().strip()``.
    """
    (secrets / "mqtt__password").write_text("hunter2\n")
    (secrets / "mqtt__username").write_text("  user \n\n")
    settings = load_settings(None, secrets_dir=secrets)
    assert settings.mqtt.password is not None
    assert settings.mqtt.password.get_secret_value() == "hunter2"
    assert settings.mqtt.username == "user"


def test_secrets_empty_file_gives_empty_password(secrets: Path) -> None:
    """An empty credential file (systemd units ship one for "no password") is an empty secret."""
    (secrets / "mqtt__password").write_text("")
    password = load_settings(None, secrets_dir=secrets).mqtt.password
    assert password is not None
    assert password.get_secret_value() == ""


def test_secrets_names_case_insensitive(secrets: Path) -> None:
    """Credential file names match in any case, like variable names."""
    (secrets / "MQTT__USERNAME").write_text("upper")
    assert load_settings(None, secrets_dir=secrets).mqtt.username == "upper"


def test_secrets_foreign_files_ignored(secrets: Path, tmp_path: Path) -> None:
    """Other credentials, hidden files, sub-directories and links out of the directory are skipped."""
    (secrets / "ntrip_password.base").write_text("ntrip-secret")
    (secrets / ".hidden").write_text("x")
    (secrets / "sub").mkdir()
    (secrets / "sub" / "mqtt__host").write_text("from-subdir")
    outside = tmp_path / "outside"
    outside.write_text("from-outside")
    (secrets / "mqtt__host").symlink_to(outside)
    assert load_settings(None, secrets_dir=secrets).mqtt.host == Settings().mqtt.host


def test_secrets_unknown_key_in_section_one_line(secrets: Path) -> None:
    """A credential file naming an unknown key of a known section is an error naming the key."""
    (secrets / "mqtt__bogus").write_text("1")
    with pytest.raises(ConfigError, match=r"^mqtt\.bogus: unknown key$"):
        load_settings(None, secrets_dir=secrets)


def test_secrets_bad_json_names_file_not_value(secrets: Path) -> None:
    """A malformed JSON credential is one line naming the file and never echoing its content."""
    (secrets / "stations").write_text('[{"name": "s3cret-ish')
    with pytest.raises(ConfigError) as info:
        load_settings(None, secrets_dir=secrets)
    assert str(info.value).startswith(f"{secrets / 'stations'}: invalid JSON (")
    assert "s3cret" not in str(info.value)


def test_secrets_dir_missing_ok(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A secrets directory that does not exist (argument or $CREDENTIALS_DIRECTORY) means no secrets."""
    assert load_settings(None, secrets_dir=tmp_path / "absent").mqtt.password is None
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(tmp_path / "absent"))
    assert load_settings(None).mqtt.password is None


def test_secrets_dir_not_a_directory_one_line(tmp_path: Path) -> None:
    """A secrets path that is a file is one ConfigError line naming it."""
    path = tmp_path / "afile"
    path.write_text("x")
    with pytest.raises(ConfigError, match=f"^{path}: "):
        load_settings(None, secrets_dir=path)


def test_settings_defaults_without_sources() -> None:
    """Settings() with no sources is the defaults, equal to load_settings with none given."""
    assert Settings() == load_settings(None)
    assert Settings().stations == []


def test_config_loading_does_not_import_pydantic_settings() -> None:
    """The daemon's modules load settings without pydantic-settings (issue 7: its ~4.4 MB RSS)."""
    code = (
        "import sys, ionwarden.daemon.cli, ionwarden.daemon.runtime, ionwarden.daemon.outputs, "
        "ionwarden.daemon.ingest\n"
        "from ionwarden.daemon.config import load_settings\n"
        "load_settings(None)\n"
        "print('pydantic_settings' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    assert out.stdout.strip() == "False"


def test_pyproject_has_no_pydantic_settings_dependency() -> None:
    """pyproject.toml no longer lists pydantic-settings as a dependency."""
    project = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]
    assert not [d for d in project["dependencies"] if d.startswith("pydantic-settings")]


def test_qos_from_the_environment(tmp_path, monkeypatch):
    """A QoS level given as text by the environment is the number it names; other text is an
    error naming the key (MQTT 3.1.1 §4.3: QoS 0, 1 or 2)."""
    monkeypatch.setenv("IONWARDEN_MQTT__QOS_STATUS", "2")
    assert load_settings(None, secrets_dir=tmp_path).mqtt.qos_status == 2
    monkeypatch.setenv("IONWARDEN_MQTT__QOS_STATUS", "3")
    with pytest.raises(ConfigError, match=r"mqtt\.qos_status"):
        load_settings(None, secrets_dir=tmp_path)
