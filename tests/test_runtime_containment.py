"""Pipeline containment: a station pipeline step that raises is dropped, counted, logged with a rate
limit and, when it keeps failing, reset; other stations run on (stand-in cores that raise, on a
virtual clock against real files)."""

from __future__ import annotations

import asyncio
import logging
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry, generate_latest

from ionwarden.daemon.config import PrometheusSettings
from ionwarden.daemon.ingest import FileSource
from ionwarden.daemon.outputs import DaemonSnapshot, Exporter, StationFigures
from ionwarden.daemon.runtime import (
    PIPELINE_RESET_AFTER,
    StationConfig,
    StationRunner,
    run_virtual,
)
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle

from ._runtime_support import StandInCore, rtcm_frame

FRAME_BYTES = len(rtcm_frame(1077, bytes(4)))


def _capture(tmp_path: Path, name: str, n: int) -> Path:
    """``n`` RTCM 1077-typed frames carrying sequence numbers 0..n-1 (one epoch each)."""
    path = tmp_path / f"{name}.bin"
    path.write_bytes(b"".join(rtcm_frame(1077, i.to_bytes(4, "big")) for i in range(n)))
    return path


def _cfg(name: str, path: Path) -> StationConfig:
    # one frame per read, so each pipeline step carries exactly one epoch
    return StationConfig(name=name, source=FileSource(path=str(path)), read_size=FRAME_BYTES)


class FailingCore(StandInCore):
    """A stand-in pipeline that raises ``FloatingPointError`` on the given sequence numbers."""

    def __init__(self, bad: set[int] | None = None):
        super().__init__()
        self.bad = bad
        self.resets = 0

    def feed_frames(self, frames: Any) -> list[object]:
        for f in frames:
            seq = int.from_bytes(f.payload[2:6], "big")
            if self.bad is None or seq in self.bad:
                raise FloatingPointError(f"overflow encountered at epoch {seq}")
        return super().feed_frames(frames)

    def reset(self) -> None:
        super().reset()
        self.resets += 1


def _seqs(core: StandInCore) -> list[int]:
    return [int.from_bytes(p[2:6], "big") for p in core.seen]


async def _run_station(cfg: StationConfig, core: StandInCore) -> StationRunner:
    runner = StationRunner(cfg, core, emit=lambda _item: None)
    async with asyncio.TaskGroup() as tg:
        tg.create_task(runner.ingest_loop(), name=f"daemon.ingest[{cfg.name}]")
        tg.create_task(runner.estimate_loop(), name=f"daemon.estimate[{cfg.name}]")
    return runner


