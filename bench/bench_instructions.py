"""Instructions per station-second under callgrind: the A/B measure of issue 8's per-epoch work.

Wall-clock figures on the shared 2-core machines move by ±30% from one run to the next; instruction
counts repeat to ~0.1%, so a change to the per-epoch path is judged by them (then confirmed in wall
clock by ``bench_outputs.py`` / ``bench_e2e.py``). What is counted, per ``--what``:

* ``urgent`` — the step a station's bytes wait for: ``FramingCore.feed`` (framing, decoding,
  estimating) + handing the snapshot to its ``DeferredAlarms`` + the summary's formatting and
  queueing, as the daemon builds them (``defer``), on the simulator's invented quiet-day stream;
  the publisher is not connected;
* ``urgent-batched`` — ``urgent`` with each station's epoch held and the stations' epochs
  estimated as one tick (``[runtime] batch_estimates``: ``FramingCore.hold_epochs``, then
  ``TickBatch.run`` and ``StationPipeline.finish_epoch``), as the daemon's burst tick runs them;
* ``urgent-mqtt`` — the same with the publisher connected to the broker (IONWARDEN_TEST_MQTT_HOST /
  _PORT, default 127.0.0.1:1883), up to every PUBACK of the second read and settled;
* ``settle`` — the deferred part of each second, run after every station's urgent step
  (``FramingCore.settle``, then ``DeferredAlarms.settle``: the alarms' ``observe_snapshot``, the
  publishing of its transitions and ``StationAlarms.settle``). As before, the fixes the core's
  settle decodes are not handed to the alarms (not counted);
* ``runtime`` — the daemon's own machinery around a step: the real ``Daemon`` (StepLane, TCP
  ingest with stall detection, epoch-latency histogram, 1 Hz status tick with the exporter's
  snapshot) with a stand-in core that hands out a ready-made snapshot per chunk (no decoding,
  estimating, alarms or MQTT); its TCP "receivers" send every station's chunk at the same instant
  each second from a child process, which is not counted.

The script runs itself under ``valgrind --tool=callgrind --collect-atstart=no`` (with
``OPENBLAS_NUM_THREADS=1`` and ``PYTHONHASHSEED=0``) and switches collection on only around the
counted calls, through ``CALLGRIND_TOGGLE_COLLECT`` in a three-line C helper it compiles with
``cc`` against valgrind's ``callgrind.h`` (Debian: package ``valgrind``). The first two seconds are
not counted (caches, first arcs), or ``--warm-up S`` seconds. Mind the phase: in seconds 3-10 of the
stream arcs still restart and ROT/ROTI are empty, so the default measures the start-up; the steady
state a station runs in for months needs ``--warm-up 330`` (past the 5-min ROTI window; slow under
valgrind: use 2 stations). Printed: the total, the station-seconds counted, their ratio.

Usage: .venv/bin/python bench/bench_instructions.py [--what urgent] [--stations 20] [--seconds 8]
           [--warm-up S]
A/B: ``PYTHONPATH=DIR`` with ``DIR/ionwarden/{daemon,parsers}`` linking to another checkout (e.g.
``git worktree add``) measures that code; run both under the same options.
"""

from __future__ import annotations

import argparse
import asyncio
import ctypes
import multiprocessing
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
_TOGGLE_C = (
    "#include <valgrind/callgrind.h>\nvoid iw_cg_toggle(void) { CALLGRIND_TOGGLE_COLLECT; }\n"
)
WARM_UP_S = 2


def _toggle_lib(workdir: Path) -> Path:
    src, lib = workdir / "toggle.c", workdir / "libiwcgtoggle.so"
    src.write_text(_TOGGLE_C)
    subprocess.run(["cc", "-O2", "-shared", "-fPIC", "-o", str(lib), str(src)], check=True)
    return lib


def _parent(args: argparse.Namespace) -> int:
    for tool in ("valgrind", "callgrind_annotate", "cc"):
        if shutil.which(tool) is None:
            print(f"bench_instructions: needs {tool!r} on PATH (Debian: valgrind, gcc)")
            return 1
    if not Path("/usr/include/valgrind/callgrind.h").is_file():
        print("bench_instructions: needs valgrind's headers (/usr/include/valgrind/callgrind.h)")
        return 1
    with tempfile.TemporaryDirectory(prefix="iw-instr-") as tmp:
        work = Path(tmp)
        lib = _toggle_lib(work)
        out = work / "callgrind.out"
        env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "PYTHONHASHSEED": "0"}
        cmd = [
            "valgrind", "--tool=callgrind", "--collect-atstart=no",
            f"--callgrind-out-file={out}", sys.executable, __file__, "--child", str(lib),
            "--what", args.what, "--stations", str(args.stations), "--seconds", str(args.seconds),
            "--warm-up", str(args.warm_up),
        ]  # fmt: skip
        run = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
        counted = re.search(r"^counted station-seconds (\d+)$", run.stdout, re.MULTILINE)
        if run.returncode != 0 or counted is None or not out.is_file():
            print(run.stdout[-2000:], run.stderr[-3000:], sep="\n")
            print(f"bench_instructions: the measured run failed (exit {run.returncode})")
            return 1
        ann = subprocess.run(
            ["callgrind_annotate", str(out)], capture_output=True, text=True, check=True
        ).stdout
        total_m = re.search(r"^\s*([\d,]+) \(100\.0%\)\s+PROGRAM TOTALS", ann, re.MULTILINE)
        assert total_m is not None, ann[:2000]
        total = int(total_m.group(1).replace(",", ""))
        n = int(counted.group(1))
        print(
            f"{args.what}: {total:,} instructions over {n} station-seconds "
            f"({args.stations} stations x {n // max(args.stations, 1)} s counted) "
            f"= {total / n / 1e3:,.1f}k per station-second"
        )
    return 0


