"""Helpers for the ingest/runtime tests: a minimal NTRIP caster and a stand-in station core."""

from __future__ import annotations

import asyncio
import base64
import contextlib
import selectors
from dataclasses import dataclass, field
from typing import Any

from ionwarden.daemon.runtime import DecoderCounts
from ionwarden.parsers._crc import crc24q


def rtcm_frame(msg_type: int, body: bytes = b"") -> bytes:
    """An RTCM 3 transport frame (RTCM 10403.3 §4: 0xD3, 6 zero bits + 10-bit length, CRC-24Q)."""
    payload = bytes([msg_type >> 4, (msg_type & 0xF) << 4]) + body
    head = bytes([0xD3, len(payload) >> 8, len(payload) & 0xFF])
    crc = crc24q(head + payload)
    return head + payload + crc.to_bytes(3, "big")


@dataclass
class Caster:
    """A minimal NTRIP caster on loopback (RTCM 10410.1 request/response forms, from memory).

    ``mounts`` maps mountpoint → payload; ``users`` maps user → password (empty: no auth).
    v2 requests get a chunked body; v1 requests get ``ICY 200 OK``. Unknown mounts get the
    sourcetable (v1) or 404 (v2).
    """

    mounts: dict[str, bytes]
    users: dict[str, str] = field(default_factory=dict)
    hold_open: bool = False  # keep the connection open after the payload (no EOF)
    requests: list[str] = field(default_factory=list)
    uplink: bytearray = field(default_factory=bytearray)
    server: asyncio.Server | None = None
    writers: list[asyncio.StreamWriter] = field(default_factory=list)

    @property
    def port(self) -> int:
        assert self.server is not None
        return int(self.server.sockets[0].getsockname()[1])

    def sourcetable(self) -> bytes:
        lines = [
            f"STR;{m};{m};RTCM 3.3;1077(1);2;GPS+GAL;TEST;XXX;50.00;10.00;{1 if m.startswith('NET') else 0};{1 if m.startswith('NET') else 0};sim;none;B;N;9600;"
            for m in self.mounts
        ]
        return ("\r\n".join([*lines, "ENDSOURCETABLE"]) + "\r\n").encode()

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.writers.append(writer)
        try:
            head = await reader.readuntil(b"\r\n\r\n")
            text = head.decode("latin-1")
            self.requests.append(text)
            mount = text.split(" ", 2)[1].lstrip("/")
            v2 = "Ntrip-Version: Ntrip/2.0" in text
            if self.users:
                ok = any(
                    f"Authorization: Basic {base64.b64encode(f'{u}:{p}'.encode()).decode()}" in text
                    for u, p in self.users.items()
                )
                if not ok:
                    writer.write(b"HTTP/1.1 401 Unauthorized\r\nContent-Length: 0\r\n\r\n")
                    return
            if mount == "" or mount not in self.mounts:
                if v2 and mount:
                    writer.write(b"HTTP/1.1 404 Not Found\r\nContent-Length: 0\r\n\r\n")
                    return
                table = self.sourcetable()
                if v2:
                    writer.write(
                        b"HTTP/1.1 200 OK\r\nContent-Type: gnss/sourcetable\r\n"
                        + f"Content-Length: {len(table)}\r\n\r\n".encode()
                        + table
                    )
                else:
                    writer.write(b"SOURCETABLE 200 OK\r\nContent-Type: text/plain\r\n\r\n" + table)
                return
            data = self.mounts[mount]
            if v2:
                writer.write(
                    b"HTTP/1.1 200 OK\r\nNtrip-Version: Ntrip/2.0\r\nContent-Type: gnss/data\r\n"
                    b"Transfer-Encoding: chunked\r\n\r\n"
                )
                for i in range(0, len(data), 1000):
                    piece = data[i : i + 1000]
                    writer.write(f"{len(piece):x}\r\n".encode() + piece + b"\r\n")
                    await writer.drain()
                if not self.hold_open:
                    writer.write(b"0\r\n\r\n")
            else:
                writer.write(b"ICY 200 OK\r\n")
                for i in range(0, len(data), 1000):
                    writer.write(data[i : i + 1000])
                    await writer.drain()
            await writer.drain()
            if self.hold_open:
                while chunk := await reader.read(4096):
                    self.uplink += chunk
        except (ConnectionError, asyncio.IncompleteReadError):
            pass
        finally:
            writer.close()
            with contextlib.suppress(ConnectionError):
                await writer.wait_closed()

    async def __aenter__(self) -> Caster:
        self.server = await asyncio.start_server(self._serve, "127.0.0.1", 0)
        return self

    async def __aexit__(self, *exc: object) -> None:
        assert self.server is not None
        self.server.close()
        for w in self.writers:
            w.close()
        await self.server.wait_closed()
        await asyncio.sleep(0)


