"""Serve simulated streams on loopback: a plain TCP server or a minimal NTRIP v2 caster.

For integration tests of the ingest layer only: the listener binds to a loopback address (anything
else is a :class:`ConfigError`), serves at most ``max_clients`` connections (each gets the whole
stream from its start), and stops by itself when they are done or when nobody connected within
``idle_timeout_s``. Pacing uses the event loop's monotonic clock (``speed`` × real time, 0 = as fast
as the client reads); it never touches the data.

NTRIP 2.0 (RTCM 10410.1 §2, HTTP/1.1): ``GET /`` returns the source table (``STR;`` record,
``ENDSOURCETABLE``); ``GET /<mount>`` with ``Ntrip-Version: Ntrip/2.0`` returns ``200 OK`` and the data
in HTTP chunked transfer coding; a request without that header (NTRIP 1.0) gets ``ICY 200 OK`` and raw
bytes. Optional HTTP Basic credentials; wrong ones get ``401``; an unknown mount ``404``.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import ipaddress
import logging
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass

from ionwarden.daemon.errors import ConfigError

__all__ = ["ServeOptions", "serve_ntrip", "serve_tcp"]

_LOG = logging.getLogger("ionwarden.daemon.sim")
#: Longest request head the caster reads (bytes): a few header lines; larger is refused.
MAX_REQUEST_HEAD = 8192
_REQUEST_TIMEOUT_S = 10.0

StreamFactory = Callable[[], Iterator[tuple[float, bytes]]]


@dataclass(frozen=True, slots=True, kw_only=True)
class ServeOptions:
    host: str = "127.0.0.1"
    port: int = 0
    speed: float = 0.0
    max_clients: int = 1
    idle_timeout_s: float = 30.0
    mount: str = "SIM"
    credentials: str | None = None  # "user:password" for HTTP Basic


def _check_loopback(host: str) -> None:
    try:
        ok = ipaddress.ip_address(host).is_loopback
    except ValueError:
        ok = host == "localhost"
    if not ok:
        raise ConfigError("--host", f"simulate serves on loopback only, not on {host!r}")


async def _pump(
    writer: asyncio.StreamWriter,
    stream: Iterator[tuple[float, bytes]],
    speed: float,
    chunked: bool,
    sent: list[int],
) -> None:
    """Write the stream (paced at ``speed`` × real time); ``sent[0]`` counts payload bytes as
    they go, so a client that leaves early is still accounted for."""
    loop = asyncio.get_running_loop()
    t0 = loop.time()
    for t_rel, data in stream:
        if speed > 0.0:
            delay = t0 + t_rel / speed - loop.time()
            if delay > 0:
                await asyncio.sleep(delay)
        if not data:
            continue
        writer.write(b"%x\r\n%s\r\n" % (len(data), data) if chunked else data)
        await writer.drain()
        sent[0] += len(data)
    if chunked:
        writer.write(b"0\r\n\r\n")
        await writer.drain()


class _Server:
    def __init__(
        self,
        factory: StreamFactory | Mapping[str, StreamFactory],
        options: ServeOptions,
        ntrip: bool,
    ) -> None:
        _check_loopback(options.host)
        if options.max_clients < 1:
            raise ConfigError("--clients", "must be at least 1")
        self._mounts: dict[str, StreamFactory] = (
            dict(factory) if isinstance(factory, Mapping) else {options.mount: factory}
        )
        if not self._mounts:
            raise ConfigError("--mount", "no stream to serve")
        self._factory = next(iter(self._mounts.values()))
        self._opt = options
        self._ntrip = ntrip
        self._served = 0
        self._accepted = 0
        self._done = asyncio.Event()
        self._first = asyncio.Event()
        self._sent = [0]

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        if self._accepted >= self._opt.max_clients:
            writer.close()
            return
        self._accepted += 1
        self._first.set()
        try:
            if self._ntrip:
                await self._ntrip_session(reader, writer)
            else:
                await _pump(writer, self._factory(), self._opt.speed, False, self._sent)
        except (ConnectionError, TimeoutError) as exc:  # a client going away is routine here
            _LOG.info("simulate: client ended early: %s", exc)
        finally:
            writer.close()
            with contextlib.suppress(ConnectionError):
                await writer.wait_closed()
            self._served += 1
            if self._served >= self._opt.max_clients:
                self._done.set()

    async def _ntrip_session(
        self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter
    ) -> None:
        try:
            head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), _REQUEST_TIMEOUT_S)
        except (asyncio.LimitOverrunError, asyncio.IncompleteReadError):
            writer.write(b"HTTP/1.1 400 Bad Request\r\nConnection: close\r\n\r\n")
            return
        lines = head.decode("latin-1").split("\r\n")
        parts = lines[0].split()
        headers = {}
        for line in lines[1:]:
            key, sep, value = line.partition(":")
            if sep:
                headers[key.strip().lower()] = value.strip()
        v2 = headers.get("ntrip-version", "").lower() == "ntrip/2.0"
        status = "HTTP/1.1" if v2 else "ICY"
        if len(parts) != 3 or parts[0] != "GET":
            writer.write(b"HTTP/1.1 400 Bad Request\r\nConnection: close\r\n\r\n")
            return
        path = parts[1]
        if path == "/":
            table = (
                "".join(
                    f"STR;{m};{m};RTCM 3.3;;2;GPS+GLO+GAL+BDS;SIM;XXX;0.00;0.00;0;0;"
                    "ionwarden simulate;none;N;N;0;\r\n"
                    for m in self._mounts
                )
                + "ENDSOURCETABLE\r\n"
            ).encode()
            writer.write(
                b"%s 200 OK\r\nNtrip-Version: Ntrip/2.0\r\nContent-Type: gnss/sourcetable\r\n"
                b"Content-Length: %d\r\nConnection: close\r\n\r\n%s"
                % ((b"HTTP/1.1" if v2 else b"SOURCETABLE"), len(table), table)
            )
            return
        mount = path.lstrip("/")
        factory = self._mounts.get(mount)
        if factory is None:
            writer.write(b"HTTP/1.1 404 Not Found\r\nConnection: close\r\n\r\n")
            return
        if self._opt.credentials is not None:
            token = base64.b64encode(self._opt.credentials.encode()).decode()
            if headers.get("authorization", "") != f"Basic {token}":
                writer.write(
                    b'HTTP/1.1 401 Unauthorized\r\nWWW-Authenticate: Basic realm="%s"\r\n'
                    b"Connection: close\r\n\r\n" % mount.encode()
                )
                return
        if v2:
            writer.write(
                b"HTTP/1.1 200 OK\r\nNtrip-Version: Ntrip/2.0\r\nContent-Type: gnss/data\r\n"
                b"Transfer-Encoding: chunked\r\nCache-Control: no-store\r\nConnection: close\r\n\r\n"
            )
        else:
            writer.write(f"{status} 200 OK\r\n\r\n".encode())
        await _pump(writer, factory(), self._opt.speed, v2, self._sent)

    async def run(self, port_ready: asyncio.Future[int] | None) -> int:
        server = await asyncio.start_server(
            self._handle, self._opt.host, self._opt.port, limit=MAX_REQUEST_HEAD
        )
        async with server:
            port = int(server.sockets[0].getsockname()[1])
            _LOG.info("simulate: serving on %s:%d", self._opt.host, port)
            if port_ready is not None and not port_ready.done():
                port_ready.set_result(port)
            try:
                await asyncio.wait_for(self._first.wait(), self._opt.idle_timeout_s)
            except TimeoutError:
                _LOG.info("simulate: nobody connected within %.0f s", self._opt.idle_timeout_s)
            else:
                await self._done.wait()
            finally:
                server.close()
        return self._sent[0]


async def serve_tcp(
    factory: StreamFactory,
    options: ServeOptions,
    port_ready: asyncio.Future[int] | None = None,
) -> int:
    """Serve raw stream bytes to up to ``options.max_clients`` clients; returns bytes sent."""
    return await _Server(factory, options, ntrip=False).run(port_ready)


async def serve_ntrip(
    factory: StreamFactory | Mapping[str, StreamFactory],
    options: ServeOptions,
    port_ready: asyncio.Future[int] | None = None,
) -> int:
    """Serve NTRIP mounts to up to ``max_clients`` clients: one factory is the mount
    ``options.mount``; a mapping serves one mount per key (e.g. one per simulated station)."""
    return await _Server(factory, options, ntrip=True).run(port_ready)
