"""End-to-end bench: the real ``ionwarden run`` process, frame sent → summary delivered (issue 8).

What runs where:

* this process builds the simulator's invented quiet-day stream (one chunk per 1 Hz epoch, as
  ``bench_outputs._replayed_stations`` does) and serves it as ``--stations`` loopback TCP
  "receivers" (one listening port per station, so every connection is known by its station);
* ``.venv/bin/ionwarden run --config <temp>.toml`` is started as a subprocess, one
  ``[[stations]]`` per receiver (``source = "tcp://127.0.0.1:PORT"``), MQTT to the shared broker
  (``IONWARDEN_TEST_MQTT_HOST``/``PORT``, default 127.0.0.1:1883) under a unique ``topic_prefix``,
  the Prometheus exporter on a free loopback port, ``state_dir`` in a temp dir, every other setting
  at its default (INFO logging, summary lines, per-satellite series, checkpoints);
* a subscriber listens to ``<prefix>/+/summary`` (QoS 1): by default ``mosquitto_sub``
  (Debian: mosquitto-clients), whose output, with each receipt time, is read only between bursts;
  ``--subscriber aiomqtt`` puts it in this process, parsing each summary on the shared cores as it
  arrives (~7 ms of CPU a second at 20 stations, which then competes with the daemon).

Sequence: the first chunk (ephemerides, receiver set-up) goes to every station untimed and the
bench waits for every station's first summary; then, each second, that second's chunk is written
to every connection at the same instant (``--stagger``: station i at i/N of the second), recording
each send time. Latency = the subscriber's receipt of ``<prefix>/<station>/summary`` − the send time
of that station's chunk, matched by the station in the topic and the epoch's GPS time of week in
the payload. This is frame *sent* → summary *delivered to a subscriber*: a superset of the issue's
frame received → PUBACK (it adds the loopback hop into the daemon and the broker → subscriber hop).

Printed: latency p50/p99/max; the last station of each second (median, worst) and the k-th summary
of a second; the daemon's CPU time per wall second over the timed window (``/proc/<pid>/stat`` utime
+ stime, all threads, its worker processes included with ``--workers N``) and its RSS; what other
load cost it (``/proc/<pid>/task/*/schedstat``: time on a CPU and time runnable but waiting for one,
overall and in the 0.4 s after each burst, with the main thread's involuntary context switches, so
that the contention on a shared machine can be read off the figures); the daemon's own
``ionwarden_estimator_epoch_processing_seconds`` histogram (bytes read → snapshot; coarse buckets)
over the same epochs, from two scrapes of /metrics; its MQTT and queue drop counters; the warnings
in its log. ``--scrape-every S`` also scrapes /metrics every S seconds at a burst's instant (a
Prometheus scrape landing on the burst: the worst case). The daemon is stopped with SIGTERM (its
exit status is printed) and the temp files are removed.

Usage: .venv/bin/python bench/bench_e2e.py [--seconds 60] [--stations 20] [--stagger]
           [--scrape-every S] [--keep-log] [--series CSV] [--workers N] [--warm-up S]
           [--daemon PATH] [--subscriber mosquitto_sub|aiomqtt] [--runtime KEY=VALUE]
The daemon is the installed ``.venv/bin/ionwarden`` and inherits this process's environment, so
``PYTHONPATH=DIR`` with ``DIR/ionwarden/{daemon,parsers}`` (e.g. ``git archive HEAD daemon parsers``
unpacked there) measures that code instead of the work tree. Exit status: 0, 1 on a set-up failure
(daemon, broker, connections: a plain message), 2 when summaries were missing.
Target (issue 8): frame received → MQTT publish acknowledged p99 ≤ 10 ms at 20 stations × 1 Hz. The
machine may be shared (2 cores): figures are under contention; the bench itself, the broker and the
daemon share those cores.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import functools
import json
import os
import re
import resource
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import aiomqtt

from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream

REPO = Path(__file__).resolve().parents[1]

DAEMON = REPO / ".venv" / "bin" / "ionwarden"
#: The daemon's histogram of "bytes that completed the epoch read → snapshot out" (_exporter.py).
EPOCH_HISTOGRAM = "ionwarden_estimator_epoch_processing_seconds"
#: The daemon's own frame received → summary PUBACK histogram (issue 8's latency, exactly).
DELIVERY_HISTOGRAM = "ionwarden_mqtt_summary_delivery_seconds"
#: Bounded waits (s).
CONNECT_TIMEOUT_S = 60.0  # daemon start-up: Python imports, config, every station connected
FIRST_SUMMARY_TIMEOUT_S = 60.0
TAIL_TIMEOUT_S = 10.0  # after the last send, for the last summaries
STOP_TIMEOUT_S = 20.0  # SIGTERM → exit (the daemon's own budget is [runtime] stop_timeout_s = 4)
#: Warm-up pace (s between epochs: 10x real time).
WARM_UP_PERIOD_S = 0.1
WEEK_S = 604_800.0


class BenchError(RuntimeError):
    """A failure of the set-up (daemon, broker, connections): reported plainly, exit status 1."""


def pct(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, round(q * (len(s) - 1)))] if s else float("nan")


def tow_key(tow_s: float) -> int:
    """An epoch's match key: its GPS time of week in ms (the week is left out, so a daemon that
    places the stream in another week still matches; the bench reports that separately)."""
    return round((tow_s % WEEK_S) * 1000.0)


def build_chunks(seconds: int) -> list[tuple[float, bytes]]:
    """(GPS time of week, bytes) of each epoch of the invented quiet-day stream: ``seconds`` + 1."""
    sc = build_scenario("quiet-day", duration_s=seconds + 1.0)
    start = sc.start.total_s
    return [((start + t) % WEEK_S, data) for t, data in iter_stream(Simulator(sc), 0)]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def write_config(
    path: Path,
    ports: list[int],
    *,
    names: list[str],
    mqtt_host: str,
    mqtt_port: int,
    prefix: str,
    prom_port: int,
    state_dir: Path,
    workers: int = 1,
    runtime: tuple[str, ...] = (),
) -> None:
    text = "".join(
        f'[[stations]]\nname = "{n}"\nsource = "tcp://127.0.0.1:{p}"\n\n'
        for n, p in zip(names, ports, strict=True)
    )
    text += (
        f'[mqtt]\nenabled = true\nhost = "{mqtt_host}"\nport = {mqtt_port}\n'
        f'topic_prefix = "{prefix}"\n\n'
        f'[prometheus]\nenabled = true\naddress = "127.0.0.1"\nport = {prom_port}\n'
        # 1-ms buckets up to 30 ms: the daemon's own histograms then give p50/p99 to the ms
        f"latency_buckets_s = [{', '.join(f'{ms / 1e3:g}' for ms in range(1, 31))}, 0.05, 0.1, 1.0]\n\n"
        f'[runtime]\nstate_dir = "{state_dir}"\n'
        # (only when asked: a daemon from before [runtime] workers refuses the key)
        + (f"workers = {workers}\n" if workers != 1 else "")
        + "".join(f"{kv}\n" for kv in runtime)
    )
    path.write_text(text)


# -- the daemon process -------------------------------------------------------------------------
class DaemonProcess:
    def __init__(self, daemon: Path, config: Path, log_path: Path) -> None:
        self.log_path = log_path
        self._log = log_path.open("wb")
        self.proc = subprocess.Popen(
            [str(daemon), "run", "--config", str(config)],
            stdin=subprocess.DEVNULL,
            stdout=self._log,
            stderr=subprocess.STDOUT,
            cwd=config.parent,
        )
        self._tick = os.sysconf("SC_CLK_TCK")

    @property
    def pid(self) -> int:
        return self.proc.pid

    def check_alive(self) -> None:
        if self.proc.poll() is not None:
            raise BenchError(
                f"the daemon exited early with status {self.proc.returncode}:\n{self.log_tail()}"
            )

    def workers(self) -> list[int]:
        """The worker processes' pids (``[runtime] workers`` > 1; /proc/<pid>/task/*/children)."""
        out: list[int] = []
        for task in Path(f"/proc/{self.pid}/task").iterdir():
            with contextlib.suppress(OSError, ValueError):
                out += [int(x) for x in (task / "children").read_text().split()]
        return sorted(out)

    def loops(self) -> list[int]:
        """The processes whose event loops run the stations: the workers, else the daemon."""
        return self.workers() or [self.pid]

    def cpu_s(self) -> float:
        """utime + stime of every thread of the daemon and its workers (/proc/<pid>/stat fields
        14, 15; proc(5))."""
        total = 0
        for pid in {self.pid, *self.workers()}:
            with contextlib.suppress(OSError):
                stat = Path(f"/proc/{pid}/stat").read_text()
                fields = stat[stat.rindex(")") + 2 :].split()  # after "pid (comm) "
                total += int(fields[11]) + int(fields[12])
        return total / self._tick

    def threads(self) -> dict[int, tuple[str, float, float]]:
        """Per thread of the daemon and its workers: (name, time on a CPU s, time waiting on a run
        queue s), from /proc/<pid>/task/<tid>/schedstat (ns; proc(5),
        Documentation/scheduler/sched-stats). The wait is what other load costs the daemon."""
        out = {}
        for pid in {self.pid, *self.workers()}:
            with contextlib.suppress(OSError):
                for task in Path(f"/proc/{pid}/task").iterdir():
                    with contextlib.suppress(OSError, ValueError):
                        run_ns, wait_ns, _ = (task / "schedstat").read_text().split()
                        name = (task / "comm").read_text().strip()
                        out[int(task.name)] = (name, int(run_ns) / 1e9, int(wait_ns) / 1e9)
        return out

    def main_schedstat(self) -> dict[int, tuple[float, float, int]]:
        """Per station event loop (each worker's main thread, else the daemon's): time on a CPU
        and waiting on a run queue (s), and involuntary context switches (preemptions: by other
        load, or by the broker it wakes)."""
        out = {}
        for pid in self.loops():
            with contextlib.suppress(OSError, ValueError):
                run_ns, wait_ns, _ = Path(f"/proc/{pid}/schedstat").read_text().split()
                status = Path(f"/proc/{pid}/task/{pid}/status").read_text()
                m = re.search(r"^nonvoluntary_ctxt_switches:\s*(\d+)", status, re.M)
                out[pid] = (int(run_ns) / 1e9, int(wait_ns) / 1e9, int(m.group(1)) if m else 0)
        return out

    def memory_mib(self) -> tuple[float, float]:
        """(VmRSS, VmHWM) in MiB of the daemon and its workers together (proc(5))."""
        got = {"VmRSS": 0.0, "VmHWM": 0.0}
        for pid in {self.pid, *self.workers()}:
            with contextlib.suppress(OSError):
                for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                    key, _, value = line.partition(":")
                    if key in got:
                        got[key] += int(value.split()[0]) / 1024
        return got["VmRSS"] or float("nan"), got["VmHWM"] or float("nan")

    def log_tail(self, lines: int = 30) -> str:
        if not self._log.closed:
            self._log.flush()
        text = self.log_path.read_text(errors="replace").splitlines()
        return "\n".join("  | " + ln for ln in text[-lines:])

    def stop(self) -> tuple[int | None, float]:
        """SIGTERM and wait; SIGKILL past STOP_TIMEOUT_S. (exit status or None if killed, s)."""
        t0 = time.monotonic()
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
                self._log.close()
                return None, time.monotonic() - t0
        self._log.close()
        return self.proc.returncode, time.monotonic() - t0


