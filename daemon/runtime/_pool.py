"""The main process when ``[runtime] workers`` > 1: worker processes share the stations.

Python runs one thread of bytecode at a time, so one process handles the epochs of its stations
one after the other; receivers align epochs to the GPS second, so the last station's summary waits
for every other station's step (issue 8). With N workers, each runs the stations assigned to it
exactly as a one-process daemon would (ingest, estimator, alarms, checkpoints, and its own MQTT
connection for its stations' topics), and this process:

* assigns the stations: round-robin in config order at start; on SIGHUP a station keeps its
  worker, a new one goes to the worker with the fewest, a removed one leaves (a station never
  moves, so its checkpoint is never read by one worker while another still writes it);
* serves the Prometheus exporter from the workers' reports (one port whatever N), and publishes
  the daemon's status (with the MQTT last will) and the health message for all of them;
* speaks to systemd for all: ``READY=1`` once every worker is ready, ``WATCHDOG=1`` only while
  every running worker pings, ``STATUS=`` from theirs;
* restarts a worker that dies (backoff from 1 s doubling to 30 s; its stations resume from their
  checkpoints), forwards SIGTERM (each worker flushes and announces its stations offline within
  ``stop_timeout_s``) and SIGHUP (each worker reloads its share).

Workers run in their own session (a terminal's Ctrl-C reaches only this process, which stops them
in order) and stop by themselves when this process dies (their link ends). A worker whose sources
all end (file replays) exits 0 and is not restarted; when every worker has ended, so does the
daemon.
"""

# size: ~500 lines: the main process of worker processes: assignment, restart with
# backoff, merging reports, systemd and MQTT on their behalf; one owner for the workers' lifetimes.
from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import signal
import socket
from dataclasses import dataclass
from typing import TYPE_CHECKING

from ionwarden.daemon.outputs import GOODBYE_TIMEOUT_S, DaemonSnapshot, MqttStatistics

from ._backoff import backoff_delays
from ._link import Assign, Link, LinkError, Notify, Report
from ._notify import SdNotifier, watchdog_interval_s
from ._summary import MAX_STATUS_CHARS
from ._supervisor import run_under_signals, tick_delay_s

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable, Mapping, Sequence

    from ionwarden.daemon.outputs import Exporter, MqttPublisher

__all__ = ["WorkerPool", "assign_stations", "merge_mqtt", "merge_snapshots", "worker_environment"]

log = logging.getLogger("ionwarden.daemon.runtime.workers")

#: Restart backoff of a worker that died: first delay and ceiling (s).
RESTART_INITIAL_S = 1.0
RESTART_CAP_S = 30.0
#: A worker that ran this long before dying starts its backoff afresh.
RESTART_RESET_AFTER_S = 60.0


def assign_stations(
    names: Sequence[str], workers: int, previous: Sequence[Sequence[str]] | None = None
) -> tuple[tuple[str, ...], ...]:
    """The stations of each of ``workers`` workers, each in config order.

    Without ``previous``: round-robin in config order (a burst's stations split evenly). With it
    (a reload): each kept station stays where it was, removed ones leave, new ones go one by one
    to the worker with the fewest (the lowest index on a tie)."""
    if workers < 1:
        raise ValueError("workers must be at least 1")
    if previous is None:
        return tuple(tuple(names[i::workers]) for i in range(workers))
    wanted = set(names)
    shards = [[n for n in shard if n in wanted] for shard in previous][:workers]
    shards += [[] for _ in range(workers - len(shards))]
    placed = {n for shard in shards for n in shard}
    for name in names:
        if name not in placed:
            min(shards, key=len).append(name)  # min() keeps the first of equals
            placed.add(name)
    order = {n: i for i, n in enumerate(names)}
    return tuple(tuple(sorted(shard, key=order.__getitem__)) for shard in shards)


