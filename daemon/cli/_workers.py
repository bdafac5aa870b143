"""``ionwarden run`` with ``[runtime] workers`` > 1: the main process, and each worker's own run.

The main process (``serve_pool``) is a ``runtime._pool.WorkerPool``: it starts each worker as
``python -m ionwarden.daemon.cli [log options] run --config FILE --worker-link FD``, FD being the
worker's end of a socket pair (``runtime/_link.py``). A worker (``serve_worker``) is the
one-process daemon for the stations it is assigned over that link: its snapshots and epoch
latencies go to the main process's exporter, its systemd notifications to the main process, and
its MQTT connection publishes only its stations' topics (the main process's publishes the daemon's
status, with the last will, and the health message).
"""

from __future__ import annotations

import asyncio
import logging
import socket
import sys
from dataclasses import replace
from typing import TYPE_CHECKING

from ionwarden.daemon.errors import ConfigError

from ._common import tag_worker_logs

if TYPE_CHECKING:
    import argparse
    from pathlib import Path

    from ionwarden.daemon.config import MqttSettings, Settings

__all__ = ["serve_pool", "serve_worker", "worker_count"]

log = logging.getLogger("ionwarden.daemon.runtime.workers")


def worker_count(settings: Settings, path: Path | None) -> int:
    """Workers this run uses: ``[runtime] workers``, at most one per enabled station, and 1 when
    there is no configuration file for the workers to read (the bundled demo)."""
    enabled = sum(1 for st in settings.stations if st.enabled)
    return 1 if path is None else max(1, min(settings.runtime.workers, enabled))


def _worker_command(args: argparse.Namespace, path: Path) -> list[str]:
    cmd = [sys.executable, "-m", "ionwarden.daemon.cli"]
    if getattr(args, "log_level", None):
        cmd += ["--log-level", args.log_level]
    if getattr(args, "log_format", None):
        cmd += ["--log-format", args.log_format]
    cmd += ["run", "--config", str(path.resolve())]
    if args.summary_every is not None:
        cmd += ["--summary-every", f"{args.summary_every:g}"]
    return cmd


def _enabled_names(settings: Settings) -> tuple[str, ...]:
    return tuple(st.name for st in settings.stations if st.enabled)


async def serve_pool(settings: Settings, path: Path, args: argparse.Namespace) -> int:
    """The main process: exporter, daemon status and health, systemd, and the workers."""
    from ionwarden.daemon.config import load_settings  # noqa: PLC0415
    from ionwarden.daemon.outputs import MqttPublisher  # noqa: PLC0415
    from ionwarden.daemon.runtime import SdNotifier  # noqa: PLC0415
    from ionwarden.daemon.runtime._app import exporter_from_settings  # noqa: PLC0415
    from ionwarden.daemon.runtime._pool import WorkerPool  # noqa: PLC0415

    loop = asyncio.get_running_loop()
    exporter = exporter_from_settings(settings, loop.time)
    publisher = MqttPublisher(settings.mqtt, monotonic=loop.time) if settings.mqtt.enabled else None
    base = _worker_command(args, path)
    workers = worker_count(settings, path)

    def reload() -> tuple[str, ...]:
        fresh = load_settings(path)
        if fresh.runtime.workers != settings.runtime.workers:
            log.warning("reload: [runtime] workers changed; it takes effect at the next start")
        return _enabled_names(fresh)

    pool = WorkerPool(
        _enabled_names(settings),
        workers=workers,
        command=lambda fd: [*base, "--worker-link", str(fd)],
        exporter=exporter,
        publisher=publisher,
        notifier=SdNotifier(),
        reload=reload,
        started_s=loop.time(),
        stop_timeout_s=settings.runtime.stop_timeout_s,
    )
    return await pool.run()


def _worker_mqtt(settings: MqttSettings, index: int) -> MqttSettings:
    """A worker's MQTT settings: a configured client id gets ``-w<index>`` (two connections with
    one client id would take the session from each other, MQTT 5.0 §3.1.4)."""
    if not settings.client_id:
        return settings
    return settings.model_copy(update={"client_id": f"{settings.client_id}-w{index}"})


async def serve_worker(settings: Settings, path: Path, fd: int, summary_every: float | None) -> int:
    """One worker: the stations the main process assigns over the link ``fd``."""
    from ionwarden.daemon.outputs import MqttPublisher  # noqa: PLC0415
    from ionwarden.daemon.runtime._app import (  # noqa: PLC0415
        daemon_from_settings,
        options_from_settings,
    )
    from ionwarden.daemon.runtime._link import (  # noqa: PLC0415
        Assign,
        Link,
        LinkNotifier,
        LinkSink,
    )

    loop = asyncio.get_running_loop()
    link = await Link.open(socket.socket(fileno=fd))
    first = await link.receive()
    if not isinstance(first, Assign):
        raise ConfigError("--worker-link", "no station assignment from the main process")
    index = first.worker
    tag_worker_logs(index)
    names = {"now": frozenset(first.stations)}
    options = options_from_settings(settings)
    if summary_every is not None:
        options = replace(options, summary_interval_s=summary_every)
    publisher = (
        MqttPublisher(_worker_mqtt(settings.mqtt, index), monotonic=loop.time, daemon_status=False)
        if settings.mqtt.enabled
        else None
    )
    daemon = daemon_from_settings(
        settings,
        path,
        options,
        notifier=LinkNotifier(link),
        exporter=LinkSink(link, per_satellite=settings.prometheus.per_satellite),
        publisher=publisher,
        started_s=loop.time(),
        summary=lambda line: print(line, flush=True),
        only=lambda: names["now"],
    )
    log.info("stations %s", ", ".join(c.name for c in daemon.options.stations) or "none")

    async def listen() -> None:
        while (message := await link.receive()) is not None:
            if isinstance(message, Assign):
                names["now"] = frozenset(message.stations)
                daemon.request_reload()
        log.error("worker: the main process is gone; stopping")
        daemon.request_stop()

    try:
        async with asyncio.TaskGroup() as tg:
            listener = tg.create_task(listen(), name="daemon.link[main]")
            try:
                return await daemon.run()
            finally:
                listener.cancel()
    finally:
        await link.drain()
        link.close()
