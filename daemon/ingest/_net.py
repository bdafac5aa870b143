"""Network transports: TCP client, TCP listener (receivers that push to us) and UDP.

Each implements :class:`~._transport.Transport`; OS errors are translated where they enter.
"""

from __future__ import annotations

import asyncio
import logging
from collections import deque
from typing import TYPE_CHECKING, Self

from ionwarden.daemon.errors import TransportError

from ._transport import SourceUnavailableError, map_transport_errors

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["TcpListenTransport", "TcpTransport", "UdpTransport"]

log = logging.getLogger("ionwarden.daemon.ingest.net")

#: Datagrams buffered by a UDP source before the oldest is dropped (counted): 1 s of a 20 Hz MSM7
#: stream split into one datagram per message is ~200 datagrams; 1024 leaves a wide margin.
UDP_MAX_QUEUED_DATAGRAMS = 1024
#: Longest wait (s) for a closing TCP connection to flush what we wrote (an NTRIP request or GGA
#: line to a peer that stopped reading); then it is aborted, so shutdown stays bounded.
CLOSE_TIMEOUT_S = 1.0


class TcpTransport:
    """A TCP connection (client side, or one accepted by :class:`TcpListenTransport`)."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter, *, what: str):
        self._reader = reader
        self._writer = writer
        self._what = what
        self._closed = False

    @classmethod
    async def connect(cls, host: str, port: int, *, timeout_s: float = 10.0) -> Self:
        what = f"tcp://{host}:{port}"
        with map_transport_errors(f"{what}: connect"):
            async with asyncio.timeout(timeout_s):
                reader, writer = await asyncio.open_connection(host, port)
        return cls(reader, writer, what=what)

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        try:
            return await self._reader.read(max_bytes)
        except OSError:
            # Translated only when raised (every error map_transport_errors translates is an
            # OSError): entering that generator-based context around every read cost ~10k
            # instructions a chunk.
            with map_transport_errors(f"{self._what}: read"):
                raise

    def start_push(self, deliver: Callable[[bytes], None]) -> asyncio.Future[bool] | None:
        """From now on hand each chunk the connection receives to ``deliver`` as it arrives, in
        the event loop's I/O callback, instead of keeping it for :meth:`read` (not to be called
        after that): no reading task is woken per chunk. Call it only right after a read that
        returned fewer bytes than asked (nothing left buffered). Returns the connection's end, a
        future: True at EOF, or the error of a read (translated as :meth:`read` does); ``None``
        (nothing changed) when the stream has already ended: :meth:`read` tells how."""
        if self._closed or self._reader.at_eof() or self._reader.exception() is not None:
            return None
        transport = self._writer.transport
        ended: asyncio.Future[bool] = asyncio.get_running_loop().create_future()
        transport.set_protocol(_Pushing(transport.get_protocol(), deliver, ended, self._what))
        return ended

    async def write(self, data: bytes) -> None:
        """Send bytes upstream (NTRIP request, GGA upline); waits while the socket buffer is full."""
        with map_transport_errors(f"{self._what}: write"):
            self._writer.write(data)
            await self._writer.drain()

    async def aclose(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._writer.close()
        try:
            async with asyncio.timeout(CLOSE_TIMEOUT_S):
                await self._writer.wait_closed()
        except TimeoutError:
            log.debug("%s: close: unsent data after %.1f s, aborting", self._what, CLOSE_TIMEOUT_S)
            self._writer.transport.abort()
        except OSError as exc:  # a socket that already broke cannot fail to close in a useful way
            log.debug("%s: close: %s", self._what, exc)


class _Pushing(asyncio.Protocol):
    """A connection's protocol once :meth:`TcpTransport.start_push` was called: received bytes go
    to ``deliver``, the end to ``ended``; everything else still reaches the stream's own protocol
    (``inner``), so that closing and writing work as before."""

    def __init__(
        self,
        inner: asyncio.BaseProtocol,
        deliver: Callable[[bytes], None],
        ended: asyncio.Future[bool],
        what: str,
    ):
        assert isinstance(inner, asyncio.Protocol)
        self._inner, self._deliver, self._ended, self._what = inner, deliver, ended, what

    def data_received(self, data: bytes) -> None:
        self._deliver(data)

    def eof_received(self) -> bool | None:
        self._end(None)
        return self._inner.eof_received()

    def connection_lost(self, exc: Exception | None) -> None:
        self._end(exc)
        self._inner.connection_lost(exc)

    def pause_writing(self) -> None:
        self._inner.pause_writing()

    def resume_writing(self) -> None:
        self._inner.resume_writing()

    def _end(self, exc: Exception | None) -> None:
        ended = self._ended
        if ended.done():
            return
        if exc is None:
            ended.set_result(True)
            return
        try:
            with map_transport_errors(f"{self._what}: read"):  # as TcpTransport.read would
                raise exc
        except Exception as err:  # (handed to whoever waits for the end)
            ended.set_exception(err)


class TcpListenTransport:
    """Listen on ``host:port`` and read the first receiver that connects.

    One receiver at a time: while one is connected, further connections are closed at once and
    counted in :attr:`rejected`. The stream ends (``b""``) when that receiver disconnects; the
    station supervisor then listens again.
    """

    def __init__(self, server: asyncio.Server, *, what: str):
        self._server = server
        self._what = what
        self._peer: asyncio.Future[TcpTransport] = asyncio.get_running_loop().create_future()
        self._closed = False
        self.rejected = 0

    @property
    def port(self) -> int:
        """The bound port (useful when the URL asked for port 0)."""
        return int(self._server.sockets[0].getsockname()[1])

    @classmethod
    async def listen(cls, host: str, port: int) -> TcpListenTransport:
        what = f"tcp-listen://{host}:{port}"
        holder: list[TcpListenTransport] = []

        def accepted(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
            holder[0]._accept(reader, writer)

        with map_transport_errors(f"{what}: listen"):
            server = await asyncio.start_server(accepted, host, port, reuse_address=True)
        self = cls(server, what=what)
        holder.append(self)
        return self

    def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        if self._peer.done() or self._closed:
            self.rejected += 1
            writer.close()
            return
        peer = writer.get_extra_info("peername")
        log.info("%s: receiver connected from %s", self._what, peer)
        self._peer.set_result(TcpTransport(reader, writer, what=f"{self._what} peer {peer}"))

    async def wait_peer(self) -> None:
        """Wait until a receiver has connected (the first :meth:`read` waits for it too)."""
        await asyncio.shield(self._peer)

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        peer = await asyncio.shield(self._peer)
        return await peer.read(max_bytes)

    def start_push(self, deliver: Callable[[bytes], None]) -> asyncio.Future[bool] | None:
        """As :meth:`TcpTransport.start_push`, on the connected receiver (None before one)."""
        if self._closed or not self._peer.done() or self._peer.cancelled():
            return None
        return self._peer.result().start_push(deliver)

    async def aclose(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._server.close()
        if self._peer.done():
            await self._peer.result().aclose()
        else:
            self._peer.cancel()
        await self._server.wait_closed()


class _DatagramQueue(asyncio.DatagramProtocol):
    def __init__(self, maxlen: int) -> None:
        self.datagrams: deque[bytes] = deque()
        self.maxlen = maxlen
        self.dropped = 0
        self.error: Exception | None = None
        self.arrived = asyncio.Event()

    def datagram_received(self, data: bytes, addr: tuple[str | object, ...]) -> None:
        if not data:
            return
        if len(self.datagrams) >= self.maxlen:
            self.datagrams.popleft()  # policy: drop oldest, counted
            self.dropped += 1
        self.datagrams.append(data)
        self.arrived.set()

    def error_received(self, exc: Exception) -> None:
        self.error = exc
        self.arrived.set()


class UdpTransport:
    """Datagrams received on ``host:port``, read as one byte stream (a UDP source never ends).

    Datagrams wait in a bounded queue (:data:`UDP_MAX_QUEUED_DATAGRAMS`, drop oldest, counted in
    :attr:`dropped`). A datagram longer than ``max_bytes`` is handed out in pieces.
    """

    def __init__(self, transport: asyncio.DatagramTransport, proto: _DatagramQueue, *, what: str):
        self._transport = transport
        self._proto = proto
        self._what = what
        self._rest = b""
        self._closed = False

    @property
    def port(self) -> int:
        return int(self._transport.get_extra_info("sockname")[1])

    @property
    def dropped(self) -> int:
        return self._proto.dropped

    @classmethod
    async def bind(cls, host: str, port: int, *, maxlen: int = UDP_MAX_QUEUED_DATAGRAMS) -> Self:
        what = f"udp://{host}:{port}"
        loop = asyncio.get_running_loop()
        with map_transport_errors(f"{what}: bind"):
            transport, proto = await loop.create_datagram_endpoint(
                lambda: _DatagramQueue(maxlen), local_addr=(host, port)
            )
        return cls(transport, proto, what=what)

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        if max_bytes <= 0:
            raise ValueError(f"max_bytes must be > 0, got {max_bytes}")
        while not self._rest:
            if self._proto.error is not None:
                exc, self._proto.error = self._proto.error, None
                with map_transport_errors(f"{self._what}: receive"):
                    raise exc
            if self._proto.datagrams:
                self._rest = self._proto.datagrams.popleft()
                break
            self._proto.arrived.clear()
            await self._proto.arrived.wait()
            if self._closed:
                raise SourceUnavailableError(f"{self._what}: closed while reading")
        out, self._rest = self._rest[:max_bytes], self._rest[max_bytes:]
        return out

    async def aclose(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._transport.close()
        self._proto.arrived.set()
