"""``ionwarden process``: run the daemon's streaming pipeline over files, as fast as possible.

Inputs are RTCM 3 / NMEA captures (any mix, as a receiver sends them) or RINEX 3 observation files
(plain, .gz, .bz2, Hatanaka), plus optional RINEX navigation files (``--nav``). Every epoch goes
through the same :class:`StationPipeline` the daemon uses. Output: one row per epoch × satellite
(CSV or JSON Lines, columns :data:`COLUMNS`), and with ``--summary`` one row per epoch
(:data:`SUMMARY_COLUMNS`). Unknown values are empty (CSV) or null (JSONL).
"""

from __future__ import annotations

import itertools
import json
import math
import sys
import time
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.errors import DaemonError, ParseError
from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.parsers import RinexObsParser, iter_rinex_nav, open_rinex_text, sat_name

from ._common import config_path, die, load_or_die

if TYPE_CHECKING:
    import argparse
    from collections.abc import Iterator

__all__ = ["COLUMNS", "SUMMARY_COLUMNS", "add_parser", "run", "snapshot_rows", "summary_row"]

COLUMNS = (
    "time_utc", "gps_week", "gps_tow_s", "station", "sat", "pair", "el_deg", "az_deg",
    "ipp_lat_deg", "ipp_lon_deg", "stec_tecu", "vtec_tecu", "rot_tecu_per_min",
    "roti_tecu_per_min", "iono_l1_m", "if_code_m", "if_phase_m", "if_code_smoothed_m", "slip",
    "arc_id",
)  # fmt: skip
SUMMARY_COLUMNS = (
    "time_utc", "station", "n_sats", "vtec_tecu", "roti_max_tecu_per_min",
    "roti_median_tecu_per_min", "gradient_mm_per_km", "dual_freq_fraction",
)  # fmt: skip
#: (snapshot field, decimals) of the numeric per-satellite columns, in COLUMNS order.
_SAT_FIELDS = (
    ("el_deg", 2), ("az_deg", 2), ("ipp_lat_deg", 4), ("ipp_lon_deg", 4), ("stec_tecu", 3),
    ("vtec_tecu", 3), ("rot_tecu_per_min", 4), ("roti_tecu_per_min", 4), ("iono_l1_m", 4),
    ("if_code_m", 3), ("if_phase_m", 3), ("if_code_smoothed_m", 3),
)  # fmt: skip
_CHUNK = 1 << 16
_PROGRESS_EVERY_S = 1.0
#: Inputs at least this large (or runs longer than _PROGRESS_AFTER_S) get a progress line.
_PROGRESS_MIN_BYTES = 2_000_000
_PROGRESS_AFTER_S = 2.0
_RINEX_MARK = b"RINEX VERSION / TYPE"
#: Broadcast sets kept per satellite: a whole day's navigation file is loaded up front.
_EPHEMERIDES_PER_SAT = 400


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "process",
        help="process captures or RINEX files to per-satellite CSV/JSONL",
        description="Run the same streaming pipeline as the daemon over RTCM/NMEA captures or "
        "RINEX obs(+nav) files, as fast as possible, writing one row per epoch × satellite.",
    )
    p.add_argument(
        "inputs",
        nargs="+",
        metavar="INPUT",
        help="capture (RTCM 3 / NMEA bytes) or RINEX 3 observation file",
    )
    p.add_argument(
        "--nav",
        action="append",
        default=[],
        metavar="FILE",
        help="RINEX navigation file (repeatable)",
    )
    p.add_argument(
        "--station",
        metavar="NAME",
        help="station name in the output (default: from the first input's name)",
    )
    p.add_argument(
        "--out", required=True, metavar="FILE", help="per-satellite output file ('-' for stdout)"
    )
    p.add_argument(
        "--format",
        choices=("csv", "jsonl"),
        help="output format (default: from --out's suffix, else csv)",
    )
    p.add_argument("--summary", metavar="FILE", help="also write one station row per epoch here")
    p.add_argument(
        "--config", metavar="FILE", help="TOML configuration; its [estimator] section is used"
    )
    p.add_argument(
        "--position",
        metavar="X,Y,Z",
        help="receiver ECEF position in metres (overrides the data's)",
    )
    p.add_argument("--no-progress", action="store_true", help="no progress line on stderr")


