"""The ``ionwarden`` command line: one entry point, one module per subcommand.

Each subcommand module exposes ``add_parser(subparsers)`` and ``run(args) -> int``. Logging is
configured here and nowhere else (STYLE rule 11).
"""

from __future__ import annotations

import argparse
import sys
from importlib import import_module
from typing import TYPE_CHECKING

from ._common import SAFETY_LINE, configure_logging

if TYPE_CHECKING:
    from collections.abc import Callable, Sequence

__all__ = ["build_parser", "main"]

#: Subcommand modules, in the order --help lists them.
_COMMANDS = ("_run", "_process", "_simulate", "_config", "_bench", "_version")


def _version_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    sub.add_parser(
        "version",
        help="print the version",
        description="Print ionwarden's version, and the Python and library versions it runs "
        "with (useful in bug reports).",
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="ionwarden",
        description="Watch the ionosphere through a GNSS receiver's own measurements and warn "
        "when it hurts positioning: slant/vertical TEC, ROT/ROTI, gradients and iono-free "
        "ranges from NMEA + RTCM 3 streams or RINEX files, published to MQTT and Prometheus.",
        epilog=SAFETY_LINE
        + "\n\nStart with 'ionwarden run' (no config: replays the bundled demo), then "
        "'ionwarden config check FILE' for your own stations. 'ionwarden COMMAND --help' "
        "explains each command.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--log-level",
        default=None,
        choices=("DEBUG", "INFO", "WARNING", "ERROR"),
        help="log verbosity (default: [logging] level, else INFO)",
    )
    parser.add_argument(
        "--log-format",
        default=None,
        choices=("text", "json"),
        help="log line format: text or json (one object per line, for log shippers); default: [logging] format, else text",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in _COMMANDS:
        if name == "_version":
            _version_parser(sub)
            continue
        module = import_module(f"{__name__}.{name}")
        module.add_parser(sub)
    return parser


def _runner(command: str) -> Callable[[argparse.Namespace], int]:
    if command == "version":
        return _print_version
    module = import_module(f"{__name__}._{command}")
    runner: Callable[[argparse.Namespace], int] = module.run
    return runner


def _print_version(_args: argparse.Namespace) -> int:
    from importlib.metadata import PackageNotFoundError, version  # noqa: PLC0415

    def _v(name: str) -> str:
        try:
            return version(name)
        except PackageNotFoundError:
            return "not installed"

    print(f"ionwarden {_v('ionwarden')}")
    libs = ", ".join(
        f"{lib} {_v(lib)}" for lib in ("numpy", "pynmeagps", "aiomqtt", "prometheus-client")
    )
    print(f"python {sys.version.split()[0]}; {libs}")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    configure_logging(args.log_level or "INFO", args.log_format or "text")
    try:
        return _runner(args.command)(args)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # `ionwarden process … | head`
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    sys.exit(main())