# -- the measured child (under valgrind) ----------------------------------------------------------
async def _pipeline(lib: Any, what: str, n: int, secs: int, warm_up: int) -> int:
    sys.path.insert(0, str(HERE))
    from bench_outputs import _replayed_stations

    from ionwarden.daemon.config import MqttSettings
    from ionwarden.daemon.estimator import StationSnapshot
    from ionwarden.daemon.estimator._tick import TickBatch
    from ionwarden.daemon.outputs import MqttPublisher
    from ionwarden.daemon.runtime._deferred_alarms import DeferredAlarms

    chunks, pipes, engines = _replayed_stations(secs + warm_up, n)
    mqtt = what == "urgent-mqtt"
    tick = TickBatch() if what == "urgent-batched" else None
    if tick is not None:
        for p in pipes:
            p.hold_epochs()
    host = os.environ.get("IONWARDEN_TEST_MQTT_HOST", "127.0.0.1")
    port = int(os.environ.get("IONWARDEN_TEST_MQTT_PORT", "1883"))
    pub = MqttPublisher(MqttSettings(host=host, port=port, topic_prefix=f"iwinstr/{os.getpid()}"))
    task = asyncio.create_task(pub.run()) if mqtt else None
    if mqtt:
        await asyncio.wait_for(pub.wait_connected(), 60)
    # as the daemon runs them: evaluated in the station's settle, after its summary went out
    alarms = [DeferredAlarms(e, pub) for e in engines]
    urgent, counted = what != "settle", 0
    for k, chunk in enumerate(chunks[1:]):
        on = k >= warm_up
        counted += n if on else 0
        if on and urgent:
            lib.iw_cg_toggle()
        for i in range(n):
            for out in pipes[i].feed(chunk):
                if isinstance(out, StationSnapshot):
                    alarms[i].defer(out)
                    pub.publish_snapshot_nowait(out)
        if tick is not None:  # the held epochs as one tick, each snapshot handed back
            cons: list[Any] = [p.consumer for p in pipes]
            held = [(i, c.take_held()) for i, c in enumerate(cons) if c.holding]
            snaps = tick.run([(cons[i].estimator, e) for i, e in held])
            for (i, e), snap in zip(held, snaps, strict=True):
                assert isinstance(snap, StationSnapshot), snap
                out = cons[i].finish_epoch(e, snap)
                alarms[i].defer(out)
                pub.publish_snapshot_nowait(out)
        if mqtt:
            await asyncio.wait_for(pub.wait_drained(), 60)
        if on:
            lib.iw_cg_toggle()  # off after the urgent steps, or on for the settle
        for i in range(n):
            pipes[i].settle()
            alarms[i].settle()
        if on and not urgent:
            lib.iw_cg_toggle()
    if task is not None:
        pub.stop()
        await task
    return counted


