"""``ionwarden run``: the daemon. Without ``--config`` it replays the bundled demo capture."""

from __future__ import annotations

import argparse
import asyncio
import sys
from dataclasses import replace
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

from ionwarden.daemon.errors import ConfigError, OutputError

from ._common import SAFETY_LINE, apply_logging_settings, config_path, die, load_or_die

if TYPE_CHECKING:
    from ionwarden.daemon.config import Settings

__all__ = ["add_parser", "demo_capture", "run"]


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "run",
        help="run the monitor (no config: replay the bundled demo)",
        description="Read each configured station's receiver stream, estimate the ionosphere live "
        "and publish to MQTT and Prometheus. Without --config, replays the bundled demo capture "
        "accelerated, with MQTT and the exporter off, printing a summary line per station. "
        "Under systemd (Type=notify) it reports readiness, health and watchdog pings; SIGHUP "
        "reloads the config, SIGTERM stops gracefully. With [runtime] workers = N > 1, N worker "
        "processes share the stations (for many stations on a multi-core machine); this process "
        "then serves the exporter, the daemon's MQTT status and health, and systemd for all.",
        epilog=SAFETY_LINE,
    )
    p.add_argument("--config", help="TOML configuration file")
    p.add_argument(
        "--speed",
        type=float,
        default=None,
        help="demo replay speed, x real time (0 = as fast as possible; default: [runtime] demo_speed)",
    )
    p.add_argument(
        "--summary-every",
        type=float,
        default=None,
        metavar="SECONDS",
        help="seconds between summary lines (0 = none; default: [runtime] summary_interval_s)",
    )
    # a worker process of [runtime] workers > 1: the descriptor of its link to the main process
    p.add_argument("--worker-link", type=int, default=None, help=argparse.SUPPRESS)


def demo_capture() -> Path | None:
    """The bundled demo capture, when this build has it."""
    path = Path(str(resources.files("ionwarden.daemon") / "data" / "demo.bin"))
    return path if path.is_file() else None


def _demo_settings(base: Settings, speed: float) -> Settings | str:
    demo = demo_capture()
    if demo is None:
        return (
            "run: the bundled demo capture (ionwarden/daemon/data/demo.bin) is missing from this "
            "build; pass --config FILE with your own stations"
        )
    data = base.model_dump()
    data["stations"] = [{"name": "demo", "source": f"file://{demo}?speed={speed:g}"}]
    data["mqtt"] = {**data["mqtt"], "enabled": False}
    data["prometheus"] = {**data["prometheus"], "enabled": False}
    return type(base).model_validate(data)


def _print_line(line: str) -> None:
    print(line, flush=True)


async def _serve(
    settings: Settings, path: Path | None, summary_every: float | None, *, demo: bool = False
) -> int:
    from ionwarden.daemon.outputs import MqttPublisher  # noqa: PLC0415
    from ionwarden.daemon.runtime import SdNotifier  # noqa: PLC0415
    from ionwarden.daemon.runtime._app import (  # noqa: PLC0415
        daemon_from_settings,
        exporter_from_settings,
        options_from_settings,
    )

    loop = asyncio.get_running_loop()
    options = options_from_settings(settings)
    if summary_every is not None:
        options = replace(options, summary_interval_s=summary_every)
    if demo:  # a demo replay leaves no state behind
        options = replace(options, state_dir=None)
    publisher = MqttPublisher(settings.mqtt, monotonic=loop.time) if settings.mqtt.enabled else None
    daemon = daemon_from_settings(
        settings,
        path,
        options,
        notifier=SdNotifier(),
        exporter=exporter_from_settings(settings, loop.time),
        publisher=publisher,
        started_s=loop.time(),
        summary=_print_line,
    )
    return await daemon.run()


async def _main(settings: Settings, path: Path | None, args: argparse.Namespace) -> int:
    """One process, the main process of several workers, or one of those workers."""
    from ._workers import serve_pool, serve_worker, worker_count  # noqa: PLC0415

    if args.worker_link is not None:
        if path is None:
            raise ConfigError("--worker-link", "a worker needs --config")
        return await serve_worker(settings, path, args.worker_link, args.summary_every)
    if path is not None and worker_count(settings, path) > 1:
        return await serve_pool(settings, path, args)
    return await _serve(settings, path, args.summary_every, demo=path is None)


def run(args: argparse.Namespace) -> int:
    path = config_path(args)
    settings = load_or_die(path)
    if settings is None:
        return 2
    apply_logging_settings(args, settings)
    if path is None:
        speed = settings.runtime.demo_speed if args.speed is None else args.speed
        if speed < 0:
            return die("run: --speed must be >= 0")
        demo = _demo_settings(settings, speed)
        if isinstance(demo, str):
            return die(demo)
        settings = demo
        print(
            f"ionwarden: replaying the bundled demo at {speed:g}x (MQTT and exporter off); "
            "Ctrl-C stops",
            file=sys.stderr,
        )
    elif not settings.stations:
        return die(f"run: {path}: no [[stations]] configured")
    try:
        return asyncio.run(_main(settings, path, args))
    except ConfigError as exc:
        return die(f"config: {exc}")
    except OutputError as exc:
        return die(f"run: {exc}", 1)
    except ExceptionGroup as group:  # from the root TaskGroup: one line when it is one of ours
        ours = group.subgroup(lambda e: isinstance(e, OutputError | ConfigError))
        if ours is not group:  # subgroup() returns the group itself when every leaf matched
            raise
        return die(f"run: {group.exceptions[0]}", 1)
