"""Simulator servers on loopback: raw TCP and a minimal NTRIP v2 caster mount (real sockets)."""

from __future__ import annotations

import asyncio
import base64

import pytest

from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.sim import (
    ServeOptions,
    Simulator,
    build_scenario,
    iter_stream,
    serve_ntrip,
    serve_tcp,
)


@pytest.fixture(scope="module")
def sim() -> Simulator:
    return Simulator(build_scenario("quiet-day", duration_s=4.0))


def _expected(sim: Simulator) -> bytes:
    return b"".join(d for _, d in iter_stream(sim, 0))


def _dechunk(body: bytes) -> bytes:
    """HTTP/1.1 chunked transfer coding (RFC 9112 §7.1) back to the payload."""
    out = bytearray()
    i = 0
    while True:
        j = body.index(b"\r\n", i)
        size = int(body[i:j], 16)
        if size == 0:
            return bytes(out)
        out += body[j + 2 : j + 2 + size]
        assert body[j + 2 + size : j + 4 + size] == b"\r\n"
        i = j + 4 + size


async def _with_server(serve, opts: ServeOptions, sim: Simulator, client) -> tuple[int, list]:
    results: list = []
    async with asyncio.TaskGroup() as tg:
        ready: asyncio.Future[int] = asyncio.get_running_loop().create_future()
        task = tg.create_task(serve(lambda: iter_stream(sim, 0), opts, ready), name="sim.serve")
        port = await asyncio.wait_for(ready, 10)
        results = await asyncio.wait_for(client(port), 30)
    return task.result(), results


async def _get(port: int, request: bytes) -> bytes:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.write(request)
    await writer.drain()
    data = await reader.read()
    writer.close()
    await writer.wait_closed()
    return data


def test_serve_tcp_sends_whole_stream_then_stops(sim: Simulator) -> None:
    """serve_tcp gives a loopback client the exact stream bytes and then stops by itself."""

    async def client(port: int) -> list:
        return [await _get(port, b"")]

    sent, (data,) = asyncio.run(_with_server(serve_tcp, ServeOptions(), sim, client))
    assert data == _expected(sim)
    assert sent == len(data)


def test_serve_ntrip_v2_mount_chunked_stream(sim: Simulator) -> None:
    """serve_ntrip answers an NTRIP 2.0 GET with 200 OK and the stream in chunked coding."""
    req = (
        b"GET /HARC HTTP/1.1\r\nHost: 127.0.0.1\r\nNtrip-Version: Ntrip/2.0\r\n"
        b"User-Agent: NTRIP ionwarden-test\r\n\r\n"
    )

    async def client(port: int) -> list:
        return [await _get(port, req)]

    opts = ServeOptions(mount="HARC")
    _, (data,) = asyncio.run(_with_server(serve_ntrip, opts, sim, client))
    head, _, body = data.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 200 OK")  # NTRIP 2.0 (RTCM 10410.1) over HTTP/1.1
    assert b"Ntrip-Version: Ntrip/2.0" in head
    assert b"Transfer-Encoding: chunked" in head
    assert _dechunk(body) == _expected(sim)


def test_serve_ntrip_sourcetable_unknown_mount_and_auth(sim: Simulator) -> None:
    """The caster serves its source table, 404 for an unknown mount, 401 without credentials."""
    v2 = b"Ntrip-Version: Ntrip/2.0\r\n"
    token = base64.b64encode(b"user:pw")

    async def client(port: int) -> list:
        return [
            await _get(port, b"GET / HTTP/1.1\r\n" + v2 + b"\r\n"),
            await _get(port, b"GET /OTHER HTTP/1.1\r\n" + v2 + b"\r\n"),
            await _get(port, b"GET /SIM HTTP/1.1\r\n" + v2 + b"\r\n"),
            await _get(
                port, b"GET /SIM HTTP/1.1\r\n" + v2 + b"Authorization: Basic " + token + b"\r\n\r\n"
            ),
        ]

    opts = ServeOptions(max_clients=4, credentials="user:pw")
    _, (table, missing, denied, ok) = asyncio.run(_with_server(serve_ntrip, opts, sim, client))
    assert b"STR;SIM;" in table
    assert table.rstrip().endswith(b"ENDSOURCETABLE")
    assert missing.startswith(b"HTTP/1.1 404")
    assert denied.startswith(b"HTTP/1.1 401")
    assert ok.startswith(b"HTTP/1.1 200 OK")


