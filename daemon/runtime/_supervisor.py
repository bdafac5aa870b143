"""The daemon: one root TaskGroup (STYLE rule 13) owning every station, output and housekeeping task.

Task names: ``daemon.ingest[<station>]``, ``daemon.estimate[<station>]``, ``daemon.mqtt[broker]``,
``daemon.status[all]``, ``daemon.checkpoint[all]``.

Lifecycle under systemd (``Type=notify``):

* ``READY=1`` once every station made its first open attempt (a source that is down at start is
  retried in the background: waiting for it would block the unit forever), the exporter is bound,
  and MQTT connected or its first attempt failed (then it buffers and retries).
* ``WATCHDOG=1`` every half ``WatchdogSec`` — only while no station's estimate task is stuck
  (input waiting, nothing completed for a whole watchdog period). A wedged pipeline therefore gets
  the unit restarted; a receiver that is merely offline does not.
* ``STATUS=`` carries station health; SIGTERM/SIGINT stop gracefully (checkpoint, flush MQTT);
  SIGHUP reloads the config and restarts only stations whose config changed.

Shutdown budget: everything after SIGTERM fits in ``stop_timeout_s`` (default 4 s, under the 5 s
promise and systemd's ``TimeoutStopSec``): stations are cancelled together and given
:data:`STATION_STOP_GRACE_S`; MQTT gets what is left minus the publisher's
``GOODBYE_TIMEOUT_S`` to flush, then is cancelled and says "offline" within that goodbye time.
No ``asyncio.wait_for`` is used (on Python 3.11 it can lose a cancellation, CPython gh-86296);
a task still running after its grace is cancelled again, with an error logged.
"""

# size: ~550 lines: the root TaskGroup and everything it owns (stations, reload, tick,
# watchdog, shutdown order) in one place, so the lifetime of every task reads top to bottom.
from __future__ import annotations

import asyncio
import logging
import signal
import time
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Protocol

from ionwarden.daemon.estimator import FixStatus, StationSnapshot
from ionwarden.daemon.outputs import GOODBYE_TIMEOUT_S
from ionwarden.parsers import utc_to_gps

from ._burst import BurstTick
from ._checkpoint import load_checkpoint, save_checkpoint
from ._deferred_alarms import DeferredAlarms
from ._lane import StepLane
from ._notify import SdNotifier, watchdog_interval_s
from ._station import StationRunner
from ._station_records import SourceEvent, StationConfig, StationState
from ._summary import format_status, format_summary

if TYPE_CHECKING:
    import datetime as dt
    from collections.abc import Awaitable, Callable, Sequence
    from pathlib import Path

    from ionwarden.daemon.alarms import StationAlarms
    from ionwarden.daemon.outputs import DaemonSnapshot, MqttPublisher

    from ._core import StationCore
    from ._station_records import StationStatistics

__all__ = [
    "Daemon",
    "DaemonOptions",
    "SnapshotSink",
    "StationBundle",
    "run_under_signals",
    "tick_delay_s",
]

log = logging.getLogger("ionwarden.daemon.runtime")

#: Time a cancelled station's tasks get to finish (closing a transport is itself bounded to 1 s).
STATION_STOP_GRACE_S = 1.5


async def _cancel_and_wait(tasks: list[asyncio.Task[None]], grace_s: float) -> None:
    """Cancel ``tasks`` and wait up to ``grace_s`` for them; cancel any straggler once more.

    A task still running after its grace most likely had its cancellation swallowed (an
    ``asyncio.wait_for`` in a library, CPython gh-86296): a second cancel reaches it.
    """
    if not tasks:
        return
    for task in tasks:
        task.cancel()
    _done, pending = await asyncio.wait(tasks, timeout=grace_s)
    for task in pending:
        log.error(
            "task %s still running %.1f s after cancellation; cancelling it again",
            task.get_name(),
            grace_s,
        )
        task.cancel()
    if pending:
        await asyncio.wait(pending, timeout=grace_s)


def tick_delay_s(now_s: float, last_epoch_s: float | None, interval_s: float) -> float:
    """Seconds until the next status tick: midway between epoch bursts.

    Receivers put out their epochs on the GPS second, so every station's urgent step comes at the
    same phase of each interval. A tick that simply slept ``interval_s`` after the last one would
    drift through that phase by its own duration each time and, for a few seconds in every few
    hundred, hold a burst back behind its snapshot of every station (a background step that has
    begun is not interrupted). So the tick aims at half an interval after the latest epoch's
    arrival (``last_epoch_s``; None before the first: a plain interval), at least a quarter of an
    interval from now."""
    if last_epoch_s is None:
        return interval_s
    delay = (last_epoch_s + 0.5 * interval_s - now_s) % interval_s
    return delay + interval_s if delay < 0.25 * interval_s else delay


