"""``ionwarden config check|show``."""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from ionwarden.daemon.config import load_settings, redacted_dump
from ionwarden.daemon.errors import ConfigError

from ._common import die

if TYPE_CHECKING:
    import argparse

__all__ = ["add_parser", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "config",
        help="check or show a configuration",
        description="Validate a configuration file, or print the effective configuration "
        "(file → IONWARDEN_* environment → secrets directory) with secrets redacted.",
    )
    verbs = p.add_subparsers(dest="config_verb", required=True, metavar="{check,show}")
    check = verbs.add_parser(
        "check",
        help="validate FILE: exit 0, or exit 2 with one line naming the bad key",
        description="Validate FILE together with the environment and secrets. Prints 'FILE: ok' "
        "and exits 0, or prints one line such as \"stations[1].source: unknown scheme 'tpc'\" "
        "and exits 2.",
    )
    check.add_argument("file", type=Path, help="TOML configuration file")
    show = verbs.add_parser(
        "show",
        help="print the effective configuration as JSON, secrets redacted",
        description="Print the effective configuration (defaults filled in) as JSON. Secrets "
        "print as **********.",
    )
    show.add_argument("file", type=Path, nargs="?", help="TOML configuration file (optional)")


def run(args: argparse.Namespace) -> int:
    try:
        settings = load_settings(args.file)
    except ConfigError as exc:
        return die(f"config: {exc}")
    if args.config_verb == "check":
        n = len(settings.stations)
        print(f"{args.file}: ok ({n} station{'s' if n != 1 else ''})")
        return 0
    json.dump(redacted_dump(settings), sys.stdout, indent=2)
    sys.stdout.write("\n")
    return 0