def merge_mqtt(parts: Iterable[MqttStatistics | None]) -> MqttStatistics | None:
    """The connections of the main process and the workers, as one: connected only when every
    one is; buffers, counters summed."""
    got = [p for p in parts if p is not None]
    if not got:
        return None
    return MqttStatistics(
        connected=all(p.connected for p in got),
        buffered_alarm=sum(p.buffered_alarm for p in got),
        buffered_epoch=sum(p.buffered_epoch for p in got),
        published_total=sum(p.published_total for p in got),
        dropped_epoch_total=sum(p.dropped_epoch_total for p in got),
        dropped_alarm_total=sum(p.dropped_alarm_total for p in got),
        connects_total=sum(p.connects_total for p in got),
        disconnects_total=sum(p.disconnects_total for p in got),
    )


def merge_snapshots(
    parts: Sequence[DaemonSnapshot],
    *,
    order: Sequence[str],
    mqtt: MqttStatistics | None,
    started_s: float,
) -> DaemonSnapshot:
    """One snapshot of every worker's, stations in config ``order`` (unknown names last)."""
    rank = {n: i for i, n in enumerate(order)}
    last = len(rank)
    stations = sorted(
        (s for p in parts for s in p.stations), key=lambda s: rank.get(s.station, last)
    )
    alarms = sorted((a for p in parts for a in p.alarms), key=lambda a: rank.get(a.station, last))
    queues = sorted((q for p in parts for q in p.queues), key=lambda q: rank.get(q.station, last))
    return DaemonSnapshot(
        stations=tuple(stations),
        alarms=tuple(alarms),
        queues=tuple(queues),
        mqtt=merge_mqtt([mqtt, *(p.mqtt for p in parts)]),
        started_monotonic_s=started_s,
    )


def worker_environment(environ: Mapping[str, str] | None = None) -> dict[str, str]:
    """A worker's environment: this one without systemd's notification socket and watchdog PID
    (a worker reports to this process, which alone speaks to systemd; ``WATCHDOG_USEC`` stays, so
    that the worker pings over its link at the same rate)."""
    env = dict(os.environ if environ is None else environ)
    for key in ("NOTIFY_SOCKET", "WATCHDOG_PID"):
        env.pop(key, None)
    return env


@dataclass(slots=True, eq=False)
class _Worker:
    index: int
    stations: tuple[str, ...]
    proc: asyncio.subprocess.Process | None = None
    link: Link | None = None
    report: DaemonSnapshot | None = None
    ready: bool = False
    status: str = ""
    last_ping_s: float = 0.0
    ended: bool = False  # exited 0 by itself: every source ended
    restarts: int = 0


