"""``ionwarden run``: the daemon (filled in by the runtime work)."""

from __future__ import annotations

from typing import TYPE_CHECKING

from ._common import die

if TYPE_CHECKING:
    import argparse

__all__ = ["add_parser", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "run",
        help="run the monitor (no config: replay the bundled demo)",
        description="Read each configured station's receiver stream, estimate the ionosphere live "
        "and publish to MQTT and Prometheus. Without --config, replays the bundled demo.",
    )
    p.add_argument("--config", help="TOML configuration file")


def run(args: argparse.Namespace) -> int:
    return die("run: not yet available in this build", 1)
