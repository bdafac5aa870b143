"""A TCP source's chunks pushed by its transport (``start_push``: no reading task woken per chunk)
against the same station reading them (``read``, the general path, kept for every other source):
the same chunks in the same order at the same times, the same counters, stall verdicts,
reconnects and log lines, on a real loopback peer following a script in virtual time."""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import re
import socket
import struct
from typing import Any

import pytest

from ionwarden.daemon.ingest import (
    SourceUnavailableError,
    TcpListenTransport,
    TcpSource,
    TcpTransport,
)
from ionwarden.daemon.runtime import (
    SourceEvent,
    StallLimits,
    StationConfig,
    StationRunner,
    StationState,
    StepLane,
)
from ionwarden.daemon.runtime import _station as station_mod

from ._runtime_support import run_pure_virtual
from .test_runtime_machinery_oracle import _DeferringCore, _frames

READ_SIZE = 64  # small, so that one write of the peer is handed out in several chunks

#: Per connection, what the peer does: (virtual seconds to wait, bytes | "eof" | "reset"); a
#: script without an end leaves the peer silent (the station's stall limits end it).
SCRIPTS: list[list[tuple[float, Any]]] = [
    [(0.0, _frames(0, 2)), (1.0, _frames(2, 3)), (1.0, _frames(3, 4))],  # then silent: no-data
    [(0.5, b"\x00garbage\xff" * 9), (0.5, b"BAD"), (0.5, b"BOOM"), (0.5, b"BOOM")]
    + [(1.0, b"\x01junk\xfe" * 7)] * 40,  # bytes but no frame: no-frame
    [(0.5, _frames(10, 11))] + [(1.0, _frames(11 + i, 12 + i)) for i in range(70)],  # no-epoch
    [(0.5, _frames(20, 23)), (1.0, _frames(23, 40)), (0.2, "eof")],  # a long write, then EOF
    [(0.5, _frames(40, 41)), (1.0, _frames(41, 43)), (0.3, "reset")],  # the link is lost
    [(9.0, _frames(90, 91)), (9.0, _frames(91, 92)), (9.0, b"BAD"), (0.0, "eof")],
]


class _ReadOnlyTcp(TcpTransport):
    """TcpTransport without ``start_push``: the station reads it (the general path)."""

    start_push = None  # type: ignore[assignment]


class _ReadOnlyListen(TcpListenTransport):
    start_push = None  # type: ignore[assignment]


class _RecordingCore(_DeferringCore):
    """_DeferringCore noting each chunk fed (its length and the loop's time then)."""

    def __init__(self) -> None:
        super().__init__()
        self.fed: list[tuple[int, float]] = []

    def feed(self, data: bytes) -> Any:
        self.fed.append((len(data), asyncio.get_running_loop().time()))
        return super().feed(data)


async def _play(
    script: list[tuple[float, Any]], r: asyncio.StreamReader, w: asyncio.StreamWriter
) -> None:
    """Follow ``script`` as the peer; without an end in it, stay silent until the station
    closes the connection."""
    for wait, what in script:
        await asyncio.sleep(wait)
        if what == "eof":
            w.close()
            return
        if what == "reset":
            sock = w.get_extra_info("socket")
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            w.transport.abort()
            return
        w.write(what)
    with contextlib.suppress(ConnectionError):  # (reset by a station closing on unread bytes)
        while await r.read(4096):
            pass
        w.close()
        await w.wait_closed()


