"""NTRIP client details against the minimal caster: refusals, sourcetable, GGA upline, chunking."""

from __future__ import annotations

import asyncio
from datetime import UTC, datetime

import pytest

from ionwarden.daemon.ingest import (
    ChunkedDecoder,
    NtripSource,
    NtripTransport,
    SourceRejectedError,
    SourceUnavailableError,
    fetch_sourcetable,
    format_gga,
)
from ionwarden.daemon.runtime import run_virtual

from ._runtime_support import Caster


def _spec(port: int, mount: str, version: int = 2, **kw: object) -> NtripSource:
    return NtripSource(host="127.0.0.1", port=port, mount=mount, user="u", version=version, **kw)  # type: ignore[arg-type]


@pytest.mark.parametrize("version", [1, 2])
def test_ntrip_unknown_mount_is_reported_as_mountpoint_not_found(version: int) -> None:
    """NtripTransport raises SourceRejectedError 'mount-not-found' for a 404 or a sourcetable answer."""

    async def main() -> None:
        async with Caster(mounts={"GOOD": b"x"}) as caster:
            with pytest.raises(SourceRejectedError, match="mountpoint not found") as err:
                await NtripTransport.connect(_spec(caster.port, "NOPE", version))
            assert err.value.status == "mount-not-found"

    asyncio.run(main())


def test_ntrip_401_names_the_password_secret() -> None:
    """NtripTransport raises SourceRejectedError 'unauthorized' on 401, naming what to check."""

    async def main() -> None:
        async with Caster(mounts={"M": b"x"}, users={"u": "pw"}) as caster:
            with pytest.raises(SourceRejectedError, match=r"401 unauthorized.*password") as err:
                await NtripTransport.connect(_spec(caster.port, "M"), password="bad")
            assert err.value.status == "unauthorized"

    asyncio.run(main())


def test_ntrip_request_carries_version_agent_and_basic_auth() -> None:
    """NtripTransport sends Ntrip-Version 2.0, our User-Agent and Basic auth (RFC 7617)."""

    async def main() -> None:
        async with Caster(mounts={"M": b"abc"}, users={"u": "pw"}) as caster:
            t = await NtripTransport.connect(_spec(caster.port, "M"), password="pw")
            assert await t.read(10) == b"abc"
            await t.aclose()
        req = caster.requests[0]
        assert req.startswith("GET /M HTTP/1.1\r\n")
        assert "Ntrip-Version: Ntrip/2.0\r\n" in req
        assert "User-Agent: NTRIP ionwarden/" in req
        assert "Authorization: Basic dTpwdw==\r\n" in req  # base64("u:pw"), RFC 7617 §2

    asyncio.run(main())


def test_ntrip_sends_gga_upline_every_interval() -> None:
    """NtripTransport sends a GGA at connect and every gga_interval_s while reading (virtual clock)."""

    async def main() -> None:
        async with Caster(mounts={"NET": b"d" * 10}, hold_open=True) as caster:
            spec = _spec(
                caster.port,
                "NET",
                gga_interval_s=10.0,
                lat_deg=48.615,
                lon_deg=10.423,
                height_m=512.0,
            )
            t = await NtripTransport.connect(
                spec, utc_now=lambda: datetime(2026, 3, 18, 13, 30, tzinfo=UTC)
            )
            assert await t.read(100) == b"d" * 10
            with pytest.raises(TimeoutError):
                async with asyncio.timeout(35):
                    await t.read(100)
            assert t.gga_sent == 4  # t=0, 10, 20, 30
            await asyncio.sleep(0.1)
            await t.aclose()
        lines = bytes(caster.uplink).split(b"\r\n")
        assert lines[0].startswith(b"$GPGGA,133000.00,4836.90000,N,01025.38000,E,1,")

    run_virtual(main())


def test_format_gga_matches_nmea_layout_and_checksum() -> None:
    """format_gga writes the NMEA 0183 GGA fields and XOR checksum (NMEA 0183 v4.11 §5.3, from memory)."""
    s = format_gga(-33.5, -70.25, 600.0, datetime(2026, 1, 2, 3, 4, 5, tzinfo=UTC))
    body, cs = s.decode().strip()[1:].split("*")
    assert body == "GPGGA,030405.00,3330.00000,S,07015.00000,W,1,12,1.0,600.0,M,0.0,M,,"
    x = 0
    for ch in body.encode():
        x ^= ch
    assert cs == f"{x:02X}"


@pytest.mark.parametrize("version", [1, 2])
def test_fetch_sourcetable_lists_mounts_and_nmea_flags(version: int) -> None:
    """fetch_sourcetable returns every STR record with its NMEA/network flags (RTCM 10410.1 STR layout)."""

    async def main() -> None:
        async with Caster(mounts={"BASE1": b"", "NET1": b""}) as caster:
            table = await fetch_sourcetable("127.0.0.1", caster.port, version=version)
        assert [(m.mount, m.nmea_required, m.network) for m in table] == [
            ("BASE1", False, False),
            ("NET1", True, True),
        ]

    asyncio.run(main())


def test_chunked_decoder_handles_any_split_and_extensions() -> None:
    """ChunkedDecoder yields the body whatever the byte boundaries (RFC 9112 §7.1), then done."""
    wire = b"5;ext=1\r\nhello\r\n6\r\n world\r\n0\r\nTrailer: x\r\n\r\n"
    whole = ChunkedDecoder()
    assert whole.feed(wire) == b"hello world"
    assert whole.done
    bytewise = ChunkedDecoder()
    out = b"".join(bytewise.feed(wire[i : i + 1]) for i in range(len(wire)))
    assert out == b"hello world"
    assert bytewise.done


def test_chunked_decoder_rejects_a_bad_size_line() -> None:
    """ChunkedDecoder raises SourceUnavailableError on a size that is not hex."""
    with pytest.raises(SourceUnavailableError, match="bad chunk size"):
        ChunkedDecoder().feed(b"zz\r\n")
