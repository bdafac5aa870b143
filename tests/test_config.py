"""Config loading: validation, precedence of sources, and the one-line errors of `config check`."""

from __future__ import annotations

from pathlib import Path

import pytest

from ionwarden.daemon.cli import main
from ionwarden.daemon.config import load_settings, redacted_dump
from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.ingest import (
    FileSource,
    NtripSource,
    SerialSource,
    StdinSource,
    TcpListenSource,
    TcpSource,
    parse_source,
)

from .conftest import REPO

GOOD = """
[[stations]]
name = "base"
source = "tcp://127.0.0.1:5018"

[mqtt]
host = "from-toml"
username = "toml-user"
"""


@pytest.fixture(autouse=True)
def _clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """Tests start with no IONWARDEN_* variables and no systemd credentials directory."""
    import os

    for key in list(os.environ):
        if key.startswith("IONWARDEN_") or key == "CREDENTIALS_DIRECTORY":
            monkeypatch.delenv(key)


def _write(tmp_path: Path, text: str, name: str = "c.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_example_config_loads() -> None:
    """config/ionwarden.example.toml loads and validates when shipped."""
    settings = load_settings(REPO / "config" / "ionwarden.example.toml")
    assert [s.name for s in settings.stations] == ["yard-base", "rover-north"]
    assert settings.estimator.shell_height_km == 350.0


def test_settings_defaults_when_no_file() -> None:
    """load_settings gives sane defaults when there is no file: no stations, loopback exporter."""
    settings = load_settings(None)
    assert settings.stations == []
    assert settings.prometheus.address == "127.0.0.1"


def test_settings_frozen_when_loaded(tmp_path: Path) -> None:
    """Settings refuse assignment once loaded."""
    settings = load_settings(_write(tmp_path, GOOD))
    with pytest.raises(Exception, match="frozen"):
        settings.mqtt.host = "x"  # type: ignore[misc]


def test_precedence_env_over_toml(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """An IONWARDEN_ variable overrides the TOML file."""
    monkeypatch.setenv("IONWARDEN_MQTT__HOST", "from-env")
    assert load_settings(_write(tmp_path, GOOD)).mqtt.host == "from-env"


def test_precedence_secrets_over_env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A credential file overrides the environment."""
    secrets = tmp_path / "creds"
    secrets.mkdir()
    (secrets / "mqtt__username").write_text("secret-user")
    monkeypatch.setenv("IONWARDEN_MQTT__USERNAME", "env-user")
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(secrets))
    assert load_settings(_write(tmp_path, GOOD)).mqtt.username == "secret-user"


def test_precedence_secrets_over_toml(tmp_path: Path) -> None:
    """A credential file overrides the TOML file."""
    secrets = tmp_path / "creds"
    secrets.mkdir()
    (secrets / "mqtt__username").write_text("secret-user")
    (secrets / "mqtt__password").write_text("hunter2")
    settings = load_settings(_write(tmp_path, GOOD), secrets_dir=secrets)
    assert settings.mqtt.username == "secret-user"
    assert settings.mqtt.password is not None
    assert settings.mqtt.password.get_secret_value() == "hunter2"


def test_redacted_dump_hides_secrets(tmp_path: Path) -> None:
    """config show output never contains a secret's value."""
    secrets = tmp_path / "creds"
    secrets.mkdir()
    (secrets / "mqtt__password").write_text("hunter2")
    dump = redacted_dump(load_settings(None, secrets_dir=secrets))
    assert "hunter2" not in repr(dump)
    assert dump["mqtt"]["password"] == "**********"


@pytest.mark.parametrize(
    ("url", "expected"),
    [
        ("serial:///dev/ttyUSB0?baud=115200", SerialSource(device="/dev/ttyUSB0", baud=115200)),
        ("tcp://192.0.2.10:5018", TcpSource(host="192.0.2.10", port=5018)),
        ("tcp-listen://0.0.0.0:5018", TcpListenSource(host="0.0.0.0", port=5018)),
        ("file://captures/a.rtcm3?speed=10", FileSource(path="captures/a.rtcm3", speed=10.0)),
        ("stdin:", StdinSource()),
    ],
)
def test_station_source_accepts_documented_forms(url, expected) -> None:
    """StationSettings.source_spec parses every URL form the example config documents."""
    assert parse_source(url) == expected
    assert (
        load_settings(None, stations=[{"name": "a", "source": url}]).stations[0].source_spec
        == expected
    )


def test_station_source_ntrip_defaults_to_port_2101() -> None:
    """An ntrip:// URL without a port uses 2101, the NTRIP registered port (IANA "rtcm-sc104")."""
    spec = parse_source("ntrip://user@caster.example/MOUNT")
    assert isinstance(spec, NtripSource)
    assert (spec.host, spec.port, spec.mount, spec.user) == (
        "caster.example",
        2101,
        "MOUNT",
        "user",
    )


BROKEN = {
    "unknown key": (
        "[estimator]\nshell_hieght_km = 450\n",
        "estimator.shell_hieght_km: unknown key",
    ),
    "wrong type": ('[mqtt]\nport = "eighteen"\n', "mqtt.port: Input should be a valid integer"),
    "bad source": (
        '[[stations]]\nname = "a"\nsource = "tcp://h:1"\n[[stations]]\nname = "b"\nsource = "tpc://h:1"\n',
        "stations[1].source: unknown scheme 'tpc'",
    ),
    "invalid toml": ("[mqtt\nhost = 1\n", "invalid TOML"),
}


@pytest.mark.parametrize("case", sorted(BROKEN))
def test_config_check_one_line_exit_2_when_broken(
    case: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`ionwarden config check` exits 2 with one line naming the key when the config is broken."""
    text, expected = BROKEN[case]
    rc = main(["config", "check", str(_write(tmp_path, text))])
    out, err = capsys.readouterr()
    assert rc == 2
    assert out == ""
    assert err.count("\n") == 1, err
    assert expected in err
    assert "Traceback" not in err


def test_config_check_one_line_exit_2_when_file_missing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`ionwarden config check` exits 2 with one line when the file does not exist."""
    rc = main(["config", "check", str(tmp_path / "nope.toml")])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1
    assert "nope.toml: no such file" in err


def test_config_check_ok_exit_0(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden config check` exits 0 and says ok when the config is valid."""
    assert main(["config", "check", str(_write(tmp_path, GOOD))]) == 0
    assert "ok (1 station)" in capsys.readouterr().out


def test_settings_reject_duplicate_station_names(tmp_path: Path) -> None:
    """Two stations with one name are refused, naming the second."""
    text = (
        '[[stations]]\nname = "a"\nsource = "stdin:"\n[[stations]]\nname = "a"\nsource = "stdin:"\n'
    )
    with pytest.raises(ConfigError, match=r"stations\[1\]\.name: duplicate"):
        load_settings(_write(tmp_path, text))