async def run_under_signals(
    main: Callable[[], Awaitable[int]],
    *,
    stop: Callable[[], None],
    reload: Callable[[], None],
    notifier: SdNotifier,
) -> int:
    """``await main()`` with SIGTERM/SIGINT asking ``stop`` and SIGHUP ``reload``; the handlers
    are removed and ``notifier`` closed (it is owned) when it returns."""
    loop = asyncio.get_running_loop()
    handlers = {signal.SIGTERM: stop, signal.SIGINT: stop, signal.SIGHUP: reload}
    for sig, fn in handlers.items():
        loop.add_signal_handler(sig, fn)
    try:
        return await main()
    finally:
        for sig in handlers:
            loop.remove_signal_handler(sig)
        notifier.close()


class SnapshotSink(Protocol):
    """Where the daemon's snapshots and epoch latencies go: the Prometheus ``Exporter``, or in a
    worker process (``[runtime] workers`` > 1) the link to the main process (``LinkSink``)."""

    def start(self) -> None: ...
    def close(self) -> None: ...
    def update(self, snapshot: DaemonSnapshot) -> None: ...
    def observe_epoch_latency(self, station: str, seconds: float) -> None: ...
    def observe_summary_delivery(self, station: str, seconds: float) -> None: ...


@dataclass(frozen=True, slots=True, kw_only=True)
class DaemonOptions:
    stations: tuple[StationConfig, ...]
    state_dir: Path | None = None
    checkpoint_interval_s: float = 300.0
    checkpoint_max_age_s: float = 6 * 3600.0
    summary_interval_s: float = 10.0
    status_interval_s: float = 1.0
    stop_timeout_s: float = 4.0
    #: Estimate the epochs of a burst as one tick (``_burst``; live sources).
    batch_estimates: int = 0
    #: Background steps wait up to this long (s) for the publisher's acknowledgements (0: not).
    ack_priority_s: float = 0.0
    #: Stop when every station's source has ended (replays, stdin); live sources never end.
    exit_when_sources_end: bool = True


@dataclass(frozen=True, slots=True, kw_only=True)
class StationBundle:
    """What the factory builds for one station: its core, and its alarms (optional)."""

    core: StationCore
    produces_epochs: bool
    alarms: StationAlarms | None = None


@dataclass(slots=True)
class _Running:
    runner: StationRunner
    bundle: StationBundle
    #: The bundle's alarms with the evaluation of its last snapshot pending (None: no alarms).
    alarms: DeferredAlarms | None
    tasks: list[asyncio.Task[None]] = field(default_factory=list)


