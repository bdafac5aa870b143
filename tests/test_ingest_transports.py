"""One contract, every transport (STYLE rule 12): serial over a real pty, TCP client and listener and
UDP on loopback, NTRIP v1/v2 against a minimal caster, file, stdin (pipe and regular file), memory."""

from __future__ import annotations

import asyncio
import contextlib
import os
import random
import socket
import tty
from collections.abc import AsyncIterator, Callable
from pathlib import Path

import pytest

from ionwarden.daemon.errors import TransportError
from ionwarden.daemon.ingest import (
    FileTransport,
    MemoryTransport,
    NtripSource,
    NtripTransport,
    SerialSource,
    SerialTransport,
    StdinTransport,
    TcpListenTransport,
    TcpTransport,
    Transport,
    UdpTransport,
)
from ionwarden.daemon.runtime import run_virtual

from ._runtime_support import Caster

PAYLOAD = random.Random(7).randbytes(48_000)  # common practice: arbitrary bytes, fixed seed
Factory = Callable[
    [bytes, contextlib.AsyncExitStack, Path], "asyncio.Future[tuple[Transport, bool]]"
]


async def _memory(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    return MemoryTransport([payload[i : i + 5000] for i in range(0, len(payload), 5000)]), True


async def _tcp(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    async def serve(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        writer.write(payload)
        await writer.drain()
        writer.close()

    server = await asyncio.start_server(serve, "127.0.0.1", 0)
    stack.push_async_callback(server.wait_closed)
    stack.callback(server.close)
    port = server.sockets[0].getsockname()[1]
    return await TcpTransport.connect("127.0.0.1", port), True


async def _tcp_listen(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    t = await TcpListenTransport.listen("127.0.0.1", 0)
    _, writer = await asyncio.open_connection("127.0.0.1", t.port)
    writer.write(payload)
    await writer.drain()
    writer.close()
    return t, True


async def _udp(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    t = await UdpTransport.bind("127.0.0.1", 0)
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        for i in range(0, len(payload), 1200):
            s.sendto(payload[i : i + 1200], ("127.0.0.1", t.port))
    return t, False


async def _serial(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    master, slave = os.openpty()
    tty.setraw(master)
    stack.callback(os.close, master)
    stack.callback(os.close, slave)
    t = await SerialTransport.open(SerialSource(device=os.ttyname(slave), baud=115200))
    view = memoryview(payload)
    while view:  # the pty buffer is small: write as the reader drains it
        try:
            n = os.write(master, view[:4096])
        except BlockingIOError:
            n = 0
        view = view[n:]
        if view:
            await asyncio.sleep(0)
            break
    rest = bytes(view)

    async def feed_rest() -> None:
        v = memoryview(rest)
        os.set_blocking(master, False)
        while v:
            try:
                v = v[os.write(master, v[:4096]) :]
            except BlockingIOError:
                await asyncio.sleep(0.001)

    return _WithFeeder(t, feed_rest()), False


class _WithFeeder:
    """A transport whose peer keeps writing from a task started on first read."""

    def __init__(self, inner: Transport, feeder: object):
        self.inner = inner
        self._feeder = feeder
        self._task: asyncio.Task[None] | None = None
        self._tg = asyncio.TaskGroup()

    async def read(self, max_bytes: int) -> bytes:
        if self._task is None and self._feeder is not None:
            await self._tg.__aenter__()
            self._task = self._tg.create_task(self._feeder, name="test.feeder")  # type: ignore[arg-type]
        return await self.inner.read(max_bytes)

    async def aclose(self) -> None:
        await self.inner.aclose()
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._tg.__aexit__(None, None, None)
            self._task = None
        if self._feeder is not None and hasattr(self._feeder, "close"):
            self._feeder.close()  # never started: close the coroutine
        self._feeder = None


async def _file(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    path = tmp / "capture.bin"
    path.write_bytes(payload)
    return await FileTransport.open(str(path)), True


async def _stdin_pipe(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    r, w = os.pipe()
    stack.callback(os.close, r)
    t = await StdinTransport.open(r)

    async def feed() -> None:
        await asyncio.to_thread(_write_all, w, payload)
        os.close(w)

    return _WithFeeder(t, feed()), True


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view) :]


async def _stdin_file(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    path = tmp / "stdin.bin"
    path.write_bytes(payload)
    fd = os.open(path, os.O_RDONLY)
    stack.callback(os.close, fd)
    return await StdinTransport.open(fd), True


async def _ntrip(version: int, payload: bytes, stack: contextlib.AsyncExitStack):
    caster = await stack.enter_async_context(Caster(mounts={"MOUNT1": payload}, users={"u": "pw"}))
    spec = NtripSource(
        host="127.0.0.1", port=caster.port, mount="MOUNT1", user="u", version=version
    )
    return await NtripTransport.connect(spec, password="pw"), True


async def _ntrip1(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    return await _ntrip(1, payload, stack)


async def _ntrip2(payload: bytes, stack: contextlib.AsyncExitStack, tmp: Path):
    return await _ntrip(2, payload, stack)


FACTORIES = {
    "memory": _memory,
    "tcp": _tcp,
    "tcp-listen": _tcp_listen,
    "udp": _udp,
    "serial-pty": _serial,
    "file": _file,
    "stdin-pipe": _stdin_pipe,
    "stdin-file": _stdin_file,
    "ntrip-v1": _ntrip1,
    "ntrip-v2": _ntrip2,
}


@contextlib.asynccontextmanager
async def _opened(kind: str, payload: bytes, tmp: Path) -> AsyncIterator[tuple[Transport, bool]]:
    async with contextlib.AsyncExitStack() as stack:
        transport, has_eof = await FACTORIES[kind](payload, stack, tmp)
        try:
            yield transport, has_eof
        finally:
            await transport.aclose()


async def _read_all(t: Transport, n: int, max_bytes: int, has_eof: bool) -> bytes:
    got = bytearray()
    while len(got) < n:
        data = await t.read(max_bytes)
        assert data, "b'' before the payload was complete"
        assert len(data) <= max_bytes
        got += data
    return bytes(got)


@pytest.mark.parametrize("kind", FACTORIES)
def test_transport_delivers_stream_in_order_then_eof(kind: str, tmp_path: Path) -> None:
    """Transport returns every byte in order, never more than max_bytes a read, then b"" at EOF."""

    async def main() -> None:
        async with _opened(kind, PAYLOAD, tmp_path) as (t, has_eof):
            got = await _read_all(t, len(PAYLOAD), 3000, has_eof)
            assert got == PAYLOAD
            if has_eof:
                assert await t.read(3000) == b""
            else:  # never-ending sources: nothing more arrives (checked on the virtual clock)
                with pytest.raises(TimeoutError):
                    async with asyncio.timeout(5):
                        await t.read(3000)

    run_virtual(main())


@pytest.mark.parametrize("kind", FACTORIES)
def test_transport_honours_one_byte_reads(kind: str, tmp_path: Path) -> None:
    """Transport returns exactly one byte when asked for one."""

    async def main() -> None:
        async with _opened(kind, PAYLOAD[:3000], tmp_path) as (t, _):
            for i in range(5):
                assert await t.read(1) == PAYLOAD[i : i + 1]

    run_virtual(main())


@pytest.mark.parametrize("kind", FACTORIES)
def test_transport_aclose_is_idempotent_and_read_after_close_fails(
    kind: str, tmp_path: Path
) -> None:
    """Transport closes twice without error, and a read after close raises TransportError."""

    async def main() -> None:
        async with _opened(kind, PAYLOAD[:2000], tmp_path) as (t, _):
            await t.read(10)
            await t.aclose()
            await t.aclose()
            with pytest.raises(TransportError):
                await t.read(10)

    run_virtual(main())


def test_tcp_listen_rejects_a_second_receiver_while_one_streams() -> None:
    """TcpListenTransport closes (and counts) a second connection while the first one streams."""

    async def main() -> None:
        t = await TcpListenTransport.listen("127.0.0.1", 0)
        _, w1 = await asyncio.open_connection("127.0.0.1", t.port)
        w1.write(b"first")
        assert await t.read(100) == b"first"
        r2, w2 = await asyncio.open_connection("127.0.0.1", t.port)
        assert await r2.read(10) == b""  # closed by us at once
        assert t.rejected == 1
        for w in (w1, w2):
            w.close()
        await t.aclose()

    run_virtual(main())


def test_udp_drops_the_oldest_datagram_when_its_queue_is_full() -> None:
    """UdpTransport keeps the newest datagrams when its bounded queue overflows, and counts drops."""

    async def main() -> None:
        t = await UdpTransport.bind("127.0.0.1", 0, maxlen=4)
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            for i in range(10):
                s.sendto(bytes([i]) * 10, ("127.0.0.1", t.port))
        await asyncio.sleep(0.2)
        got = [await t.read(100) for _ in range(4)]
        assert got == [bytes([i]) * 10 for i in range(6, 10)]
        assert t.dropped == 6
        await t.aclose()

    run_virtual(main())


def test_serial_applies_baud_stopbits_and_flow_from_the_url() -> None:
    """SerialTransport sets the tty to the URL's baud, stop bits and RTS/CTS (termios, POSIX)."""
    import termios

    from ionwarden.daemon.ingest import parse_source

    async def main() -> None:
        master, slave = os.openpty()
        try:
            spec = parse_source(
                # parity stays N: a Linux pty refuses parity through the asyncio adapter (EINVAL)
                f"serial://{os.ttyname(slave)}?baud=38400&stopbits=2&flow=rtscts"
            )
            assert isinstance(spec, SerialSource)
            t = await SerialTransport.open(spec)
            try:
                _iflag, _oflag, cflag, _lflag, ispeed, ospeed, _cc = termios.tcgetattr(slave)
                assert ispeed == ospeed == termios.B38400
                assert not cflag & termios.PARENB
                assert cflag & termios.CSTOPB  # two stop bits
                assert cflag & termios.CRTSCTS
                assert cflag & termios.CSIZE == termios.CS8
            finally:
                await t.aclose()
        finally:
            os.close(slave)
            os.close(master)

    run_virtual(main())


def test_serial_settings_the_device_refuses_become_a_transport_error() -> None:
    """SerialTransport turns a tty's refusal of the port settings into a TransportError (retryable)."""
    from ionwarden.daemon.ingest import parse_source

    async def main() -> None:
        master, slave = os.openpty()
        try:
            spec = parse_source(f"serial://{os.ttyname(slave)}?parity=E")
            assert isinstance(spec, SerialSource)
            with pytest.raises(TransportError, match="refused the port settings"):
                await SerialTransport.open(spec)
        finally:
            os.close(slave)
            os.close(master)

    run_virtual(main())


def test_file_transport_refuses_a_fifo_without_blocking(tmp_path: Path) -> None:
    """FileTransport.open refuses a named pipe at once (no writer needed) with a one-line reason."""
    from ionwarden.daemon.ingest import SourceRejectedError

    fifo = tmp_path / "gnss.pipe"
    os.mkfifo(fifo)

    async def main() -> None:
        async with asyncio.timeout(5):
            await FileTransport.open(str(fifo))

    with pytest.raises(SourceRejectedError, match="not a regular file"):
        asyncio.run(main())