async def _drive(*, pushed: bool, listen: bool) -> dict[str, Any]:
    """One station over the scripted connections (the station connecting, or listening for
    the peer), until the opener has none left."""
    events: list[object] = []
    changed = asyncio.Event()
    opened: list[int] = []
    peers: list[asyncio.Task[None]] = []

    async def serve(r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
        await _play(SCRIPTS[len(opened) - 1], r, w)

    async def dial(port: int, script: list[tuple[float, Any]]) -> None:
        r, w = await asyncio.open_connection("127.0.0.1", port)
        await _play(script, r, w)

    server = await asyncio.start_server(serve, "127.0.0.1", 0)
    port = server.sockets[0].getsockname()[1]
    tcp_cls: Any = TcpTransport if pushed else _ReadOnlyTcp
    listen_cls: Any = TcpListenTransport if pushed else _ReadOnlyListen

    async def opener(_spec: object, _pw: str) -> Any:
        if len(opened) == len(SCRIPTS):
            raise SourceUnavailableError("scripted: no more connections")
        opened.append(1)
        if not listen:
            return await tcp_cls.connect("127.0.0.1", port)
        t = await listen_cls.listen("127.0.0.1", 0)
        peers.append(asyncio.create_task(dial(t.port, SCRIPTS[len(opened) - 1])))
        return t

    def emit(item: object) -> None:
        events.append(item)
        changed.set()

    core = _RecordingCore()
    cfg = StationConfig(
        name="st1",
        source=TcpSource(host="127.0.0.1", port=9),  # (the opener connects elsewhere)
        stall=StallLimits(no_data_s=10, no_frame_s=30, no_epoch_s=60),
        read_size=READ_SIZE,
        queue_size=4,
    )
    runner = StationRunner(
        cfg, core, emit=emit, opener=opener, rng=random.Random(3), lane=StepLane()
    )
    async with server, asyncio.TaskGroup() as tg:
        tasks = [
            tg.create_task(runner.ingest_loop(), name="daemon.ingest[st1]"),
            tg.create_task(runner.estimate_loop(), name="daemon.estimate[st1]"),
        ]
        while not any(isinstance(e, SourceEvent) and "no more" in e.detail for e in events):
            changed.clear()
            await changed.wait()
        for t in tasks:
            t.cancel()
        await asyncio.gather(*peers)
    st = runner.statistics()
    return {
        "states": [
            (e.state, _ports_out(e.detail), e.monotonic_s)
            for e in events
            if isinstance(e, SourceEvent)
        ],
        "outputs": [e for e in events if not isinstance(e, SourceEvent)],
        "fed": core.fed,
        "seen": [int.from_bytes(p[2:6], "big") for p in core.seen],
        "counts": (
            st.bytes_total,
            st.connects_total,
            st.stalls_total,
            st.decode_errors_total,
            st.decoder,
            st.queue,
            st.pipeline_errors_total,
            st.last_data_monotonic_s,
            core.settles,
        ),
    }


@pytest.mark.parametrize("listen", [False, True], ids=["connect", "listen"])
def test_station_pushed_chunks_equal_read_chunks(
    caplog: pytest.LogCaptureFixture, monkeypatch: pytest.MonkeyPatch, listen: bool
) -> None:
    """StationRunner handles a TCP source's pushed chunks as it handles them read: the same
    chunks (read-sized pieces) at the same times, counters, stall verdicts (no data, no frame,
    no epoch at the configured 10/30/60 s), reconnects after EOF and reset, and log lines
    (equal to the general path (oracle): the same station reading the same peer)."""
    caplog.set_level(logging.INFO, logger=station_mod.log.name)
    switched: list[bool] = []
    start_push = TcpTransport.start_push

    def counted(self: TcpTransport, deliver: Any) -> Any:
        ended = start_push(self, deliver)
        switched.append(ended is not None)
        return ended

    monkeypatch.setattr(TcpTransport, "start_push", counted)
    pushed = run_pure_virtual(_drive(pushed=True, listen=listen))
    assert switched.count(True) == len(SCRIPTS)  # every connection was pushing
    pushed_log = [r.levelname + " " + r.getMessage() for r in caplog.records]
    caplog.clear()
    read = run_pure_virtual(_drive(pushed=False, listen=listen))
    read_log = [r.levelname + " " + r.getMessage() for r in caplog.records]
    assert pushed == read
    assert [_ports_out(line) for line in pushed_log] == [_ports_out(line) for line in read_log]
    stalls = [d for s, d, _t in pushed["states"] if s is StationState.STALLED]
    assert stalls == ["no-data", "no-frame", "no-epoch"]
    assert any(n > 1 and n % READ_SIZE == 0 for n, _t in pushed["fed"])  # a write in pieces
    assert pushed["seen"][:4] == [0, 1, 2, 3]
    assert pushed["seen"][-2:] == [90, 91]


def _ports_out(text: str) -> str:
    """``text`` without the ephemeral port numbers (they differ from run to run)."""
    return re.sub(r"(:|', )\d+", r"\1PORT", text)


def test_station_pushed_ingest_cancelled_is_cancelled_not_stalled() -> None:
    """StationRunner's ingest task, cancelled from outside while it waits for a pushing TCP
    connection's end under the stall limit, ends cancelled and closes the connection: the stall
    timer never turns an outside cancellation into a stall, and none of its timers is left."""

    async def main() -> None:
        peer_closed = asyncio.Event()

        async def serve(r: asyncio.StreamReader, w: asyncio.StreamWriter) -> None:
            w.write(_frames(0, 2))
            await r.read()  # until the station closes its side
            peer_closed.set()
            w.close()

        server = await asyncio.start_server(serve, "127.0.0.1", 0)
        port = server.sockets[0].getsockname()[1]
        switched: list[bool] = []

        async def opener(_spec: object, _pw: str) -> TcpTransport:
            t = await TcpTransport.connect("127.0.0.1", port)
            start_push = t.start_push

            def counted(deliver: Any) -> Any:
                ended = start_push(deliver)
                switched.append(ended is not None)
                return ended

            t.start_push = counted  # type: ignore[method-assign]
            return t

        events: list[object] = []
        cfg = StationConfig(name="st1", source=TcpSource(host="127.0.0.1", port=9))
        runner = StationRunner(cfg, _RecordingCore(), emit=events.append, opener=opener)
        async with server:
            task = asyncio.create_task(runner.ingest_loop(), name="daemon.ingest[st1]")
            await asyncio.sleep(5.0)
            assert switched == [True]
            task.cancel()
            with pytest.raises(asyncio.CancelledError):
                await task
            assert task.cancelled()
            async with asyncio.timeout(5.0):
                await peer_closed.wait()
        assert runner.statistics().stalls_total == 0
        assert runner.queue.qsize() == 1  # the first chunk, read before the switch
        await asyncio.sleep(30.0)  # no timer of the station is left to fire
        assert [e.state for e in events if isinstance(e, SourceEvent)] == [
            StationState.CONNECTING,
            StationState.STREAMING,
        ]

    run_pure_virtual(main())