async def _receivers(n: int, conn: Any, chunk: bytes, secs: int) -> None:
    writers: list[asyncio.StreamWriter] = []
    all_in = asyncio.Event()

    def accepted(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        writers.append(w)
        if len(writers) == n:
            all_in.set()

    servers = [await asyncio.start_server(accepted, "127.0.0.1", 0) for _ in range(n)]
    conn.send([s.sockets[0].getsockname()[1] for s in servers])
    await all_in.wait()
    loop = asyncio.get_running_loop()
    t0 = loop.time() + 1.0
    for s in range(secs + WARM_UP_S + 10):
        await asyncio.sleep(max(0.0, t0 + s - loop.time()))
        for w in writers:  # every station at the same instant
            w.write(chunk)


def _receivers_process(n: int, conn: Any, chunk: bytes, secs: int) -> None:
    asyncio.run(_receivers(n, conn, chunk, secs))


class _ReadyMadeCore:
    """A station core handing out the same real snapshot for every chunk, with a deferred part
    to settle after each (as the real core has): the runtime's cost without the pipeline's."""

    def __init__(self, snap: object) -> None:
        from ionwarden.daemon.runtime import FramingCore

        self._snap, self._n, self._unsettled = snap, 0, False
        self._counts = FramingCore(consumer=self).counts()

    def feed_frames(self, _frames: object) -> list[object]:
        return []

    def feed(self, _data: bytes) -> list[object]:
        self._n += 1
        self._unsettled = True
        return [self._snap]

    def settle(self) -> list[object]:
        self._unsettled = False
        return []

    def unsettled(self) -> bool:
        return self._unsettled

    def slack_after_s(self) -> float | None:
        return None

    def settle_slack(self) -> list[object]:
        return []

    def end_stream(self) -> list[object]:
        return []

    def counts(self) -> Any:
        return self._counts

    def frames_total(self) -> int:
        return self._n

    def reset(self) -> None:
        pass

    def state_dict(self) -> dict[str, Any]:
        return {}

    def load_state_dict(self, _state: object) -> None:
        pass


async def _runtime(lib: Any, n: int, secs: int) -> int:
    sys.path.insert(0, str(HERE))
    from bench_outputs import _replayed_stations
    from prometheus_client import CollectorRegistry

    from ionwarden.daemon.config import PrometheusSettings
    from ionwarden.daemon.estimator import StationSnapshot
    from ionwarden.daemon.ingest import TcpSource
    from ionwarden.daemon.outputs import Exporter
    from ionwarden.daemon.runtime import StationConfig
    from ionwarden.daemon.runtime._app import build_daemon_snapshot
    from ionwarden.daemon.runtime._supervisor import (
        Daemon,
        DaemonOptions,
        StationBundle,
    )

    chunks, pipes, _ = _replayed_stations(3, 1)
    snap = next(o for o in pipes[0].feed(chunks[1]) if isinstance(o, StationSnapshot))
    parent, child = multiprocessing.Pipe()
    proc = multiprocessing.get_context("spawn").Process(
        target=_receivers_process, args=(n, child, chunks[1], secs), daemon=True
    )
    proc.start()
    ports = parent.recv()
    loop = asyncio.get_running_loop()
    stations = tuple(
        StationConfig(name=f"st{i:02d}", source=TcpSource(host="127.0.0.1", port=p))
        for i, p in enumerate(ports)
    )
    exporter = Exporter(
        PrometheusSettings(port=0), registry=CollectorRegistry(), monotonic=loop.time
    )
    started = loop.time()
    daemon = Daemon(
        DaemonOptions(stations=stations, summary_interval_s=0, exit_when_sources_end=False),
        factory=lambda _cfg: StationBundle(core=_ReadyMadeCore(snap), produces_epochs=True),
        exporter=exporter,
        # (*stats: code from before the builder was handed the tick's statistics takes one arg)
        build_snapshot=lambda d, *stats: build_daemon_snapshot(d, None, started, *stats),
    )
    async with asyncio.TaskGroup() as tg:
        tg.create_task(daemon.run(), name="bench.daemon")
        await daemon.ready.wait()
        await asyncio.sleep(WARM_UP_S + 1.3)  # between two bursts
        e0 = sum(s.epochs_total for s in daemon.statistics())
        lib.iw_cg_toggle()
        await asyncio.sleep(secs)
        lib.iw_cg_toggle()
        e1 = sum(s.epochs_total for s in daemon.statistics())
        daemon.request_stop()
    proc.join(15)
    return e1 - e0


def _child(args: argparse.Namespace) -> None:
    lib = ctypes.CDLL(args.child)
    if args.what == "runtime":
        counted = asyncio.run(_runtime(lib, args.stations, args.seconds))
    else:
        counted = asyncio.run(_pipeline(lib, args.what, args.stations, args.seconds, args.warm_up))
    print(f"counted station-seconds {counted}", flush=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument(
        "--what",
        choices=("urgent", "urgent-batched", "urgent-mqtt", "settle", "runtime"),
        default="urgent",
    )
    ap.add_argument("--stations", type=int, default=20)
    ap.add_argument("--seconds", type=int, default=8, help="counted seconds (default 8)")
    ap.add_argument(
        "--warm-up", type=int, default=WARM_UP_S, metavar="S",
        help=f"seconds of stream not counted first (default {WARM_UP_S}: the start-up, where arcs "
        "restart and ROT/ROTI are still empty; 330 for the steady state past the 5-min ROTI "
        "window, with --what urgent/urgent-mqtt/settle)",
    )  # fmt: skip
    ap.add_argument("--child", help=argparse.SUPPRESS)  # the measured run, under valgrind
    args = ap.parse_args()
    if args.child:
        _child(args)
        return 0
    return _parent(args)


if __name__ == "__main__":
    sys.exit(main())
