"""20 simulated stations in one daemon through the FULL pipeline (issue 7): real framer, decoder,
estimator and alarms per station, fed over loopback TCP at 1 Hz on a virtual clock."""

from __future__ import annotations

import asyncio
import math

import pytest

from ionwarden.daemon.config import Settings, StationSettings
from ionwarden.daemon.ingest import TcpSource
from ionwarden.daemon.runtime import StallLimits, StationConfig, StationState, run_virtual
from ionwarden.daemon.runtime._app import make_factory
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream

from ._runtime_support import ScriptedServer

N_STATIONS = 20
SECONDS = 40


@pytest.fixture(scope="module")
def epoch_chunks() -> list[bytes]:
    """One simulated receiver's stream (our own quiet-day scenario), one chunk per 1 Hz epoch."""
    sim = Simulator(build_scenario("quiet-day", duration_s=SECONDS + 5, seed=11))
    return [chunk for _, chunk in iter_stream(sim, 0, msm_level=4)]


@pytest.mark.integration
def test_daemon_runs_20_full_pipelines_without_queue_growth(epoch_chunks: list[bytes]) -> None:
    """Daemon with 20 real station pipelines at 1 Hz: every station streams and estimates, queues
    stay shallow, nothing is dropped and no pipeline step fails."""

    async def push(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        for chunk in epoch_chunks:  # like a receiver: one epoch's bytes each second
            w.write(chunk)
            await w.drain()
            await asyncio.sleep(1.0)
        await asyncio.sleep(3600)

    async def main() -> list:
        servers = [ScriptedServer(push) for _ in range(N_STATIONS)]
        for s in servers:
            await s.__aenter__()
        try:
            names = [f"rx{i:02d}" for i in range(N_STATIONS)]
            settings = Settings(
                stations=[
                    StationSettings(name=n, source=f"tcp://127.0.0.1:{s.port}")
                    for n, s in zip(names, servers, strict=True)
                ]
            )
            opts = DaemonOptions(
                stations=tuple(
                    StationConfig(
                        name=n,
                        source=TcpSource(host="127.0.0.1", port=s.port),
                        stall=StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60),
                        queue_size=64,
                        fingerprint=n,
                    )
                    for n, s in zip(names, servers, strict=True)
                ),
                summary_interval_s=0,
            )
            daemon = Daemon(opts, factory=make_factory(settings))
            async with asyncio.TaskGroup() as tg:
                run = tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await asyncio.sleep(SECONDS)
                stats = daemon.statistics()
                daemon.request_stop()
            assert run.result() == 0
            return list(stats)
        finally:
            for s in servers:
                await s.__aexit__(None, None, None)

    stats = run_virtual(main(), real_poll_s=0.01)
    assert len(stats) == N_STATIONS
    for st in stats:
        assert st.state is StationState.STREAMING, st.detail
        assert st.epochs_total >= SECONDS - 5, (st.station, st.epochs_total)
        assert st.queue.peak <= 2
        assert st.queue.dropped_total == 0
        assert st.pipeline_errors_total == 0
        assert (
            st.decoder.crc_failures_total == 0
            if hasattr(st.decoder, "crc_failures_total")
            else True
        )
        assert st.latest is not None
        assert st.latest.n_sats > 10
        assert math.isfinite(st.latest.vtec_tecu)