# -- the receivers --------------------------------------------------------------------------------
class Receivers:
    """One loopback listening port per station; each accepts the daemon's one connection."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.servers: list[asyncio.Server] = []
        self.writers: list[asyncio.StreamWriter | None] = [None] * n
        self._all_in = asyncio.Event()

    @property
    def ports(self) -> list[int]:
        return [int(s.sockets[0].getsockname()[1]) for s in self.servers]

    async def start(self) -> None:
        for i in range(self.n):
            self.servers.append(
                await asyncio.start_server(
                    functools.partial(self._accepted, i), "127.0.0.1", 0, backlog=4
                )
            )

    async def _accepted(
        self, i: int, _reader: asyncio.StreamReader, w: asyncio.StreamWriter
    ) -> None:
        if self.writers[i] is not None:  # a reconnect would mean the daemon lost the stream
            old = self.writers[i]
            assert old is not None
            old.close()
            print(f"  warning: station {i} reconnected", file=sys.stderr)
        w.transport.set_write_buffer_limits(high=1 << 20)
        sock = w.get_extra_info("socket")
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.writers[i] = w
        if all(x is not None for x in self.writers):
            self._all_in.set()

    async def wait_all(self, daemon: DaemonProcess, timeout_s: float) -> None:
        deadline = time.monotonic() + timeout_s
        while not self._all_in.is_set():
            daemon.check_alive()
            if time.monotonic() > deadline:
                got = sum(w is not None for w in self.writers)
                raise BenchError(
                    f"only {got}/{self.n} stations connected within {timeout_s:.0f} s:\n"
                    + daemon.log_tail()
                )
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._all_in.wait(), 0.5)

    def send(self, i: int, data: bytes) -> float:
        """Write ``data`` to station ``i``; return the send time (perf_counter, before the write)."""
        w = self.writers[i]
        if w is None or w.is_closing():
            raise BenchError(f"station {i}'s connection is closed")
        t = time.perf_counter()
        w.write(data)
        return t

    def buffered(self) -> int:
        return sum(w.transport.get_write_buffer_size() for w in self.writers if w is not None)

    async def close(self) -> None:
        for w in self.writers:
            if w is not None:
                w.close()
        for s in self.servers:
            s.close()
        for s in self.servers:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(s.wait_closed(), 2.0)


# -- the subscriber -------------------------------------------------------------------------------
@dataclass
class Received:
    #: (station, epoch key) → receipt time (perf_counter) of the first summary of that epoch
    times: dict[tuple[str, int], float] = field(default_factory=dict)
    per_station: dict[str, int] = field(default_factory=dict)
    weeks: set[int] = field(default_factory=set)
    duplicates: int = 0
    bad: int = 0
    arrived: asyncio.Event = field(default_factory=asyncio.Event)
    #: the lean subscriber, when it is the one (its file is read here, between bursts)
    lean: LeanSubscriber | None = None

    def record(self, t: float, topic: str, payload: bytes) -> None:
        """One summary received at ``t`` (perf_counter s): matched by station and epoch."""
        try:
            station = topic.split("/")[-2]
            body = json.loads(payload)
            key = tow_key(float(body["gps_tow_s"]))
            self.weeks.add(int(body["gps_week"]))
        except (ValueError, KeyError, TypeError, IndexError):
            self.bad += 1
            return
        if (station, key) in self.times:
            self.duplicates += 1
            return
        self.times[(station, key)] = t
        self.per_station[station] = self.per_station.get(station, 0) + 1
        self.arrived.set()

    async def wait(self, timeout_s: float) -> None:
        """Until a summary arrives or ``timeout_s`` passes (the lean subscriber's file is read
        every 0.1 s: only while the bench waits, never during the timed bursts)."""
        if self.lean is not None:
            for _ in range(max(1, round(timeout_s / 0.1))):  # a file to poll, not an event
                if self.lean.poll(self):
                    return
                await asyncio.sleep(0.1)
            return
        self.arrived.clear()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self.arrived.wait(), timeout_s)


async def subscribe(client: aiomqtt.Client, got: Received) -> None:
    async for msg in client.messages:
        t = time.perf_counter()  # before any parsing
        got.record(t, str(msg.topic), bytes(msg.payload))


class LeanSubscriber:
    """``mosquitto_sub`` (Debian: mosquitto-clients, the broker's own command-line client, in C)
    writing each summary with its receipt time (``%U``: Unix time in ns) to a file that the bench
    reads only while it waits. A summary's consumer on a site is remote; a Python subscriber here
    parses JSON on the same two cores as the daemon (~0.3 ms of CPU a message), which the lean one
    does not: the figures then show the daemon and the broker, not the bench."""

    def __init__(self, host: str, port: int, prefix: str, path: Path) -> None:
        self.path = path
        self._out = path.open("wb")
        self.proc = subprocess.Popen(
            ["mosquitto_sub", "-h", host, "-p", str(port), "-q", "1", "-i",
             f"iwbench-sub-{os.getpid()}", "-t", f"{prefix}/+/summary", "-F", "%U %t %p"],
            stdin=subprocess.DEVNULL, stdout=self._out, stderr=subprocess.STDOUT,
        )  # fmt: skip
        self._pos = 0
        self._partial = b""

    @staticmethod
    def _clock_offset() -> float:
        """realtime − perf_counter (s), the sample of the smallest span of a few. Taken at each
        poll: the stamps are realtime, which the host's clock discipline may step during a run
        (seen 2026-12-04: every summary ~270 ms "late" for a whole run, with the daemon's own
        monotonic figures unchanged, when the offset was taken once at the start)."""
        pairs = []
        for _ in range(3):
            a = time.perf_counter()
            w = time.time()
            b = time.perf_counter()
            pairs.append((b - a, w - (a + b) / 2))
        return min(pairs)[1]

    def poll(self, got: Received) -> bool:
        """Read what arrived since the last poll into ``got``; whether anything did."""
        if self.proc.poll() is not None:
            raise BenchError(
                f"mosquitto_sub exited with status {self.proc.returncode}: "
                f"{self.path.read_bytes()[-300:].decode(errors='replace')}"
            )
        with self.path.open("rb") as f:
            f.seek(self._pos)
            data = f.read()
        self._pos += len(data)
        lines = (self._partial + data).split(b"\n")
        self._partial = lines.pop()
        offset = self._clock_offset()  # (read between bursts: within a second of the stamps)
        for line in lines:
            stamp, _, rest = line.partition(b" ")
            topic, _, payload = rest.partition(b" ")
            try:
                t = float(stamp) - offset
            except ValueError:
                got.bad += 1
                continue
            got.record(t, topic.decode(errors="replace"), payload)
        return bool(lines)

    async def ready(self, host: str, port: int, prefix: str, got: Received) -> None:
        """Wait until it is subscribed: a probe summary published here comes back through it."""
        probe = json.dumps({"gps_tow_s": -1.0, "gps_week": -1}).encode()
        async with aiomqtt.Client(host, port, timeout=10) as client:
            for _ in range(50):
                await client.publish(f"{prefix}/probe/summary", probe, qos=1)
                await asyncio.sleep(0.1)
                if self.poll(got):
                    got.times.clear()
                    got.per_station.clear()
                    got.weeks.clear()
                    return
        raise BenchError("mosquitto_sub did not receive a probe within 5 s")

    def close(self) -> None:
        self.proc.terminate()
        with contextlib.suppress(subprocess.TimeoutExpired):
            self.proc.wait(5)
        self._out.close()


# -- /metrics -------------------------------------------------------------------------------------
_SAMPLE = re.compile(r"^([A-Za-z_:][A-Za-z0-9_:]*)(\{[^}]*\})?\s+(\S+)")
_LE = re.compile(r'le="([^"]+)"')


async def scrape(port: int, timeout_s: float = 10.0) -> tuple[str, float]:
    """GET /metrics over a plain asyncio socket (no thread, no blocking call in this loop); the
    page and the time it took (s)."""
    t0 = time.perf_counter()

    async def get() -> bytes:
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        writer.write(b"GET /metrics HTTP/1.0\r\nHost: 127.0.0.1\r\n\r\n")
        data = await reader.read()
        writer.close()
        return data

    try:
        raw = await asyncio.wait_for(get(), timeout_s)
    except (OSError, TimeoutError) as exc:
        raise BenchError(f"scraping /metrics on port {port} failed: {exc!r}") from exc
    head, _, body = raw.partition(b"\r\n\r\n")
    if not head.startswith(b"HTTP/1.") or b" 200 " not in head.split(b"\r\n")[0]:
        raise BenchError(f"/metrics answered {head[:80]!r}")
    return body.decode(), time.perf_counter() - t0


def metric_sums(page: str) -> dict[str, float]:
    """Samples summed over their labels (the ``le`` label of a histogram bucket is kept)."""
    out: dict[str, float] = {}
    for line in page.splitlines():
        m = _SAMPLE.match(line)
        if m is None:
            continue
        name, labels, value = m.groups()
        if name.endswith("_bucket") and labels:
            le = _LE.search(labels)
            if le:
                name = f"{name}:{le.group(1)}"
        out[name] = out.get(name, 0.0) + float(value)
    return out


def histogram_delta(before: dict[str, float], after: dict[str, float], name: str) -> str:
    pre = f"{name}_bucket:"
    buckets = sorted(
        ((float(k[len(pre) :]), after[k] - before.get(k, 0.0)) for k in after if k.startswith(pre)),
        key=lambda x: x[0],
    )
    n = after.get(f"{name}_count", 0.0) - before.get(f"{name}_count", 0.0)
    total = after.get(f"{name}_sum", 0.0) - before.get(f"{name}_sum", 0.0)
    if n <= 0:
        return f"{name}: no observations in the window"

    def bound(q: float) -> str:
        for le, cum in buckets:
            if cum >= q * n:
                return f"<= {le * 1e3:g} ms" if le != float("inf") else "> last bucket"
        return "?"

    within_10ms = next((cum for le, cum in buckets if le == 0.01), None)
    share = "" if within_10ms is None else f"; {within_10ms / n * 100:.1f}% <= 10 ms"
    return (
        f"n={n:.0f} mean={total / n * 1e3:.2f} ms p50 {bound(0.5)}, p99 {bound(0.99)} "
        f"(bucket bounds){share}"
    )


# -- the bench ------------------------------------------------------------------------------------
async def run(args: argparse.Namespace, tmp: Path) -> int:
    n = args.stations
    print(
        f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs at start (shared machine: "
        f"figures are under contention)"
    )
    t_build = time.perf_counter()
    chunks = build_chunks(args.seconds + args.warm_up)
    print(
        f"simulated quiet-day stream (invented data): {len(chunks)} epochs, "
        f"{statistics.median(len(c) for _, c in chunks[1:]):.0f} bytes/epoch after the first "
        f"({len(chunks[0][1])} bytes), built in {time.perf_counter() - t_build:.1f} s"
    )
    code = Path(str(sys.modules["ionwarden.daemon"].__file__)).parent.parent
    print(f"daemon: {args.daemon} run (code imported from {code}; PYTHONPATH is passed on)")
    names = [f"e2e{i:02d}" for i in range(n)]
    prefix = f"iwbench-e2e/{os.getpid()}-{uuid.uuid4().hex[:8]}"
    receivers = Receivers(n)
    await receivers.start()
    prom_port = free_port()
    cfg = tmp / "ionwarden.toml"
    write_config(
        cfg,
        receivers.ports,
        names=names,
        mqtt_host=args.mqtt_host,
        mqtt_port=args.mqtt_port,
        prefix=prefix,
        prom_port=prom_port,
        state_dir=tmp / "state",
        workers=args.workers,
        runtime=tuple(args.runtime),
    )
    check = await asyncio.create_subprocess_exec(
        str(args.daemon), "config", "check", str(cfg),
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
    )  # fmt: skip
    out, _ = await asyncio.wait_for(check.communicate(), CONNECT_TIMEOUT_S)
    if check.returncode != 0:
        raise BenchError(f"ionwarden config check failed:\n{out.decode(errors='replace')}")

    got = Received()
    daemon: DaemonProcess | None = None
    try:
        async with contextlib.AsyncExitStack() as stack:
            if args.subscriber == "mosquitto_sub":
                lean = LeanSubscriber(args.mqtt_host, args.mqtt_port, prefix, tmp / "sub.txt")
                stack.callback(lean.close)
                await lean.ready(args.mqtt_host, args.mqtt_port, prefix, got)
                got.lean = lean
                print("subscriber: mosquitto_sub (C), its output read only between bursts")
                sub = None
            else:
                client = await stack.enter_async_context(
                    aiomqtt.Client(args.mqtt_host, args.mqtt_port, timeout=10)
                )
                await client.subscribe(f"{prefix}/+/summary", qos=1)
                sub = asyncio.create_task(subscribe(client, got), name="bench.subscriber")
                print("subscriber: aiomqtt in this process (parses each summary as it arrives)")
            try:
                daemon = DaemonProcess(args.daemon, cfg, tmp / "daemon.log")
                if args.daemon_nice:  # an experiment: the daemon's main thread vs the broker
                    os.setpriority(os.PRIO_PROCESS, daemon.pid, args.daemon_nice)
                    print(f"daemon main thread reniced to {args.daemon_nice}")
                return await _timed(
                    args,
                    chunks=chunks,
                    names=names,
                    receivers=receivers,
                    daemon=daemon,
                    got=got,
                    prom_port=prom_port,
                )
            finally:
                if sub is not None:
                    sub.cancel()
                    with contextlib.suppress(asyncio.CancelledError):
                        await sub
    except aiomqtt.MqttError as exc:
        raise BenchError(
            f"MQTT broker {args.mqtt_host}:{args.mqtt_port}: {exc} (set "
            f"IONWARDEN_TEST_MQTT_HOST/PORT)"
        ) from exc
    finally:
        if daemon is not None:  # before the receivers close, so that no station sees an EOF
            rc, took = daemon.stop()
            status = "killed after the stop budget" if rc is None else f"exit status {rc}"
            print(f"daemon stopped by SIGTERM: {status} in {took:.2f} s")
            if args.keep_log:
                print(f"daemon log: {daemon.log_path}")
            if rc != 0:
                print(daemon.log_tail(), file=sys.stderr)
            bad = [
                ln
                for ln in daemon.log_path.read_text(errors="replace").splitlines()
                if " WARNING " in ln or " ERROR " in ln or "Traceback" in ln
            ]
            print(f"daemon log: {len(bad)} warning/error lines" + ("; first:" if bad else ""))
            for ln in bad[:5]:
                print(f"  | {ln[:200]}")
        await receivers.close()


async def _timed(
    args: argparse.Namespace,
    *,
    chunks: list[tuple[float, bytes]],
    names: list[str],
    receivers: Receivers,
    daemon: DaemonProcess,
    got: Received,
    prom_port: int,
) -> int:
    n = len(names)
    loop = asyncio.get_running_loop()
    t_launch = time.perf_counter()
    await receivers.wait_all(daemon, CONNECT_TIMEOUT_S)
    print(
        f"daemon pid {daemon.pid}: {n} stations connected {time.perf_counter() - t_launch:.1f} s "
        f"after launch"
    )

    # 1. the first chunk, untimed; wait for every station's first summary
    for i in range(n):
        receivers.send(i, chunks[0][1])
    first_key = tow_key(chunks[0][0])
    deadline = time.monotonic() + FIRST_SUMMARY_TIMEOUT_S
    while not all((s, first_key) in got.times for s in names):
        daemon.check_alive()
        if time.monotonic() > deadline:
            absent = [s for s in names if (s, first_key) not in got.times]
            raise BenchError(
                f"no first summary within {FIRST_SUMMARY_TIMEOUT_S:.0f} s from {absent} "
                f"(summaries seen: {got.per_station}, unparsable {got.bad}):\n{daemon.log_tail()}"
            )
        await got.wait(0.5)
    if args.warm_up:
        # untimed, at 10x real time: arcs level, ROT and the 5-min ROTI windows fill, the receiver
        # bias converges: the timed seconds then show the steady state, not the start-up
        t0 = time.monotonic()
        for k in range(1, args.warm_up + 1):
            await asyncio.sleep(max(0.0, t0 + k * WARM_UP_PERIOD_S - time.monotonic()))
            for i in range(n):
                receivers.send(i, chunks[k][1])
            daemon.check_alive()
        last_key = tow_key(chunks[args.warm_up][0])
        deadline = time.monotonic() + FIRST_SUMMARY_TIMEOUT_S
        while not all((st, last_key) in got.times for st in names):
            daemon.check_alive()
            if time.monotonic() > deadline:
                raise BenchError(
                    f"the warm-up's last summaries did not arrive:\n{daemon.log_tail()}"
                )
            await got.wait(0.5)
        print(f"warm-up: {args.warm_up} s of stream at 10x real time, untimed")
    # let the deferred steps, the start-up publishing and the exporter's 1 s refresh finish
    await asyncio.sleep(1.5)
    before, scrape_s = await scrape(prom_port)
    m_before = metric_sums(before)
    await asyncio.sleep(0.5)

    # 2. timed: one chunk per second to every station
    timed = chunks[1 + args.warm_up :]
    sent: dict[tuple[str, int], tuple[int, float]] = {}  # (station, key) -> (second, send time)
    scrapes: list[tuple[int, float]] = []  # (second, scrape duration)
    bursts: dict[int, tuple[float, float, int]] = {}  # second -> main thread (run, wait, preempted)
    cpu0, thr0, wall0 = daemon.cpu_s(), daemon.threads(), time.perf_counter()
    rus0 = resource.getrusage(resource.RUSAGE_SELF)
    start = loop.time() + 0.2
    for s, (tow, data) in enumerate(timed):
        key = tow_key(tow)
        scraping = None
        if args.scrape_every and s % args.scrape_every == args.scrape_every // 2:
            # as a Prometheus server would, landing on a burst (the worst case): from the burst's
            # instant, concurrently with the sends
            await asyncio.sleep(max(0.0, start + s - loop.time()))
            scraping = asyncio.create_task(scrape(prom_port), name="bench.scrape")
        if args.stagger:
            for i in range(n):
                await asyncio.sleep(max(0.0, start + s + i / n - loop.time()))
                sent[(names[i], key)] = (s, receivers.send(i, data))
        else:
            await asyncio.sleep(max(0.0, start + s - loop.time()))
            sched0 = daemon.main_schedstat()
            for i in range(n):  # the same instant, as receivers aligned to the GPS second
                sent[(names[i], key)] = (s, receivers.send(i, data))
            # the daemon's main thread over the 0.4 s after the burst: on a CPU / waiting for one
            await asyncio.sleep(max(0.0, start + s + 0.4 - loop.time()))
            sched1 = daemon.main_schedstat()
            # the busiest event loop of the burst (with workers, the burst's critical path)
            d = [
                (b[0] - a[0], b[1] - a[1], b[2] - a[2])
                for pid, a in sched0.items()
                if (b := sched1.get(pid)) is not None
            ] or [(0.0, 0.0, 0)]
            bursts[s] = (max(x[0] for x in d), max(x[1] for x in d), sum(x[2] for x in d))
        daemon.check_alive()
        if receivers.buffered() > 1 << 20:
            raise BenchError("the daemon stopped reading (1 MiB waiting in the send buffers)")
        if scraping is not None:
            _, took = await scraping
            scrapes.append((s, took))
    t_last = time.monotonic()
    while time.monotonic() - t_last < TAIL_TIMEOUT_S and not all(k in got.times for k in sent):
        await got.wait(0.5)
    # the CPU window: whole seconds, from the first burst to a second after the last one
    await asyncio.sleep(max(0.0, start + len(timed) - loop.time()))
    cpu1, thr1, wall1 = daemon.cpu_s(), daemon.threads(), time.perf_counter()
    rus1 = resource.getrusage(resource.RUSAGE_SELF)
    rss, hwm = daemon.memory_mib()
    await asyncio.sleep(1.2)  # the exporter's counters are refreshed once a second
    after, _ = await scrape(prom_port)
    m_after = metric_sums(after)

    # 3. figures
    rows = [
        (s, i, (got.times[k] - t) * 1e3)
        for k, (s, t) in sent.items()
        if k in got.times
        for i in (names.index(k[0]),)
    ]
    ms = [x for _, _, x in rows]
    missing = len(sent) - len(rows)
    if args.series is not None:
        with args.series.open("w", encoding="utf-8") as out:
            out.write("second,station,latency_ms,burst_on_cpu_ms,burst_waiting_ms,preempted\n")
            for s, i, x in sorted(rows):
                b = bursts.get(s, (float("nan"), float("nan"), -1))
                out.write(f"{s},{i},{x:.3f},{b[0] * 1e3:.3f},{b[1] * 1e3:.3f},{b[2]}\n")
    mode = "stations spread evenly over the second" if args.stagger else "all at the same instant"
    print(
        f"\nReal daemon, {n} stations x 1 Hz x {len(timed)} s, chunks {mode}; "
        f"MQTT {args.mqtt_host}:{args.mqtt_port}"
    )
    print(
        "  frame sent -> summary delivered to a subscriber (a superset of frame received -> "
        "PUBACK: adds the broker -> subscriber hop):"
    )
    if not ms:
        raise BenchError(f"no timed summary matched (weeks in payloads: {sorted(got.weeks)})")
    print(
        f"  n={len(ms)} p50={pct(ms, 0.5):.2f} ms p99={pct(ms, 0.99):.2f} ms "
        f"max={max(ms):.2f} ms  (target p99 <= 10 ms); missing {missing}, "
        f"duplicates {got.duplicates}, unparsable {got.bad}"
    )
    last: dict[int, float] = {}  # the slowest summary of each second
    for s, _, x in rows:
        last[s] = max(last.get(s, 0.0), x)
    worst = sorted(((x, s) for s, x in last.items()), reverse=True)[:3]
    print(
        f"  {'slowest summary' if args.stagger else 'last station'} of each second: "
        f"median={statistics.median(last.values()):.2f} ms, worst "
        + ", ".join(f"{x:.1f} ms (s {s + 1})" for x, s in worst)
    )
    if not args.stagger:
        rank = [0.0] * n  # mean latency by arrival order within the second
        by_s: dict[int, list[float]] = {}
        for s, _, x in rows:
            by_s.setdefault(s, []).append(x)
        if bursts:
            run = [b[0] * 1e3 for b in bursts.values()]
            wait = [b[1] * 1e3 for b in bursts.values()]
            preempted = [b[2] for b in bursts.values()]
            net = [last[s] - bursts[s][1] * 1e3 for s in last if s in bursts]
            print(
                f"  {'busiest worker' if args.workers > 1 else 'daemon'} main thread in the 0.4 s "
                f"after each burst: on a CPU median "
                f"{statistics.median(run):.1f} ms (max {max(run):.1f}), waiting for a CPU median "
                f"{statistics.median(wait):.1f} ms (max {max(wait):.1f}), preempted median "
                f"{statistics.median(preempted):.0f} times; last station minus that wait: median "
                f"{statistics.median(net):.1f} ms, max {max(net):.1f} ms"
            )
        full = [sorted(v) for v in by_s.values() if len(v) == n]
        if full:
            rank = [statistics.median(v[j] for v in full) for j in range(n)]
            print(
                f"  k-th summary of a second (median over the seconds): k=1 {rank[0]:.2f} ms, "
                f"k={n // 2 + 1} {rank[n // 2]:.2f} ms, k={n} {rank[-1]:.2f} ms"
            )
    else:
        per_st = [
            statistics.median(x for _, i, x in rows if i == j)
            for j in range(n)
            if any(i == j for _, i, _ in rows)
        ]
        print(f"  per-station medians: best {min(per_st):.2f} ms, worst {max(per_st):.2f} ms")
    if scrapes:
        scraped = {k for k, _ in scrapes}
        worst_of = last
        plain = [x for s, x in worst_of.items() if s not in scraped]
        print(
            f"  with /metrics scraped every {args.scrape_every} s (at the burst's instant; "
            f"scrape took median {statistics.median(t for _, t in scrapes) * 1e3:.0f} ms): "
            f"slowest summary of the seconds with a scrape "
            + ", ".join(f"{worst_of[k]:.1f}" for k in sorted(scraped) if k in worst_of)
            + f" ms; of the others median {statistics.median(plain):.1f} ms"
        )
    weeks = sorted(got.weeks)
    expected_week = int(build_scenario("quiet-day", duration_s=1.0).start.week)
    if weeks != [expected_week]:
        print(f"  note: payload GPS weeks {weeks}, the stream's week is {expected_week}")
    dw = wall1 - wall0
    dcpu = cpu1 - cpu0
    bench_cpu = (rus1.ru_utime + rus1.ru_stime) - (rus0.ru_utime + rus0.ru_stime)
    print(
        f"  daemon CPU: {dcpu / dw * 1e3:.0f} ms per wall second ({dcpu / dw * 100:.1f}% of one "
        f"core; {dcpu / max(1, len(sent)) * 1e3:.2f} ms per station-epoch incl. all overheads), "
        f"over {dw:.1f} s; RSS {rss:.0f} MiB (peak {hwm:.0f} MiB)"
    )
    loops = set(daemon.loops())
    mains = [
        (thr1[t][1] - v[1], thr1[t][2] - v[2]) for t, v in thr0.items() if t in loops and t in thr1
    ]
    main = [(sum(x[0] for x in mains), sum(x[1] for x in mains))] if mains else []
    rest = [(thr1[t][1] - v[1], v[0]) for t, v in thr0.items() if t not in loops and t in thr1]
    if main:
        run_s, wait_s = main[0]
        others = ", ".join(f"{name} {r / dw * 1e3:.1f}" for r, name in rest if r > 0) or "none"
        print(
            f"  station event loop(s) ({len(loops)} main threads): on a CPU "
            f"{run_s / dw * 1e3:.0f} ms/s, waiting "
            f"for a CPU (run queue, other load) {wait_s / dw * 1e3:.0f} ms/s; other threads "
            f"(ms/s): {others}"
        )
    print(
        f"  this bench process (sender + subscriber) used {bench_cpu / dw * 1e3:.0f} ms CPU per "
        f"second; /metrics scrape before the run took {scrape_s * 1e3:.0f} ms"
    )
    print(
        f"  daemon's own {EPOCH_HISTOGRAM} (bytes read -> snapshot, queue wait + decode + "
        f"estimate) over the timed window: {histogram_delta(m_before, m_after, EPOCH_HISTOGRAM)}"
    )
    print(
        f"  daemon's own {DELIVERY_HISTOGRAM} (frame received -> summary PUBACK: the issue's "
        f"latency exactly) over the window: "
        f"{histogram_delta(m_before, m_after, DELIVERY_HISTOGRAM)}"
    )

    def d(name: str) -> float:
        return m_after.get(name, 0.0) - m_before.get(name, 0.0)

    print(
        f"  daemon counters over the window: mqtt published "
        f"{d('ionwarden_mqtt_published_messages_total'):.0f}, mqtt dropped "
        f"{d('ionwarden_mqtt_dropped_messages_total'):.0f}, queue dropped "
        f"{d('ionwarden_queue_dropped_total'):.0f}, pipeline errors "
        f"{d('ionwarden_station_pipeline_errors_total'):.0f}, mqtt disconnects "
        f"{d('ionwarden_mqtt_disconnects_total'):.0f}, epochs "
        f"{d('ionwarden_station_epochs_total'):.0f}"
    )
    print(f"load average {os.getloadavg()[0]:.2f} at the end")
    return 0 if missing == 0 else 2


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=int, default=60, help="timed seconds (default 60)")
    ap.add_argument("--stations", type=int, default=20, help="stations (default 20)")
    ap.add_argument(
        "--stagger", action="store_true", help="spread the stations evenly over each second"
    )
    ap.add_argument(
        "--scrape-every", type=int, default=0, metavar="S",
        help="also scrape /metrics every S seconds, at a burst's instant (0 = no)",
    )  # fmt: skip
    ap.add_argument(
        "--daemon-nice", type=int, default=0, metavar="N",
        help="renice the daemon's main thread (an experiment; negative values need root)",
    )  # fmt: skip
    ap.add_argument(
        "--warm-up", type=int, default=0, metavar="S",
        help="first feed S seconds of stream untimed at 10x real time (330: past the 5-min ROTI "
        "window, the steady state a station runs in for months; default 0: from the start)",
    )  # fmt: skip
    ap.add_argument(
        "--workers", type=int, default=1, metavar="N",
        help="[runtime] workers of the daemon (default 1: one process)",
    )  # fmt: skip
    ap.add_argument(
        "--runtime", action="append", default=[], metavar="KEY=VALUE",
        help="another [runtime] setting of the daemon, as a TOML line (repeatable), e.g. "
        "queue_size=64",
    )  # fmt: skip
    ap.add_argument(
        "--daemon", type=Path, default=DAEMON, metavar="PATH",
        help="the ionwarden executable to run (default .venv/bin/ionwarden); e.g. one installed "
        "in a venv of Debian's python3, which a Pi runs (built with PGO and LTO, unlike a "
        "pyenv build)",
    )  # fmt: skip
    ap.add_argument(
        "--subscriber", choices=("mosquitto_sub", "aiomqtt"), default=None,
        help="who receives the summaries: mosquitto_sub (default when installed: the broker's C "
        "client, read between bursts, as light as a remote consumer) or aiomqtt in this process "
        "(parses each summary on the shared cores)",
    )  # fmt: skip
    ap.add_argument("--keep-log", action="store_true", help="keep the daemon's log (temp dir)")
    ap.add_argument(
        "--series", type=Path, metavar="CSV",
        help="also write every latency as CSV rows: second, station index, latency ms, and the "
        "busiest station loop's on-CPU ms, ms waiting for a CPU and involuntary switches in that "
        "burst (to see which seconds make the p99)",
    )  # fmt: skip
    args = ap.parse_args()
    if args.seconds < 1 or args.stations < 1:
        ap.error("--seconds and --stations must be at least 1")
    args.mqtt_host = os.environ.get("IONWARDEN_TEST_MQTT_HOST", "127.0.0.1")
    args.mqtt_port = int(os.environ.get("IONWARDEN_TEST_MQTT_PORT", "1883"))
    if args.subscriber is None:
        args.subscriber = "mosquitto_sub" if shutil.which("mosquitto_sub") else "aiomqtt"
    elif args.subscriber == "mosquitto_sub" and shutil.which("mosquitto_sub") is None:
        ap.error("mosquitto_sub not found (Debian: apt-get install mosquitto-clients)")
    if not args.daemon.exists():
        ap.error(f"{args.daemon} not found: install the project into .venv first")
    tmp = Path(tempfile.mkdtemp(prefix="bench_e2e-"))
    try:
        rc = asyncio.run(run(args, tmp))
    except BenchError as exc:
        print(f"bench_e2e: error: {exc}", file=sys.stderr)
        rc = 1
    except KeyboardInterrupt:
        rc = 130
    finally:
        if args.keep_log:
            print(f"temp dir kept: {tmp}")
        else:
            shutil.rmtree(tmp, ignore_errors=True)
    sys.exit(rc)


if __name__ == "__main__":
    main()