class Daemon:
    """Run stations and outputs until stopped; see the module docstring."""

    def __init__(
        self,
        options: DaemonOptions,
        *,
        factory: Callable[[StationConfig], StationBundle],
        notifier: SdNotifier | None = None,  # owned: closed when run() returns
        exporter: SnapshotSink | None = None,
        publisher: MqttPublisher | None = None,
        build_snapshot: Callable[[Daemon, Sequence[StationStatistics]], DaemonSnapshot]
        | None = None,
        summary: Callable[[str], None] | None = None,
        reload: Callable[[], DaemonOptions] | None = None,
        wall_clock: Callable[[], float] = time.time,
        utc_now: Callable[[], dt.datetime] | None = None,
    ):
        self.options = options
        self._factory = factory
        self.notifier = notifier or SdNotifier("")
        self._exporter = exporter
        self._publisher = publisher
        if publisher is not None and exporter is not None:
            publisher.on_summary_delivered = exporter.observe_summary_delivery
        self._build_snapshot = build_snapshot
        self._summary = summary
        self._reload = reload
        self._wall = wall_clock
        self._utc_now = utc_now
        self._stations: dict[str, _Running] = {}
        #: One estimate step per loop iteration across stations (see _lane.py); background steps
        #: wait while the publisher awaits acknowledgements, ``ack_priority_s`` at most a hold.
        if publisher is not None and options.ack_priority_s > 0:
            self._lane = StepLane(publisher.awaiting_acks, options.ack_priority_s)
            publisher.on_acked = self._lane.open
        else:
            self._lane = StepLane()
        #: Every station's epoch of a burst estimated as one tick (see _burst.py).
        batch = self.options.batch_estimates
        cork = publisher.cork if publisher is not None else None
        self._burst = BurstTick(batch, cork) if batch > 1 else None
        self._stop = asyncio.Event()
        self._reload_requested = asyncio.Event()
        self._wake = asyncio.Event()  # stop, reload or a source ended
        self._tg: asyncio.TaskGroup | None = None
        self.ready = asyncio.Event()
        self.stats_history: dict[str, tuple[float, int]] = {}
        #: The last statistics of each station stopped (at shutdown or by a reload).
        self.stopped_statistics: dict[str, StationStatistics] = {}

    # -- control (sync, safe from signal handlers) --------------------------------------------------
    def request_stop(self) -> None:
        self._stop.set()
        self._wake.set()

    def request_reload(self) -> None:
        self._reload_requested.set()
        self._wake.set()

    def statistics(self) -> tuple[StationStatistics, ...]:
        return tuple(r.runner.statistics() for r in self._stations.values())

    def station_alarms(self) -> tuple[StationAlarms, ...]:
        """Every station's alarms; a snapshot's evaluation may still be pending (the state one
        epoch old) between its urgent step and its station's background turn (_deferred_alarms)."""
        return tuple(
            r.bundle.alarms for r in self._stations.values() if r.bundle.alarms is not None
        )

    # -- stations -----------------------------------------------------------------------------------
    def _emit_for(self, name: str) -> Callable[[object], None]:
        def emit(item: object) -> None:
            running = self._stations.get(name)
            alarms = running.alarms if running is not None else None
            if isinstance(item, StationSnapshot):
                # The summary first: the snapshot's alarm evaluation waits for the station's
                # background turn (DeferredAlarms), which publishes its transitions.
                if alarms is not None:
                    alarms.defer(item)
                pub = self._publisher
                if pub is not None:
                    arrived = running.runner.epoch_arrived_s if running is not None else None
                    if pub.publish_summary_nowait(item, arrived):  # the satellites message due:
                        if alarms is not None:  # formatted in the background turn too
                            alarms.defer_satellites(item)
                        else:
                            pub.publish_satellites_nowait(item)
            elif isinstance(item, FixStatus):
                if alarms is not None:
                    alarms.fix(item)
            elif isinstance(item, SourceEvent):
                log.debug("%s: source %s %s", item.station, item.state.value, item.detail)

        return emit

    def _start_station(self, cfg: StationConfig) -> _Running:
        assert self._tg is not None
        bundle = self._factory(cfg)
        opts = self.options
        if opts.state_dir is not None:
            state = load_checkpoint(
                opts.state_dir,
                cfg.name,
                fp=cfg.fingerprint,
                wall_time_s=self._wall(),
                max_age_s=opts.checkpoint_max_age_s,
            )
            if state is not None:
                try:
                    bundle.core.load_state_dict(state)
                except (
                    ValueError,
                    KeyError,
                    TypeError,
                ) as exc:  # from another version: start fresh
                    log.warning("%s: ignoring unusable checkpoint: %s", cfg.name, exc)
                else:
                    log.info("%s: restored checkpointed state", cfg.name)
        alarms = (
            DeferredAlarms(bundle.alarms, self._publisher) if bundle.alarms is not None else None
        )
        runner = StationRunner(
            cfg,
            bundle.core,
            emit=self._emit_for(cfg.name),
            produces_epochs=bundle.produces_epochs,
            on_finished=self._wake.set,
            on_latency=self._exporter.observe_epoch_latency if self._exporter is not None else None,
            lane=self._lane,
            also_settle=alarms,
            burst=self._burst,
        )
        running = _Running(runner=runner, bundle=bundle, alarms=alarms)
        self._stations[cfg.name] = running
        running.tasks = [
            self._tg.create_task(runner.ingest_loop(), name=f"daemon.ingest[{cfg.name}]"),
            self._tg.create_task(runner.estimate_loop(), name=f"daemon.estimate[{cfg.name}]"),
        ]
        if self._publisher is not None and bundle.alarms is not None:
            # retained state of every alarm of the station ("normal" at start), also after a reload
            self._publisher.publish_alarm_states_nowait(bundle.alarms.statuses())
        return running

    async def _stop_stations(self, names: list[str]) -> None:
        """Cancel the stations' tasks together, then evaluate a snapshot still waiting for its
        alarms (cancelled before its background turn), record statistics and write checkpoints."""
        stopping = [self._stations.pop(name) for name in names]
        await _cancel_and_wait([t for r in stopping for t in r.tasks], STATION_STOP_GRACE_S)
        for running in stopping:
            running.runner.settle_outputs()
            self.stopped_statistics[running.runner.name] = running.runner.statistics()
            self._checkpoint_one(running)

    def _checkpoint_one(self, running: _Running) -> None:
        """Write the station's checkpoint; a failure (disk full, read-only state directory) is
        logged and the daemon goes on: the next attempt may succeed, and a restart without a
        checkpoint only costs the minutes of start-up."""
        if self.options.state_dir is None:
            return
        cfg = running.runner.config
        try:
            state = running.bundle.core.state_dict()
            if state:
                save_checkpoint(
                    self.options.state_dir,
                    cfg.name,
                    state,
                    fp=cfg.fingerprint,
                    wall_time_s=self._wall(),
                )
        except (OSError, ValueError) as exc:
            log.error("station %s: checkpoint not written: %s", cfg.name, exc)

    def checkpoint_all(self) -> None:
        for running in self._stations.values():
            self._checkpoint_one(running)

    async def _apply_reload(self) -> None:
        assert self._reload is not None
        self.notifier.notify("RELOADING=1", "STATUS=reloading configuration")
        try:
            new = self._reload()
        except Exception:
            log.exception("reload failed; keeping the running configuration")
            self.notifier.notify("READY=1")
            return
        wanted = {c.name: c for c in new.stations}
        changed = [
            name
            for name, running in self._stations.items()
            if name not in wanted or wanted[name] != running.runner.config
        ]
        for name in changed:
            log.info("reload: stopping station %s", name)
        await self._stop_stations(changed)
        self.options = replace(new, stations=new.stations)
        for cfg in new.stations:
            if cfg.name not in self._stations:
                log.info("reload: starting station %s", cfg.name)
                self._start_station(cfg)
        self.notifier.notify("READY=1", f"STATUS={format_status(self.statistics())}")

    # -- housekeeping loops --------------------------------------------------------------------------
    def _publish_status(
        self, stats: Sequence[StationStatistics] | None = None
    ) -> DaemonSnapshot | None:
        """Serve a fresh snapshot to the exporter and evaluate the stall alarms; return the
        snapshot (``None`` without a snapshot builder) for the health message of the same tick.
        ``stats``: :meth:`statistics` of this instant, when the caller already has them (each
        station's costs a few frozen records: taken once per tick, not once per use).

        A station's alarm evaluation still waiting for its background turn is done first, so
        the alarm states served are the latest epoch's and a stall transition comes after its
        snapshot's ones (a background step too: nothing urgent waits for it)."""
        for running in self._stations.values():
            running.runner.settle_outputs()
        if stats is None:
            stats = self.statistics()
        snap = self._build_snapshot(self, stats) if self._build_snapshot is not None else None
        if self._exporter is not None and snap is not None:
            self._exporter.update(snap)
        if self._utc_now is not None:
            now_gps = utc_to_gps(self._utc_now())
            loop_now = asyncio.get_running_loop().time()
            for running, st in zip(self._stations.values(), stats, strict=True):
                alarms = running.alarms
                if alarms is None or st.state is StationState.FINISHED:
                    continue
                since = st.last_epoch_monotonic_s
                age = loop_now - (
                    since if since is not None else running.runner.started_monotonic_s
                )
                alarms.stall(age, now_gps)
        return snap

    async def _status_loop(self) -> None:
        loop = asyncio.get_running_loop()
        wd = watchdog_interval_s()
        opts = self.options
        last_wd = last_summary = loop.time()
        last_status = ""
        last_epoch_s: float | None = None
        lane = self._lane
        while True:
            await asyncio.sleep(tick_delay_s(loop.time(), last_epoch_s, opts.status_interval_s))
            # Aimed midway between bursts (tick_delay_s); as a background step it still waits for
            # the urgent steps of a burst that came early or late, instead of delaying the
            # stations behind it by its snapshot of every station.
            await lane.turn(background=True)
            try:
                now = loop.time()
                stats = self.statistics()
                last_epoch_s = max(
                    (
                        s.last_epoch_monotonic_s
                        for s in stats
                        if s.last_epoch_monotonic_s is not None
                    ),
                    default=None,
                )
                snap = self._publish_status(stats)
                status = format_status(stats)
                if status != last_status:
                    self.notifier.notify(f"STATUS={status}")
                    last_status = status
                if self._publisher is not None and snap is not None:
                    # every tick: the publisher rate-limits to one per its health_interval_s
                    self._publisher.publish_health_nowait(snap)
                if wd is not None and now - last_wd >= wd:
                    stuck = [
                        r.runner.name
                        for r in self._stations.values()
                        if r.runner.is_stuck(now, 2 * wd)
                    ]
                    if stuck:
                        log.error(
                            "pipeline stuck for stations %s: withholding the watchdog ping", stuck
                        )
                    else:
                        self.notifier.notify("WATCHDOG=1")
                        last_wd = now
                if (
                    self._summary is not None
                    and opts.summary_interval_s
                    and now - last_summary >= opts.summary_interval_s
                ):
                    self.print_summary(now, stats)
                    last_summary = now
            finally:
                lane.done()

    def print_summary(self, now: float, stats: Sequence[StationStatistics] | None = None) -> None:
        if self._summary is None:
            return
        for s in self.statistics() if stats is None else stats:
            prev = self.stats_history.get(s.station)
            rate = None
            if prev is not None and now > prev[0]:
                rate = (s.epochs_total - prev[1]) / (now - prev[0])
            self.stats_history[s.station] = (now, s.epochs_total)
            self._summary(format_summary(s, epoch_rate_hz=rate))

    async def _checkpoint_loop(self) -> None:
        interval = self.options.checkpoint_interval_s
        lane = self._lane
        while True:
            await asyncio.sleep(interval)
            # One background step per station (its state and a file write with fsync: ~1 + 4-11
            # ms each here, more on an SD card), so that a burst of epochs waits for one
            # station's write at most, not for every station's.
            for name in list(self._stations):
                await lane.turn(background=True)
                try:
                    running = self._stations.get(name)  # a reload may have stopped it meanwhile
                    if running is not None:
                        self._checkpoint_one(running)
                finally:
                    lane.done()

    # -- main ---------------------------------------------------------------------------------------
    async def run(self) -> int:
        """Run until SIGTERM/SIGINT (or every finite source ended); return the exit status."""
        return await run_under_signals(
            self._run, stop=self.request_stop, reload=self.request_reload, notifier=self.notifier
        )

    async def _run(self) -> int:
        opts = self.options
        if self._exporter is not None:
            self._exporter.start()
        try:
            async with asyncio.TaskGroup() as tg:
                self._tg = tg
                mqtt_task = None
                if self._publisher is not None:
                    mqtt_task = tg.create_task(self._publisher.run(), name="daemon.mqtt[broker]")
                for cfg in opts.stations:
                    self._start_station(cfg)
                await asyncio.gather(*(r.runner.started.wait() for r in self._stations.values()))
                if self._publisher is not None:
                    await self._publisher.wait_ready()
                stats = self.statistics()
                self._publish_status(stats)
                self.notifier.notify("READY=1", f"STATUS={format_status(stats)}")
                self.ready.set()
                log.info("ready: %d station(s)", len(self._stations))
                housekeeping = [tg.create_task(self._status_loop(), name="daemon.status[all]")]
                if opts.state_dir is not None and opts.checkpoint_interval_s > 0:
                    housekeeping.append(
                        tg.create_task(self._checkpoint_loop(), name="daemon.checkpoint[all]")
                    )
                await self._wait_for_stop()
                await self._shutdown(housekeeping, mqtt_task)
        finally:
            if self._exporter is not None:
                self._exporter.close()
        return 0

    async def _wait_for_stop(self) -> None:
        while True:
            await self._wake.wait()
            self._wake.clear()
            if self._stop.is_set():
                return
            if self._reload_requested.is_set():
                self._reload_requested.clear()
                if self._reload is not None:
                    await self._apply_reload()
                else:
                    log.warning("SIGHUP: no configuration file to reload")
            runners = [r.runner for r in self._stations.values()]
            if (
                self.options.exit_when_sources_end
                and runners
                and all(r.finished.is_set() for r in runners)
            ):
                log.info("every source has ended")
                if self._summary is not None:
                    self.print_summary(asyncio.get_running_loop().time())
                return

    async def _shutdown(
        self, housekeeping: list[asyncio.Task[None]], mqtt_task: asyncio.Task[None] | None
    ) -> None:
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self.options.stop_timeout_s
        self.notifier.notify("STOPPING=1", "STATUS=stopping")
        log.info("stopping")
        await self._stop_stations(list(self._stations))  # also writes each checkpoint
        await _cancel_and_wait(housekeeping, STATION_STOP_GRACE_S)
        self._publish_status()
        if self._publisher is not None and mqtt_task is not None:
            self._publisher.stop()  # flush, then "offline"
            flush_s = max(0.0, deadline - GOODBYE_TIMEOUT_S - loop.time())
            done, _pending = await asyncio.wait([mqtt_task], timeout=flush_s)
            if not done:
                log.warning("MQTT flush did not finish within %.1f s; dropping the rest", flush_s)
                # cancelled, the publisher still says "offline", bounded by GOODBYE_TIMEOUT_S
                await _cancel_and_wait([mqtt_task], GOODBYE_TIMEOUT_S + 0.5)