# -- formatting (pure) ---------------------------------------------------------------------------
def _iso(snap: StationSnapshot) -> str:
    utc = snap.time.to_utc()
    return utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z"


def snapshot_rows(snap: StationSnapshot, fmt: str) -> list[str]:
    """Output lines (without newline) of one snapshot, one per satellite."""
    s = snap.satellites
    head = (_iso(snap), str(snap.time.week), f"{snap.time.tow_s:.3f}", snap.station)
    cols = [getattr(s, name).tolist() for name, _ in _SAT_FIELDS]
    decimals = [d for _, d in _SAT_FIELDS]
    slips = s.slip.tolist()
    arcs = s.arc_id.tolist()
    lines = []
    for i, sat in enumerate(s.sat.tolist()):
        values = [c[i] for c in cols]
        if fmt == "csv":
            nums = [
                "" if math.isnan(v) else f"{v:.{d}f}" for v, d in zip(values, decimals, strict=True)
            ]
            arc = "" if arcs[i] < 0 else str(arcs[i])
            lines.append(
                ",".join((*head, sat_name(sat), s.pair[i], *nums, "1" if slips[i] else "0", arc))
            )
        else:
            row: dict[str, Any] = dict(
                zip(
                    COLUMNS[:4],
                    (head[0], snap.time.week, round(snap.time.tow_s, 3), head[3]),
                    strict=True,
                )
            )
            row["sat"] = sat_name(sat)
            row["pair"] = s.pair[i]
            for (name, d), v in zip(_SAT_FIELDS, values, strict=True):
                row[name] = None if math.isnan(v) else round(v, d)
            row["slip"] = bool(slips[i])
            row["arc_id"] = None if arcs[i] < 0 else arcs[i]
            lines.append(json.dumps(row, separators=(",", ":")))
    return lines


def summary_row(snap: StationSnapshot, fmt: str) -> str:
    values: list[Any] = [
        _iso(snap), snap.station, snap.n_sats, snap.vtec_tecu, snap.roti_max_tecu_per_min,
        snap.roti_median_tecu_per_min, snap.gradient_mm_per_km, snap.dual_freq_fraction,
    ]  # fmt: skip
    if fmt == "csv":
        return ",".join(
            ""
            if isinstance(v, float) and math.isnan(v)
            else (f"{v:.4f}" if isinstance(v, float) else str(v))
            for v in values
        )
    clean = [
        None
        if isinstance(v, float) and math.isnan(v)
        else (round(v, 4) if isinstance(v, float) else v)
        for v in values
    ]
    return json.dumps(dict(zip(SUMMARY_COLUMNS, clean, strict=True)), separators=(",", ":"))


# -- running -------------------------------------------------------------------------------------
class _Progress:
    """One progress line on stderr (rewritten in place on a terminal), wall-clock paced."""

    def __init__(self, total_bytes: int, enabled: bool) -> None:
        self.total = total_bytes
        self.enabled = enabled
        self.start = time.monotonic()
        self.last = self.start
        self.shown = False
        self.tty = sys.stderr.isatty()

    def update(self, done_bytes: int, epochs: int) -> None:
        now = time.monotonic()
        if not self.enabled or now - self.last < _PROGRESS_EVERY_S:
            return
        if self.total < _PROGRESS_MIN_BYTES and now - self.start < _PROGRESS_AFTER_S:
            return
        if not self.tty and now - self.last < 10 * _PROGRESS_EVERY_S:
            return
        self.last = now
        pct = f" {100.0 * done_bytes / self.total:5.1f}%" if self.total and done_bytes else ""
        rate = epochs / max(now - self.start, 1e-9)
        end = "\r" if self.tty else "\n"
        print(f"process:{pct} {epochs} epochs ({rate:.0f}/s)", end=end, file=sys.stderr, flush=True)
        self.shown = True

    def finish(self, epochs: int) -> None:
        dt = time.monotonic() - self.start
        if self.enabled and (self.shown or dt >= _PROGRESS_AFTER_S):
            end = "\n"
            print(
                f"process: {epochs} epochs in {dt:.1f} s ({epochs / max(dt, 1e-9):.0f}/s)",
                end=end,
                file=sys.stderr,
            )


