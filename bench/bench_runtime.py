"""Runtime cost: CPU per 1 Hz station through the full pipeline, many stations in one process, RSS.

    .venv/bin/python bench/bench_runtime.py [--stations 200] [--seconds 30]

1. Pipeline only (framer + MSM decode + estimator, no asyncio): CPU per epoch over the bundled demo
   capture, reported as % of one core for a 1 Hz station.
2. The real daemon (one root TaskGroup; per station a loopback TCP "receiver" pushing the demo at
   its real rate, or with --source file a paced file replay: one epoch per second per station): 20
   stations (RSS), then N stations (default 200) sustained for S seconds: process CPU % of one
   core, epochs delivered vs expected, queue peaks. The TCP receivers run in a child process, so
   the CPU and RSS figures are the daemon's alone (as on a reference station, where the receiver
   is another machine).
Figures depend on the machine and on other load (the dev machines are shared: say so when quoting).
"""

from __future__ import annotations

import argparse
import asyncio
import multiprocessing
import resource
import time
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.daemon.ingest import FileSource, TcpSource
from ionwarden.daemon.runtime import FramingCore, StationConfig
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle

if TYPE_CHECKING:
    from multiprocessing.connection import Connection

DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"


def rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def pipeline_only(data: bytes) -> None:
    core = FramingCore(consumer=StationPipeline("bench", EstimatorSettings()))
    chunk = 4096
    cells = []
    t0 = time.process_time()
    n = 0
    for i in range(0, len(data), chunk):
        for out in core.feed(data[i : i + chunk]):
            if isinstance(out, StationSnapshot):
                n += 1
                cells.append(out.cell_sat.size)
    dt = time.process_time() - t0
    print(
        f"[pipeline] demo capture: {len(data) / 1e6:.2f} MB, {n} epochs, "
        f"{np.mean(cells):.0f} cells/epoch (satellite x signal), {core.counts().frames_total} frames"
    )
    print(
        f"[pipeline] CPU {dt:.2f} s -> {1e3 * dt / n:.3f} ms/epoch "
        f"-> {100 * dt / n:.3f} % of one core per 1 Hz station "
        f"(~{90 / np.mean(cells) * 100 * dt / n:.3f} % scaled to 30 sats x 3 signals = 90 cells)"
    )


def factory(cfg: StationConfig) -> StationBundle:
    # as make_factory builds it
    pipe = StationPipeline(cfg.name, EstimatorSettings(), defer=True, slack=True)
    return StationBundle(core=FramingCore(consumer=pipe, defer=True), produces_epochs=True)


async def _receiver(data: bytes, writer: asyncio.StreamWriter, stop: asyncio.Event) -> None:
    """A loopback 'receiver' sending the demo at its real rate: 1/1200 of the capture per second."""
    step = len(data) // 1200
    try:
        for i in range(0, len(data), step):
            writer.write(data[i : i + step])
            await writer.drain()
            try:
                await asyncio.wait_for(stop.wait(), 1.0)
                return
            except TimeoutError:
                pass
    except ConnectionError:
        pass
    finally:
        writer.close()


async def _receivers_main(n: int, conn: Connection) -> None:
    """Child process: ``n`` loopback receivers; sends their ports, serves until told to stop."""
    data = DEMO.read_bytes()
    stop = asyncio.Event()
    servers = [
        await asyncio.start_server(lambda _r, w: _receiver(data, w, stop), "127.0.0.1", 0)
        for _ in range(n)
    ]
    conn.send([s.sockets[0].getsockname()[1] for s in servers])
    loop = asyncio.get_running_loop()
    await loop.run_in_executor(None, conn.recv)  # the parent's "stop"
    stop.set()
    for srv in servers:
        srv.close()
    await asyncio.sleep(0.2)  # let the receivers return


def _receivers_process(n: int, conn: Connection) -> None:
    asyncio.run(_receivers_main(n, conn))


async def fleet(n: int, seconds: float, source: str) -> tuple[float, float, int, int, int]:
    child: multiprocessing.Process | None = None
    parent_end: Connection | None = None
    if source == "tcp":
        parent_end, child_end = multiprocessing.Pipe()
        child = multiprocessing.get_context("spawn").Process(
            target=_receivers_process, args=(n, child_end), daemon=True
        )
        child.start()
        ports = parent_end.recv()
        sources = [TcpSource(host="127.0.0.1", port=port) for port in ports]
    else:
        sources = [FileSource(path=str(DEMO), speed=1.0) for _ in range(n)]
    stations = tuple(
        StationConfig(name=f"st{i:03d}", source=src, queue_size=64) for i, src in enumerate(sources)
    )
    daemon = Daemon(
        DaemonOptions(stations=stations, summary_interval_s=0, exit_when_sources_end=False),
        factory=factory,
    )
    async with asyncio.TaskGroup() as tg:
        tg.create_task(daemon.run(), name="bench.daemon")
        await daemon.ready.wait()
        await asyncio.sleep(3.0)  # warm-up: first ephemerides, first epochs
        e0 = sum(s.epochs_total for s in daemon.statistics())
        c0, w0 = time.process_time(), time.monotonic()
        await asyncio.sleep(seconds)
        cpu, wall = time.process_time() - c0, time.monotonic() - w0
        stats = daemon.statistics()
        daemon.request_stop()
    if child is not None and parent_end is not None:
        parent_end.send("stop")
        child.join(10)
    epochs = sum(s.epochs_total for s in stats) - e0
    peak = max(s.queue.peak for s in stats)
    drops = sum(s.queue.dropped_total for s in stats)
    return cpu, wall, epochs, peak, drops


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stations", type=int, default=200)
    ap.add_argument("--seconds", type=float, default=30.0)
    ap.add_argument(
        "--source",
        choices=("tcp", "file"),
        default="tcp",
        help="tcp: loopback receivers pushing the demo at 1 Hz (live-like); file: paced replays",
    )
    ap.add_argument(
        "--rss-seconds",
        type=float,
        default=15.0,
        help="length of the 20-station run (RSS); 330 or more fills every rolling window "
        "(5-min ROTI window) for the steady-state figure",
    )
    args = ap.parse_args()
    print(f"[daemon] RSS after imports, no station: {rss_mb():.0f} MB")
    for n, secs in ((20, args.rss_seconds), (args.stations, args.seconds)):
        cpu, wall, epochs, peak, drops = asyncio.run(fleet(n, secs, args.source))
        print(
            f"[daemon/{args.source}] {n} stations x 1 Hz for {wall:.1f} s: CPU {100 * cpu / wall:.1f} % of one core "
            f"({100 * cpu / wall / n:.3f} %/station), epochs {epochs} of ~{int(n * wall)} expected, "
            f"queue peak {peak}, drops {drops}, RSS now {rss_mb():.0f} MB, "
            f"peak RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB"
        )
    pipeline_only(DEMO.read_bytes())


if __name__ == "__main__":
    main()