class StandInCore:
    """A trivial station core for runtime tests (the real estimator is tested on its own).

    Frames with the real framer; every RTCM 1077 frame is an "epoch" (emits an object carrying its
    sequence number), so tests can check that no good frame is lost.
    """

    def __init__(self) -> None:
        from ionwarden.daemon.runtime import FramingCore

        self.seen: list[bytes] = []
        self.state: dict[str, Any] = {"arcs": 0}
        self._inner = FramingCore(consumer=self)

    def feed_frames(self, frames: Any) -> list[object]:
        out: list[object] = []
        for f in frames:
            if getattr(f, "msg_type", None) == 1077:
                self.seen.append(f.payload)
                self.state["arcs"] += 1
                out.append(("epoch", f.payload))
        return out

    def feed(self, data: bytes) -> Any:
        return self._inner.feed(data)

    def end_stream(self) -> Any:
        return self._inner.end_stream()

    def counts(self) -> DecoderCounts:
        return self._inner.counts()

    def frames_total(self) -> int:
        return self._inner.frames_total()

    def reset(self) -> None:
        self._inner.reset()
        self.state = {"arcs": 0}

    def unsettled(self) -> bool:
        return False

    def settle(self) -> list[object]:
        return []

    def slack_after_s(self) -> float | None:
        return None

    def settle_slack(self) -> list[object]:
        return []

    def state_dict(self) -> dict[str, Any]:
        return dict(self.state)

    def load_state_dict(self, state: Any) -> None:
        self.state = dict(state)


class ScriptedServer:
    """A loopback TCP server whose connection i runs ``scripts[min(i, last)](reader, writer)``.

    On exit every connection's script is cancelled and awaited, so nothing outlives the test.
    """

    def __init__(self, *scripts: Any):
        self.scripts = scripts
        self.connections = 0
        self.server: asyncio.Server | None = None
        self._stopping = asyncio.Event()
        self._active = 0
        self._idle = asyncio.Event()
        self._idle.set()

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        i = self.connections
        self.connections += 1
        self._active += 1
        self._idle.clear()
        try:
            async with asyncio.TaskGroup() as tg:
                script = tg.create_task(
                    self.scripts[min(i, len(self.scripts) - 1)](reader, writer), name="test.script"
                )
                stop = tg.create_task(self._stopping.wait(), name="test.stop")
                await asyncio.wait([script, stop], return_when=asyncio.FIRST_COMPLETED)
                script.cancel()
                stop.cancel()
        except* ConnectionError:
            pass
        finally:
            writer.close()
            self._active -= 1
            if not self._active:
                self._idle.set()

    async def __aenter__(self) -> ScriptedServer:
        self.server = await asyncio.start_server(self._serve, "127.0.0.1", 0)
        return self

    async def __aexit__(self, *exc: object) -> None:
        assert self.server is not None
        self.server.close()
        self._stopping.set()
        await self._idle.wait()
        await self.server.wait_closed()

    @property
    def port(self) -> int:
        assert self.server is not None
        return int(self.server.sockets[0].getsockname()[1])


class _SelectJumps:
    """A selector that polls real I/O without waiting and jumps the loop's clock instead."""

    def __init__(self, inner: selectors.BaseSelector, loop: PureVirtualLoop):
        self._inner, self._loop = inner, loop

    def select(self, timeout: float | None = None) -> list[tuple[selectors.SelectorKey, int]]:
        if timeout is None:  # nothing scheduled: only real I/O can wake us
            return self._inner.select(1.0)
        events = self._inner.select(0)
        if not events:
            self._loop.now += timeout
        return events

    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)


class PureVirtualLoop(asyncio.SelectorEventLoop):
    """An event loop whose clock moves only when it would wait: no real time leaks into it, so
    the scripted sources (no real I/O) run the same timeline every time."""

    def __init__(self) -> None:
        self.now = 0.0
        inner = selectors.DefaultSelector()
        super().__init__(inner)
        self._selector = _SelectJumps(inner, self)

    def time(self) -> float:
        return self.now


def run_pure_virtual(coro: Any) -> Any:
    """``asyncio.run`` on a :class:`PureVirtualLoop`."""
    with asyncio.Runner(loop_factory=PureVirtualLoop) as runner:
        return runner.run(coro)
