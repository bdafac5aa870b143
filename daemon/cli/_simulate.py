"""``ionwarden simulate``: the scenario simulator (filled in by the simulator work)."""

from __future__ import annotations

from typing import TYPE_CHECKING

from ._common import die

if TYPE_CHECKING:
    import argparse

__all__ = ["add_parser", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    sub.add_parser(
        "simulate",
        help="generate an invented scenario's receiver stream, RINEX and truth",
        description="Simulate GNSS observations for an invented site and ionospheric scenario.",
    )


def run(args: argparse.Namespace) -> int:
    return die("simulate: not yet available in this build", 1)