def test_serve_ntrip_one_mount_per_station() -> None:
    """A mapping of factories becomes one mount each, listed in the source table."""
    sim2 = Simulator(build_scenario("two-stations-60km", duration_s=2.0))
    v2 = b"Ntrip-Version: Ntrip/2.0\r\n"

    async def client(port: int) -> list:
        return [
            await _get(port, b"GET / HTTP/1.1\r\n" + v2 + b"\r\n"),
            await _get(port, b"GET /HRV6 HTTP/1.1\r\n" + v2 + b"\r\n"),
        ]

    async def go() -> list:
        async with asyncio.TaskGroup() as tg:
            ready: asyncio.Future[int] = asyncio.get_running_loop().create_future()
            mounts = {"HARC": lambda: iter_stream(sim2, 0), "HRV6": lambda: iter_stream(sim2, 1)}
            opts = ServeOptions(max_clients=2)
            tg.create_task(serve_ntrip(mounts, opts, ready), name="sim.serve")
            return await client(await ready)

    table, rover = asyncio.run(go())
    assert b"STR;HARC;" in table
    assert b"STR;HRV6;" in table
    _, _, body = rover.partition(b"\r\n\r\n")
    assert _dechunk(body) == b"".join(d for _, d in iter_stream(sim2, 1))


def test_serve_ntrip_v1_client_gets_icy_and_raw_bytes(sim: Simulator) -> None:
    """An NTRIP 1.0 request (no Ntrip-Version header) gets ICY 200 OK and the raw stream."""

    async def client(port: int) -> list:
        return [await _get(port, b"GET /SIM HTTP/1.0\r\nUser-Agent: NTRIP old\r\n\r\n")]

    _, (data,) = asyncio.run(_with_server(serve_ntrip, ServeOptions(), sim, client))
    assert data.startswith(b"ICY 200 OK\r\n\r\n")
    assert data[len(b"ICY 200 OK\r\n\r\n") :] == _expected(sim)


def test_serve_stops_when_nobody_connects(sim: Simulator) -> None:
    """A server nobody connects to stops after its idle timeout and reports 0 bytes."""

    async def client(port: int) -> list:
        return []

    sent, _ = asyncio.run(_with_server(serve_tcp, ServeOptions(idle_timeout_s=0.2), sim, client))
    assert sent == 0


def test_serve_refuses_non_loopback_address(sim: Simulator) -> None:
    """serve_tcp refuses to bind anything but loopback (ConfigError naming --host)."""
    with pytest.raises(ConfigError, match="loopback"):
        asyncio.run(serve_tcp(lambda: iter_stream(sim, 0), ServeOptions(host="0.0.0.0")))


def test_serve_tcp_client_leaving_early_still_stops_server() -> None:
    """A client that hangs up mid-stream ends its session; the server still stops by itself."""
    import dataclasses

    sc = build_scenario("quiet-day", duration_s=3600.0)
    long_sim = Simulator(dataclasses.replace(sc, systems="G"))  # GPS only: quick to generate

    async def client(port: int) -> list:
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        first = await reader.read(1000)
        writer.close()
        await writer.wait_closed()
        return [first]

    sent, (first,) = asyncio.run(_with_server(serve_tcp, ServeOptions(), long_sim, client))
    assert first
    assert 0 < sent < 3600 * 800  # counted up to the hang-up, far short of the whole hour