def test_station_contains_one_failing_pipeline_step(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """StationRunner drops, counts and logs one failing step and keeps every other epoch when the
    pipeline raises once."""
    core = FailingCore({3})
    cfg = _cfg("st1", _capture(tmp_path, "a", 8))
    with caplog.at_level(logging.WARNING, logger="ionwarden.daemon.runtime"):
        runner = run_virtual(_run_station(cfg, core))
    st = runner.statistics()
    assert _seqs(core) == [0, 1, 2, 4, 5, 6, 7]
    assert (st.pipeline_errors_total, st.pipeline_resets_total, core.resets) == (1, 0, 0)
    errors = [r for r in caplog.records if r.levelno >= logging.ERROR]
    assert len(errors) == 1
    assert "FloatingPointError" in errors[0].getMessage()
    assert errors[0].exc_info is not None


def test_station_resets_its_pipeline_after_repeated_failures(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """StationRunner resets the station's core after PIPELINE_RESET_AFTER failing steps in a row
    and logs each exception type once per interval when failures repeat."""
    bad = set(range(2, 2 + 2 * PIPELINE_RESET_AFTER + 1))
    core = FailingCore(bad)
    cfg = _cfg("st1", _capture(tmp_path, "a", 12))
    with caplog.at_level(logging.WARNING, logger="ionwarden.daemon.runtime"):
        runner = run_virtual(_run_station(cfg, core))
    st = runner.statistics()
    assert st.pipeline_errors_total == len(bad)
    assert st.pipeline_resets_total == core.resets == 2
    assert _seqs(core) == [i for i in range(12) if i not in bad]
    failed = [r for r in caplog.records if "pipeline step failed" in r.getMessage()]
    resets = [r for r in caplog.records if "resetting" in r.getMessage()]
    assert (len(failed), len(resets)) == (1, 1)  # each kind logged once per interval


def test_daemon_keeps_other_stations_running_when_one_pipeline_always_fails(
    tmp_path: Path,
) -> None:
    """Daemon runs every other station to the end when one station's pipeline raises on every step."""
    cores = {"bad": FailingCore(None), "good": StandInCore()}

    def factory(cfg: StationConfig) -> StationBundle:
        return StationBundle(core=cores[cfg.name], produces_epochs=False)

    opts = DaemonOptions(
        stations=tuple(_cfg(n, _capture(tmp_path, n, 10)) for n in cores), summary_interval_s=0
    )
    daemon = Daemon(opts, factory=factory)

    assert run_virtual(daemon.run()) == 0
    stats = daemon.stopped_statistics
    assert _seqs(cores["good"]) == list(range(10))
    assert (stats["good"].pipeline_errors_total, stats["good"].epochs_total) == (0, 0)
    assert stats["bad"].pipeline_errors_total == 10  # one per frame (one frame per step)
    assert stats["bad"].pipeline_resets_total == 10 // PIPELINE_RESET_AFTER


def test_exporter_serves_the_pipeline_error_counters() -> None:
    """Exporter exports each station's contained pipeline errors and resets as counters."""
    registry = CollectorRegistry()
    exporter = Exporter(PrometheusSettings(), registry=registry, monotonic=lambda: 0.0)
    exporter.update(
        DaemonSnapshot(
            stations=(
                StationFigures(station="a", pipeline_errors_total=5, pipeline_resets_total=1),
            )
        )
    )
    text = generate_latest(registry).decode()
    assert 'ionwarden_station_pipeline_errors_total{station="a"} 5.0' in text
    assert 'ionwarden_station_pipeline_resets_total{station="a"} 1.0' in text


def test_station_summarises_suppressed_pipeline_errors_after_the_log_interval(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """StationRunner logs a repeated error again after PIPELINE_LOG_INTERVAL_S with the count of
    those it suppressed meanwhile."""
    from .test_runtime_faults import _snapshot

    class PacedFailingCore(FailingCore):
        def feed_frames(self, frames: Any) -> list[object]:
            return [
                _snapshot(1000.0 + 100.0 * int.from_bytes(item[1][2:6], "big"))  # type: ignore[index]
                for item in super().feed_frames(frames)
            ]

    core = PacedFailingCore({1, 2, 4})  # epochs are 100 s of data apart, replayed in real time
    path = _capture(tmp_path, "a", 5)
    cfg = StationConfig(
        name="st1", source=FileSource(path=str(path), speed=1.0), read_size=FRAME_BYTES
    )
    with caplog.at_level(logging.WARNING, logger="ionwarden.daemon.runtime"):
        runner = run_virtual(_run_station(cfg, core))
    assert runner.statistics().pipeline_errors_total == 3
    failed = [r.getMessage() for r in caplog.records if "pipeline step failed" in r.getMessage()]
    assert len(failed) == 2  # epoch 1 logged, 2 suppressed, 4 logged 300 s later with the count
    assert "1 more like it in the last 300 s" in failed[1]


def test_station_counts_a_decode_error_of_its_deferred_step_as_a_decode_error(
    tmp_path: Path,
) -> None:
    """The deferred step (``settle``: it decodes the frames held back after an epoch) is contained
    like the step itself: a ParseError there counts as a decode error, not a pipeline failure,
    and the station runs on."""
    from ionwarden.daemon.errors import ParseError

    class DeferringCore(StandInCore):
        def __init__(self) -> None:
            super().__init__()
            self.pending = False
            self.settled = 0

        def feed_frames(self, frames: Any) -> list[object]:
            self.pending = True
            return super().feed_frames(frames)

        def unsettled(self) -> bool:
            return self.pending

        def settle(self) -> list[object]:
            self.pending = False
            self.settled += 1
            if self.settled == 2:
                raise ParseError("bad sentence in the held-back frames", message_id="NMEA")
            return []

    core = DeferringCore()
    runner = run_virtual(_run_station(_cfg("st1", _capture(tmp_path, "a", 5)), core))
    st = runner.statistics()
    assert _seqs(core) == [0, 1, 2, 3, 4]
    assert core.settled == 5
    assert (st.decode_errors_total, st.pipeline_errors_total) == (1, 0)


def test_station_settles_its_outputs_deferred_work_after_each_step(tmp_path: Path) -> None:
    """``also_settle`` (the alarms' deferred baseline learning) gets a background step after
    every step that left it pending, even when the core itself has nothing to settle, and after
    that step's outputs were emitted; every epoch's work is done exactly once."""
    events: list[str] = []

    class Learning:  # as StationAlarms: observe_snapshot defers, settling what was pending
        def __init__(self) -> None:
            self.pending = False

        def observe(self, item: object) -> None:
            if not isinstance(item, tuple):  # source events go to the emit callback too
                return
            if self.pending:
                events.append("learn in observe")
            self.pending = True

        def unsettled(self) -> bool:
            return self.pending

        def settle(self) -> None:
            assert self.pending
            self.pending = False
            events.append("learn in settle")

    also = Learning()

    async def main() -> None:
        cfg = _cfg("st1", _capture(tmp_path, "a", 5))  # one epoch per step
        runner = StationRunner(cfg, StandInCore(), emit=also.observe, also_settle=also)
        async with asyncio.TaskGroup() as tg:
            tg.create_task(runner.ingest_loop(), name="daemon.ingest[st1]")
            tg.create_task(runner.estimate_loop(), name="daemon.estimate[st1]")

    run_virtual(main())
    assert events == ["learn in settle"] * 5
