"""``ionwarden process`` end to end on the real files (read in place from ../shared/data/real)."""

from __future__ import annotations

import csv
import json

import pytest

from ionwarden.daemon.cli import main
from ionwarden.daemon.cli._process import COLUMNS, SUMMARY_COLUMNS

P433 = "rinex/P43300USA_R_20190012056_17M_15S_MO.rnx"


def test_process_rinex_with_nav_writes_exact_columns(real_data, tmp_path, capsys):
    """process writes issue 6's exact columns for P433 + brdc0010.19n, one row per epoch × satellite."""
    out = tmp_path / "p433.csv"
    summary = tmp_path / "sum.csv"
    rc = main(["process", str(real_data / P433), "--nav", str(real_data / "rinex/brdc0010.19n"),
               "--out", str(out), "--summary", str(summary), "--no-progress"])  # fmt: skip
    assert rc == 0
    with out.open() as f:
        rows = list(csv.DictReader(f))
    assert tuple(rows[0].keys()) == COLUMNS
    assert (
        rows[0]["time_utc"] == "2019-01-01T20:56:27.000Z"
    )  # first epoch 20:56:45 GPS − 18 s (PROVENANCE.md)
    assert rows[0]["station"] == "P43300USA"
    assert {r["sat"][0] for r in rows} >= {"G", "E", "R", "C"}  # PROVENANCE.md systems
    gps = [r for r in rows if r["sat"].startswith("G") and r["pair"]]
    assert all(r["el_deg"] and r["vtec_tecu"] for r in gps)  # GPS orbits from the nav file
    galileo = [r for r in rows if r["sat"].startswith("E")]
    assert all(r["el_deg"] == "" for r in galileo)  # no Galileo nav: no elevation, left empty
    with summary.open() as f:
        srows = list(csv.DictReader(f))
    assert tuple(srows[0].keys()) == SUMMARY_COLUMNS
    assert len(srows) == 70  # PROVENANCE.md: 70 epochs


def test_process_rtcm_capture_to_jsonl(real_data, tmp_path):
    """process reads an RTCM capture and writes JSON Lines with nulls for unknowns (pygnssutils_ntrip_encode_none.bin)."""
    out = tmp_path / "x.jsonl"
    rc = main(["process", str(real_data / "rtcm/pygnssutils_ntrip_encode_none.bin"), "--out", str(out),
               "--station", "UK1", "--no-progress"])  # fmt: skip
    assert rc == 0
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    assert tuple(rows[0]) == COLUMNS
    assert rows[0]["station"] == "UK1"
    assert rows[0]["rot_tecu_per_min"] is None  # no 30 s history yet
    assert isinstance(rows[0]["slip"], bool)
    assert {r["gps_week"] for r in rows} == {2328}  # PROVENANCE.md: week 2328


def test_process_missing_input_is_one_line_error(tmp_path, capsys):
    """process names a missing input file in one line and exits 2."""
    rc = main(["process", str(tmp_path / "nope.rnx"), "--out", str(tmp_path / "o.csv")])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "nope.rnx" in err[0]


def test_process_garbage_input_reports_no_epochs(tmp_path, capsys):
    """process exits 1 with one line when a file holds no decodable epochs."""
    junk = tmp_path / "junk.bin"
    junk.write_bytes(bytes(range(256)) * 50)
    rc = main(["process", str(junk), "--out", str(tmp_path / "o.csv"), "--no-progress"])
    assert rc == 1
    assert "no epochs" in capsys.readouterr().err


@pytest.mark.parametrize("bad", ["1,2", "a,b,c"])
def test_process_bad_position_rejected(real_data, tmp_path, capsys, bad):
    """process rejects a malformed --position with a one-line error naming the option."""
    rc = main(
        ["process", str(real_data / P433), "--out", str(tmp_path / "o.csv"), "--position", bad]
    )
    assert rc == 2
    assert "--position" in capsys.readouterr().err


def test_process_uses_config_estimator_section(real_data, tmp_path):
    """process applies [estimator] from --config (an 89° mask: no station VTEC from lower satellites)."""
    cfg = tmp_path / "c.toml"
    cfg.write_text("[estimator]\nelevation_mask_deg = 89.0\n")
    out = tmp_path / "o.csv"
    summary = tmp_path / "s.csv"
    rc = main(["process", str(real_data / P433), "--nav", str(real_data / "rinex/brdc0010.19n"),
               "--out", str(out), "--summary", str(summary), "--config", str(cfg), "--no-progress"])  # fmt: skip
    assert rc == 0
    with summary.open() as f:
        srows = list(csv.DictReader(f))
    assert all(r["vtec_tecu"] == "" for r in srows)  # nothing above 89°


def test_process_streams_rinex_lines(real_data, monkeypatch):
    """process yields the first epoch's snapshot after reading only the first lines of a RINEX file (P433; never the whole file)."""
    from contextlib import contextmanager

    from ionwarden.daemon.cli import _process
    from ionwarden.daemon.estimator import StationPipeline

    real_open = _process.open_rinex_text
    read = [0]

    @contextmanager
    def counting_open(path):
        with real_open(path) as lines:

            def counted():
                for line in lines:
                    read[0] += 1
                    yield line

            yield counted()

    monkeypatch.setattr(_process, "open_rinex_text", counting_open)
    path = real_data / P433
    total = path.read_bytes().count(b"\n")
    snaps = _process._epochs_from(
        path, StationPipeline("P433"), _process._Progress(0, enabled=False), [0]
    )
    next(snaps)
    assert read[0] < total // 10  # one epoch of 70 (PROVENANCE.md) plus the header
    snaps.close()
