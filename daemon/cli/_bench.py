"""``ionwarden bench``: measure this machine with the package's own code and data."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import argparse

__all__ = ["add_parser", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "bench",
        help="measure decode and estimator throughput on this machine",
        description="Run the built-in benchmarks on this machine, on one core, with the bundled "
        "demo data: stream decode (MB/s, messages/s) and estimator (epochs/s). Use it on a "
        "Raspberry Pi to size how many stations one core can serve.",
    )
    p.add_argument(
        "--seconds", type=float, default=3.0, help="time budget per benchmark (default 3)"
    )


def run(args: argparse.Namespace) -> int:
    from ionwarden.daemon.bench import run_benchmarks  # noqa: PLC0415  (heavy; only when asked)

    return run_benchmarks(seconds=args.seconds)
