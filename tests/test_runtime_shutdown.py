"""Shutdown stays inside its budget when peers wedge: an MQTT broker that never acknowledges, a TCP
peer that stops reading (virtual clock, real loopback sockets, a minimal broker written here)."""

from __future__ import annotations

import asyncio
import contextlib
from pathlib import Path

from ionwarden.daemon.config import MqttSettings
from ionwarden.daemon.errors import TransportError
from ionwarden.daemon.ingest import FileSource, TcpTransport
from ionwarden.daemon.ingest._net import CLOSE_TIMEOUT_S
from ionwarden.daemon.outputs import MqttPublisher
from ionwarden.daemon.runtime import StationConfig, run_virtual
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle

from ._mqtt_support import CONNACK_V5, ScriptedBroker
from ._runtime_support import StandInCore, rtcm_frame


class WedgedBroker(ScriptedBroker):
    """Accepts the connection, answers CONNECT, then never acknowledges anything."""

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        await reader.read(4096)  # the CONNECT packet
        writer.write(CONNACK_V5)
        await writer.drain()
        while await reader.read(4096):  # PUBLISH, PINGREQ…: swallowed, never answered
            pass


def test_daemon_stops_within_the_budget_when_the_broker_never_acknowledges(tmp_path: Path) -> None:
    """Daemon returns within 5 s of a stop request when MQTT publishes are never acknowledged."""
    path = tmp_path / "a.bin"
    path.write_bytes(rtcm_frame(1077, bytes(4)) * 5)

    async def main() -> float:
        loop = asyncio.get_running_loop()
        async with WedgedBroker() as broker:
            settings = MqttSettings(host="127.0.0.1", port=broker.port, timeout_s=30.0)
            publisher = MqttPublisher(settings, monotonic=loop.time)
            opts = DaemonOptions(
                stations=(StationConfig(name="a", source=FileSource(path=str(path))),),
                summary_interval_s=0,
                exit_when_sources_end=False,
            )
            daemon = Daemon(
                opts,
                factory=lambda _cfg: StationBundle(core=StandInCore(), produces_epochs=False),
                publisher=publisher,
            )
            async with asyncio.TaskGroup() as tg:
                run = tg.create_task(daemon.run(), name="test.daemon")
                await daemon.ready.wait()
                await publisher.wait_connected()
                await asyncio.sleep(1.0)
                t0 = loop.time()
                daemon.request_stop()
            assert run.result() == 0
            return loop.time() - t0

    elapsed = run_virtual(main())
    assert elapsed < 5.0  # issue 7: SIGTERM → stopped within 5 s


def test_tcp_transport_close_is_bounded_when_the_peer_stops_reading() -> None:
    """TcpTransport.aclose aborts after CLOSE_TIMEOUT_S when unsent data cannot be flushed."""

    async def main() -> float:
        loop = asyncio.get_running_loop()
        held: list[asyncio.StreamWriter] = []

        async def never_read(_r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
            held.append(w)

        server = await asyncio.start_server(never_read, "127.0.0.1", 0)
        port = server.sockets[0].getsockname()[1]
        transport = await TcpTransport.connect("127.0.0.1", port)
        with contextlib.suppress(TransportError, TimeoutError):
            async with asyncio.timeout(0.5):
                await transport.write(bytes(32 << 20))  # fills both socket buffers
        t0 = loop.time()
        await transport.aclose()
        elapsed = loop.time() - t0
        server.close()
        for w in held:
            w.close()
        return elapsed

    assert run_virtual(main()) <= CLOSE_TIMEOUT_S + 0.5
