"""``ionwarden process``: batch processing of captures (filled in by the estimator work)."""

from __future__ import annotations

from typing import TYPE_CHECKING

from ._common import die

if TYPE_CHECKING:
    import argparse

__all__ = ["add_parser", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "process",
        help="process captures or RINEX files to per-satellite CSV/JSONL",
        description="Run the same streaming pipeline as the daemon over RTCM/NMEA captures or "
        "RINEX obs(+nav) files, as fast as possible, writing one row per epoch × satellite.",
    )
    p.add_argument("inputs", nargs="+", help="capture or RINEX observation files")


def run(args: argparse.Namespace) -> int:
    return die("process: not yet available in this build", 1)