def _is_rinex(path: Path) -> bool:
    name = path.name.lower()
    if name.endswith((".crx", ".crx.gz", ".crx.bz2", ".rnx", ".rnx.gz", ".rnx.bz2")) or (
        name[-3:-1].isdigit() and name[-1] in "od"
    ):
        return True
    with path.open("rb") as f:
        return _RINEX_MARK in f.read(200)


def _epochs_from(
    path: Path, pipeline: StationPipeline, progress: _Progress, count: list[int]
) -> Iterator[StationSnapshot]:
    if _is_rinex(path):
        parser = RinexObsParser()
        with open_rinex_text(path) as lines:
            positioned = False
            for line in itertools.chain(lines, ("",)):  # streamed: never the whole file
                for ep in parser.feed_line(line):
                    if (
                        not positioned
                        and parser.header is not None
                        and parser.header.approx_position_m
                    ):
                        pipeline.set_position(parser.header.approx_position_m, "rinex")
                        positioned = True
                    out = pipeline.handle_one(ep)
                    if isinstance(out, StationSnapshot):
                        count[0] += 1
                        progress.update(0, count[0])
                        yield out
        return
    done = 0
    with path.open("rb") as f:
        while chunk := f.read(_CHUNK):
            done += len(chunk)
            for out in pipeline.feed(chunk):
                if isinstance(out, StationSnapshot):
                    count[0] += 1
                    yield out
            progress.update(done, count[0])
    for out in pipeline.feed(b""):
        if isinstance(out, StationSnapshot):
            count[0] += 1
            yield out


def _open_out(name: str) -> IO[str]:
    return sys.stdout if name == "-" else open(name, "w", encoding="utf-8", newline="\n")


def run(args: argparse.Namespace) -> int:
    settings = EstimatorSettings()
    if args.config:
        loaded = load_or_die(config_path(args))
        if loaded is None:
            return 2
        settings = loaded.estimator
    inputs = [Path(p) for p in args.inputs]
    for p in [*inputs, *map(Path, args.nav)]:
        if not p.is_file():
            return die(f"process: no such file: {p}")
    fmt = args.format or ("jsonl" if str(args.out).endswith((".jsonl", ".json")) else "csv")
    station = args.station or inputs[0].name.split(".")[0].split("_")[0][:48] or "station"
    pipeline = StationPipeline(station, settings, ephemerides_per_sat=_EPHEMERIDES_PER_SAT)
    if args.position:
        try:
            xyz = [float(v) for v in args.position.split(",")]
            if len(xyz) != 3:
                raise ValueError
            pipeline.set_position(xyz, "config")
        except ValueError:
            return die(f"process: --position wants X,Y,Z in metres, got {args.position!r}")
    try:
        for nav in args.nav:
            for eph in iter_rinex_nav(nav):
                pipeline.handle_one(eph)
    except (ParseError, OSError) as exc:
        return die(f"process: {nav}: {exc}", 1)

    total = sum(p.stat().st_size for p in inputs)
    progress = _Progress(total, enabled=not args.no_progress)
    count = [0]
    try:
        out = _open_out(args.out)
        summary = _open_out(args.summary) if args.summary else None
    except OSError as exc:
        return die(f"process: cannot write output: {exc}")
    try:
        if fmt == "csv":
            out.write(",".join(COLUMNS) + "\n")
            if summary:
                summary.write(",".join(SUMMARY_COLUMNS) + "\n")
        for path in inputs:
            current = path
            for snap in _epochs_from(path, pipeline, progress, count):
                rows = snapshot_rows(snap, fmt)
                if rows:
                    out.write("\n".join(rows) + "\n")
                if summary:
                    summary.write(summary_row(snap, fmt) + "\n")
    except BrokenPipeError:
        raise  # `ionwarden process … --out - | head`: the CLI entry point handles it
    except (DaemonError, OSError, ValueError) as exc:
        return die(f"process: {current}: {exc}", 1)
    finally:
        progress.finish(count[0])
        for f in (out, summary):
            if f is not None and f is not sys.stdout:
                f.close()
    stats = pipeline.decoder.statistics()
    if stats.epochs_unresolved:
        die(f"process: {stats.epochs_unresolved} epochs dropped: their GPS week could not be resolved "
            "(no ephemeris or dated NMEA in the capture)", 0)  # fmt: skip
    if count[0] == 0:
        return die("process: no epochs with observations found in the input", 1)
    return 0
