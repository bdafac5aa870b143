"""The command line: every subcommand has real help, and the safety note is on the front page."""

from __future__ import annotations

import json
import logging

import pytest

from ionwarden.daemon.cli import build_parser, main
from ionwarden.daemon.cli._common import SAFETY_LINE, configure_logging

SUBCOMMANDS = ["run", "process", "simulate", "config", "bench", "version"]


def test_cli_help_carries_safety_line(capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden --help` shows the one-line safety note and every subcommand."""
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert SAFETY_LINE.split(";")[0] in out.replace("\n", " ")
    for name in SUBCOMMANDS:
        assert name in out


@pytest.mark.parametrize("name", SUBCOMMANDS)
def test_cli_subcommand_help_is_real(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    """Each subcommand's --help exits 0 with a description, not a placeholder."""
    with pytest.raises(SystemExit) as exc:
        main([name, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: ionwarden " + name)
    assert len(out) > 120


def test_cli_config_subverbs_present() -> None:
    """`config` has the check and show verbs."""
    parser = build_parser()
    args = parser.parse_args(["config", "show"])
    assert args.config_verb == "show"
    assert parser.parse_args(["config", "check", "x.toml"]).config_verb == "check"


def test_cli_version_prints_version(capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden version` prints the installed version."""
    assert main(["version"]) == 0
    assert capsys.readouterr().out.startswith("ionwarden ")


def test_cli_config_show_is_json(capsys: pytest.CaptureFixture[str], monkeypatch) -> None:
    """`ionwarden config show` prints parseable JSON with every section."""
    monkeypatch.delenv("CREDENTIALS_DIRECTORY", raising=False)
    assert main(["config", "show"]) == 0
    dump = json.loads(capsys.readouterr().out)
    assert {"stations", "estimator", "alarms", "mqtt", "prometheus", "logging", "runtime"} <= set(
        dump
    )


def test_logging_json_format_one_object_per_line(capsys: pytest.CaptureFixture[str]) -> None:
    """configure_logging('json') writes one JSON object per record on stderr."""
    root = logging.getLogger()
    saved = root.handlers[:], root.level
    try:
        configure_logging("INFO", "json")
        logging.getLogger("ionwarden.test").info("hello %s", "world")
        line = capsys.readouterr().err.strip()
        record = json.loads(line)
        assert record["message"] == "hello world"
        assert record["level"] == "info"
        assert record["logger"] == "ionwarden.test"
        assert record["time"].endswith("Z")
    finally:
        root.handlers[:], level = saved
        root.setLevel(level)


@pytest.mark.slow
def test_cli_bench_prints_measured_figures(capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden bench` measures decode and pipeline throughput on the bundled demo."""
    assert main(["bench", "--seconds", "0.01"]) == 0
    out = capsys.readouterr().out
    assert "decode" in out
    assert "pipeline" in out
    assert "epochs/s" in out
