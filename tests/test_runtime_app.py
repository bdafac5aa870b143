"""From config to daemon: station options, secrets, state directory, and `ionwarden run` itself."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from ionwarden.daemon.cli import main
from ionwarden.daemon.config import load_settings
from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.ingest import NtripSource
from ionwarden.daemon.runtime._app import options_from_settings

from .conftest import REPO

DEMO = REPO / "daemon" / "data" / "demo.bin"


def _settings(**station: object):
    base = {"name": "base", "source": "ntrip://u@127.0.0.1:2101/M"}
    return load_settings(stations=[{**base, **station}], runtime={"state_dir": "/tmp/x"})


def test_options_take_ntrip_password_from_systemd_credential(tmp_path: Path) -> None:
    """options_from_settings reads ntrip_password.<station> from $CREDENTIALS_DIRECTORY."""
    (tmp_path / "ntrip_password.base").write_text("s3cret\n")
    opts = options_from_settings(_settings(), environ={"CREDENTIALS_DIRECTORY": str(tmp_path)})
    assert opts.stations[0].password == "s3cret"
    assert "s3cret" not in repr(opts.stations[0])


def test_options_prefer_state_directory_from_systemd() -> None:
    """options_from_settings uses $STATE_DIRECTORY over [runtime] state_dir."""
    assert options_from_settings(_settings(), environ={}).state_dir == Path("/tmp/x")
    opts = options_from_settings(_settings(), environ={"STATE_DIRECTORY": "/var/lib/ionwarden"})
    assert opts.state_dir == Path("/var/lib/ionwarden")


def test_options_fingerprint_changes_with_the_password() -> None:
    """options_from_settings gives a new fingerprint when the station's secret changes."""
    a = options_from_settings(_settings(ntrip_password="a"), environ={}).stations[0]
    b = options_from_settings(_settings(ntrip_password="b"), environ={}).stations[0]
    assert a.fingerprint != b.fingerprint


def test_options_derive_gga_position_from_ecef() -> None:
    """options_from_settings turns position_ecef_m into the GGA lat/lon of an NTRIP network mount."""
    # ECEF of 48.615 N, 10.423 E, 512 m (WGS 84; pymap3d.geodetic2ecef)
    ecef = (4155274.298, 764359.894, 4762745.828)
    opts = options_from_settings(
        _settings(position_ecef_m=ecef, ntrip_gga_interval_s=10), environ={}
    )
    src = opts.stations[0].source
    assert isinstance(src, NtripSource)
    assert src.gga_interval_s == 10
    assert math.isclose(src.lat_deg, 48.615, abs_tol=1e-3)
    assert math.isclose(src.lon_deg, 10.423, abs_tol=1e-3)


def test_options_refuse_gga_without_a_position() -> None:
    """options_from_settings raises ConfigError naming the key when a GGA upline has no position."""
    with pytest.raises(ConfigError, match=r"stations\[0\].ntrip_gga_interval_s"):
        options_from_settings(_settings(ntrip_gga_interval_s=10), environ={})


@pytest.mark.skipif(not DEMO.is_file(), reason="bundled demo capture not built yet")
def test_run_replays_a_capture_and_prints_a_station_summary(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`ionwarden run --config` replays a file source to its end, exits 0, prints real figures."""
    cap = tmp_path / "head.bin"
    cap.write_bytes(DEMO.read_bytes()[:150_000])  # the first ~100 epochs of the demo
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'[[stations]]\nname = "harc"\nsource = "file://{cap}?speed=0"\n'
        "[mqtt]\nenabled = false\n[prometheus]\nport = 0\n"
        f'[runtime]\nstate_dir = "{tmp_path / "state"}"\nsummary_interval_s = 60\n'
    )
    assert main(["run", "--config", str(cfg)]) == 0
    out = capsys.readouterr().out.strip().splitlines()
    assert out
    assert out[-1].startswith("harc")
    assert "finished" in out[-1]
    assert "VTEC" in out[-1]
    assert "epochs " in out[-1]
    assert (tmp_path / "state" / "checkpoint-harc.npz").is_file()


def test_run_rejects_a_config_without_stations(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`ionwarden run --config` exits 2 with one line when no station is configured."""
    cfg = tmp_path / "empty.toml"
    cfg.write_text("[mqtt]\nenabled = false\n")
    assert main(["run", "--config", str(cfg)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "no [[stations]]" in err[0]