class WorkerPool:
    """Run ``workers`` worker processes over ``stations``; see the module docstring.

    ``command(fd)`` is a worker's command line, given the descriptor of its end of the link.
    ``reload()`` re-reads the configuration and returns the enabled stations' names (it raises on
    an invalid file: the running configuration stays). The exporter, publisher and notifier are
    the main process's own (the publisher with ``daemon_status=True``, and no station of its own).
    """

    def __init__(
        self,
        stations: Sequence[str],
        *,
        workers: int,
        command: Callable[[int], list[str]],
        exporter: Exporter | None = None,
        publisher: MqttPublisher | None = None,
        notifier: SdNotifier | None = None,  # owned: closed when run() returns
        reload: Callable[[], Sequence[str]] | None = None,
        started_s: float = 0.0,
        stop_timeout_s: float = 4.0,
        status_interval_s: float = 1.0,
        environ: Mapping[str, str] | None = None,
    ) -> None:
        n = max(1, min(workers, len(stations)))
        self._order = tuple(stations)
        self._workers = [
            _Worker(index=i, stations=shard) for i, shard in enumerate(assign_stations(stations, n))
        ]
        self._command = command
        self._exporter = exporter
        self._publisher = publisher
        self.notifier = notifier or SdNotifier("")
        self._reload = reload
        self._started_s = started_s
        self._stop_timeout_s = stop_timeout_s
        self._status_interval_s = status_interval_s
        self._env = worker_environment(environ)
        self._tg: asyncio.TaskGroup | None = None
        self._wake = asyncio.Event()
        self._stop = asyncio.Event()
        self._reload_requested = asyncio.Event()
        self.ready = asyncio.Event()

    # -- control ------------------------------------------------------------------------------
    def request_stop(self) -> None:
        self._stop.set()
        self._wake.set()

    def request_reload(self) -> None:
        self._reload_requested.set()
        self._wake.set()

    @property
    def assignment(self) -> tuple[tuple[str, ...], ...]:
        return tuple(w.stations for w in self._workers)

    def snapshot(self) -> DaemonSnapshot:
        """Every worker's last report, merged, with the main process's MQTT connection."""
        return merge_snapshots(
            [w.report for w in self._workers if w.report is not None],
            order=self._order,
            mqtt=self._publisher.statistics() if self._publisher is not None else None,
            started_s=self._started_s,
        )

    def status(self) -> str:
        parts = [w.status for w in self._workers if w.status and not w.ended]
        down = [str(w.index) for w in self._workers if not w.ended and not w.ready]
        text = f"{len(self._workers)} workers: " + "; ".join(parts or ["starting"])
        if down:
            text += f"; worker {', '.join(down)} not ready"
        return text[: MAX_STATUS_CHARS - 1] + "…" if len(text) > MAX_STATUS_CHARS else text

    # -- main -----------------------------------------------------------------------------------
    async def run(self) -> int:
        """Run until SIGTERM/SIGINT (or every worker's sources ended); return the exit status."""
        return await run_under_signals(
            self._run, stop=self.request_stop, reload=self.request_reload, notifier=self.notifier
        )

    async def _run(self) -> int:
        if self._exporter is not None:
            self._exporter.start()
        try:
            async with asyncio.TaskGroup() as tg:
                self._tg = tg
                mqtt_task = None
                if self._publisher is not None:
                    mqtt_task = tg.create_task(self._publisher.run(), name="daemon.mqtt[broker]")
                watchers = [
                    tg.create_task(self._worker_loop(w), name=f"daemon.worker[{w.index}]")
                    for w in self._workers
                ]
                log.info(
                    "%d workers: %s",
                    len(self._workers),
                    "; ".join(f"{w.index}: {', '.join(w.stations)}" for w in self._workers),
                )
                await self._wait_until(
                    lambda: all(w.ready or w.ended for w in self._workers) or self._stop.is_set()
                )
                if self._publisher is not None:
                    await self._publisher.wait_ready()
                self._serve_snapshot()
                self.notifier.notify("READY=1", f"STATUS={self.status()}")
                self.ready.set()
                log.info("ready: %d station(s) in %d workers", len(self._order), len(self._workers))
                tick = tg.create_task(self._status_loop(), name="daemon.status[all]")
                await self._wait_for_stop()
                await self._shutdown(tick, watchers, mqtt_task)
        finally:
            if self._exporter is not None:
                self._exporter.close()
        return 0

    async def _wait_until(self, done: Callable[[], bool]) -> None:
        while not done():
            await self._wake.wait()
            self._wake.clear()

    async def _wait_for_stop(self) -> None:
        while True:
            if self._stop.is_set():
                return
            if self._reload_requested.is_set():
                self._reload_requested.clear()
                self._apply_reload()
            if all(w.ended for w in self._workers):
                log.info("every worker's sources have ended")
                return
            await self._wake.wait()
            self._wake.clear()

    def _apply_reload(self) -> None:
        if self._reload is None:
            log.warning("SIGHUP: no configuration file to reload")
            return
        self.notifier.notify("RELOADING=1", "STATUS=reloading configuration")
        try:
            names = tuple(self._reload())
        except Exception:
            log.exception("reload failed; keeping the running configuration")
            self.notifier.notify("READY=1")
            return
        shards = assign_stations(names, len(self._workers), self.assignment)
        self._order = names
        for w, shard in zip(self._workers, shards, strict=True):
            if shard != w.stations:
                log.info("reload: worker %d now runs %s", w.index, ", ".join(shard) or "nothing")
            w.stations = shard
            if w.link is not None:
                w.link.send(
                    Assign(shard, w.index)
                )  # the worker reloads its share (SIGHUP semantics)
        self.notifier.notify("READY=1", f"STATUS={self.status()}")

    # -- one worker ------------------------------------------------------------------------------
    async def _worker_loop(self, w: _Worker) -> None:
        loop = asyncio.get_running_loop()
        delays = backoff_delays(initial_s=RESTART_INITIAL_S, cap_s=RESTART_CAP_S)
        while not self._stop.is_set():
            t0 = loop.time()
            try:
                rc = await self._run_worker(w)
            except OSError as exc:  # the interpreter cannot be started: retried like a crash
                log.error("worker %d could not be started: %s", w.index, exc)
                rc = None
            if self._stop.is_set():  # stopped with the rest, or killed for being late
                return
            if rc == 0:
                w.ended = True
                log.info("worker %d: every source of %s ended", w.index, ", ".join(w.stations))
                self._wake.set()
                return
            self._announce_offline(w)
            if loop.time() - t0 >= RESTART_RESET_AFTER_S:
                delays = backoff_delays(initial_s=RESTART_INITIAL_S, cap_s=RESTART_CAP_S)
            delay = next(delays)
            w.restarts += 1
            log.error(
                "worker %d (stations %s) exited with status %s; restarting in %.1f s",
                w.index,
                ", ".join(w.stations),
                rc,
                delay,
            )
            await asyncio.sleep(delay)

    async def _run_worker(self, w: _Worker) -> int | None:
        """Start ``w``, serve its link until it ends; its exit status."""
        parent, child = socket.socketpair(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            proc = await asyncio.create_subprocess_exec(
                *self._command(child.fileno()),
                pass_fds=(child.fileno(),),
                stdin=asyncio.subprocess.DEVNULL,
                env=self._env,
                start_new_session=True,
            )
        except BaseException:
            parent.close()
            raise
        finally:
            child.close()
        link = await Link.open(parent)
        w.proc, w.link, w.ready, w.report = proc, link, False, None
        link.send(Assign(w.stations, w.index))
        try:
            while (message := await link.receive()) is not None:
                if isinstance(message, Report):
                    w.report = message.snapshot
                    if self._exporter is not None:
                        for station, seconds in message.latencies:
                            self._exporter.observe_epoch_latency(station, seconds)
                        for station, seconds in message.deliveries:
                            self._exporter.observe_summary_delivery(station, seconds)
                    self._serve_snapshot()
                elif isinstance(message, Notify):
                    self._on_notify(w, message.fields)
        except LinkError as exc:
            log.error("worker %d: %s; stopping it", w.index, exc)
            with contextlib.suppress(ProcessLookupError):
                proc.kill()
        finally:
            link.close()
            w.link = None
            w.ready = False
        rc = await proc.wait()
        w.proc = None
        self._wake.set()
        return rc

    def _announce_offline(self, w: _Worker) -> None:
        """A worker died without its goodbye: its stations' retained status says "offline" until
        the restarted worker's first epochs (consumers must not read a dead station as live)."""
        if self._publisher is None:
            return
        figures = {f.station: f for f in w.report.stations} if w.report is not None else {}
        for station in w.stations:
            f = figures.get(station)
            last = f.snapshot.time if f is not None and f.snapshot is not None else None
            self._publisher.announce_station_nowait(station, "offline", last)

    def _on_notify(self, w: _Worker, fields: Sequence[str]) -> None:
        for f in fields:
            if f == "READY=1":
                w.last_ping_s = asyncio.get_running_loop().time()  # alive: its pings start now
                if not w.ready:
                    w.ready = True
                    self._wake.set()
            elif f == "WATCHDOG=1":
                w.last_ping_s = asyncio.get_running_loop().time()
            elif f.startswith("STATUS="):
                w.status = f[len("STATUS=") :]

    # -- housekeeping ----------------------------------------------------------------------------
    def _serve_snapshot(self) -> DaemonSnapshot:
        snap = self.snapshot()
        if self._exporter is not None:
            self._exporter.update(snap)
        return snap

    async def _status_loop(self) -> None:
        loop = asyncio.get_running_loop()
        wd = watchdog_interval_s()
        last_wd = loop.time()
        last_status = ""
        last_epoch_s: float | None = None
        while True:
            # midway between bursts, as the workers' own ticks (whose reports it serves)
            await asyncio.sleep(tick_delay_s(loop.time(), last_epoch_s, self._status_interval_s))
            now = loop.time()
            snap = self._serve_snapshot()
            last_epoch_s = max(
                (
                    s.last_epoch_monotonic_s
                    for s in snap.stations
                    if s.last_epoch_monotonic_s is not None
                ),
                default=None,
            )
            if self._publisher is not None:
                self._publisher.publish_health_nowait(snap)  # rate-limited by the publisher
            status = self.status()
            if status != last_status:
                self.notifier.notify(f"STATUS={status}")
                last_status = status
            if wd is not None and now - last_wd >= wd:
                # A worker that is running but has not pinged for a whole WatchdogSec (plus two of
                # its ticks: it pings from its status tick, at most every wd) is wedged: withhold
                # the ping, so that systemd restarts the unit. One being restarted is excused.
                limit = 2 * wd + 2 * self._status_interval_s
                silent = [
                    w.index
                    for w in self._workers
                    if w.proc is not None and w.ready and now - w.last_ping_s > limit
                ]
                if silent:
                    log.error("workers %s stopped pinging: withholding the watchdog ping", silent)
                else:
                    self.notifier.notify("WATCHDOG=1")
                    last_wd = now

    async def _shutdown(
        self,
        tick: asyncio.Task[None],
        watchers: list[asyncio.Task[None]],
        mqtt_task: asyncio.Task[None] | None,
    ) -> None:
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self._stop_timeout_s + GOODBYE_TIMEOUT_S
        self._stop.set()  # no worker is restarted from now on
        tick.cancel()  # no STATUS= after STOPPING=1
        await asyncio.wait([tick], timeout=1.0)
        self.notifier.notify("STOPPING=1", "STATUS=stopping")
        log.info("stopping %d workers", len(self._workers))
        procs = [w.proc for w in self._workers if w.proc is not None]
        for proc in procs:
            with contextlib.suppress(ProcessLookupError):
                proc.send_signal(signal.SIGTERM)
        assert self._tg is not None
        waits = [self._tg.create_task(p.wait(), name="daemon.worker[exit]") for p in procs]
        if waits:
            # each worker has its own stop_timeout_s (stations, MQTT flush, "offline")
            _done, pending = await asyncio.wait(waits, timeout=self._stop_timeout_s + 0.5)
            for proc in procs:
                if proc.returncode is None:
                    log.error("worker pid %d did not stop in time; killing it", proc.pid)
                    with contextlib.suppress(ProcessLookupError):
                        proc.kill()
            if pending:
                await asyncio.wait(pending, timeout=1.0)
        for task in watchers:
            task.cancel()
        await asyncio.wait(watchers, timeout=1.0)
        if self._publisher is not None and mqtt_task is not None:
            self._publisher.stop()  # the daemon's "offline"
            done, _pending = await asyncio.wait(
                [mqtt_task], timeout=max(0.5, deadline - loop.time())
            )
            if not done:
                mqtt_task.cancel()
                await asyncio.wait([mqtt_task], timeout=GOODBYE_TIMEOUT_S + 0.5)
