"""NTRIP client (versions 1.0 and 2.0), sourcetable fetch and the GGA upline.

Request and response follow RTCM 10410.1 (NTRIP 2.0) §4 and the NTRIP 1.0 "ICY 200 OK" form; the
chunked body of a 2.0 stream follows RFC 9112 §7.1. A caster that answers a data request with its
sourcetable (or 404) means "mountpoint not found"; 401 means bad credentials. Both become a
:class:`SourceRejectedError` that names the cause, so ``ionwarden`` status lines say it plainly.

Network (VRS-style) mounts need the client's approximate position: a GGA sentence is sent right
after the request and every ``gga_interval_s`` while reading (no background task: the read waits
at most until the next GGA is due).
"""

from __future__ import annotations

import asyncio
import base64
import math
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Self

from ionwarden.daemon.errors import TransportError

from ._net import TcpTransport
from ._transport import SourceRejectedError, SourceUnavailableError

if TYPE_CHECKING:
    from collections.abc import Callable

    from ._source import NtripSource

__all__ = ["ChunkedDecoder", "MountEntry", "NtripTransport", "fetch_sourcetable", "format_gga"]

USER_AGENT = "NTRIP ionwarden/0.1"
#: Largest response header block we accept (bytes); casters send a few hundred.
MAX_HEADER_BYTES = 16 * 1024
#: Largest sourcetable we read (bytes); big public casters list a few thousand mounts (~1 MB).
MAX_SOURCETABLE_BYTES = 8 * 1024 * 1024


class ChunkedDecoder:
    """Sans-IO decoder of an HTTP/1.1 chunked body (RFC 9112 §7.1); ``done`` after the last chunk."""

    #: A chunk-size line is hex digits plus optional extensions; 1 KiB is far beyond any real one.
    MAX_SIZE_LINE = 1024

    def __init__(self) -> None:
        self._buf = b""
        self._left = 0  # data bytes left in the current chunk
        self._state = "size"  # size | data | crlf | trailer
        self.done = False

    def feed(self, data: bytes) -> bytes:
        self._buf += data
        out = bytearray()
        while self._buf and not self.done:
            if self._state == "size":
                end = self._buf.find(b"\r\n")
                if end < 0:
                    if len(self._buf) > self.MAX_SIZE_LINE:
                        raise SourceUnavailableError("ntrip: chunk size line too long")
                    break
                line = self._buf[:end].split(b";", 1)[0].strip()
                self._buf = self._buf[end + 2 :]
                try:
                    self._left = int(line, 16)
                except ValueError:
                    raise SourceUnavailableError(f"ntrip: bad chunk size {line[:20]!r}") from None
                self._state = "data" if self._left else "trailer"
            elif self._state == "data":
                take = self._buf[: self._left]
                out += take
                self._buf = self._buf[len(take) :]
                self._left -= len(take)
                if not self._left:
                    self._state = "crlf"
            elif self._state == "crlf":
                if len(self._buf) < 2:
                    break
                if self._buf[:2] != b"\r\n":
                    raise SourceUnavailableError("ntrip: chunk not followed by CRLF")
                self._buf = self._buf[2:]
                self._state = "size"
            else:  # trailer: ignore fields up to the blank line
                end = self._buf.find(b"\r\n")
                if end < 0:
                    break
                self._buf = self._buf[end + 2 :]
                if end == 0:
                    self.done = True
        return bytes(out)


def _nmea_checksum(body: str) -> str:
    cs = 0
    for ch in body.encode("ascii"):
        cs ^= ch
    return f"{cs:02X}"


def format_gga(lat_deg: float, lon_deg: float, height_m: float, when: datetime) -> bytes:
    """A GGA sentence for the upline (NMEA 0183 v4.11 GGA field order), talker GP, CRLF ended.

    Fix quality 1, 12 satellites and HDOP 1.0 are placeholders a caster only uses for its own
    bookkeeping; the position is what a network mount needs.
    """
    lat_a, lon_a = abs(lat_deg), abs(lon_deg)
    lat_d, lon_d = int(lat_a), int(lon_a)
    lat = f"{lat_d:02d}{(lat_a - lat_d) * 60:08.5f},{'N' if lat_deg >= 0 else 'S'}"
    lon = f"{lon_d:03d}{(lon_a - lon_d) * 60:08.5f},{'E' if lon_deg >= 0 else 'W'}"
    t = when.astimezone(UTC)
    body = f"GPGGA,{t:%H%M%S}.00,{lat},{lon},1,12,1.0,{height_m:.1f},M,0.0,M,,"
    return f"${body}*{_nmea_checksum(body)}\r\n".encode("ascii")


def _auth(user: str, password: str) -> str:
    if not user:
        return ""
    token = base64.b64encode(f"{user}:{password}".encode()).decode("ascii")
    return f"Authorization: Basic {token}\r\n"


def _request(host: str, path: str, *, version: int, user: str, password: str) -> bytes:
    if version == 1:
        head = f"GET /{path} HTTP/1.0\r\nUser-Agent: {USER_AGENT}\r\n"
    else:
        head = (
            f"GET /{path} HTTP/1.1\r\nHost: {host}\r\nNtrip-Version: Ntrip/2.0\r\n"
            f"User-Agent: {USER_AGENT}\r\nConnection: close\r\n"
        )
    return (head + _auth(user, password) + "\r\n").encode("latin-1")


@dataclass(frozen=True, slots=True, kw_only=True)
class _Response:
    status: int
    reason: str
    headers: dict[str, str]
    sourcetable: bool
    chunked: bool
    rest: bytes


async def _read_head(tcp: TcpTransport, what: str) -> _Response:
    buf = b""
    while True:
        # NTRIP 1.0 data answers are "ICY 200 OK\r\n" then data, with no blank line (10410.1 Annex).
        if buf.startswith(b"ICY 200") and b"\r\n" in buf:
            rest = buf.partition(b"\r\n")[2].removeprefix(b"\r\n")
            return _Response(
                status=200, reason="OK", headers={}, sourcetable=False, chunked=False, rest=rest
            )
        end = buf.find(b"\r\n\r\n")
        if end >= 0:
            break
        if len(buf) > MAX_HEADER_BYTES:
            raise SourceUnavailableError(
                f"{what}: response header longer than {MAX_HEADER_BYTES} bytes"
            )
        data = await tcp.read(4096)
        if not data:
            raise SourceUnavailableError(f"{what}: caster closed the connection before answering")
        buf += data
    head, rest = buf[:end].decode("latin-1"), buf[end + 4 :]
    status_line, *lines = head.split("\r\n")
    parts = status_line.split(" ", 2)
    if parts[0] == "SOURCETABLE":
        status, reason, sourcetable = 200, "sourcetable", True
    elif parts[0].startswith("HTTP/") and len(parts) >= 2 and parts[1].isdigit():
        status, reason, sourcetable = int(parts[1]), parts[2] if len(parts) > 2 else "", False
    else:
        raise SourceUnavailableError(f"{what}: not an NTRIP answer: {status_line[:60]!r}")
    headers: dict[str, str] = {}
    for line in lines:
        key, _, value = line.partition(":")
        headers[key.strip().lower()] = value.strip()
    sourcetable = sourcetable or headers.get("content-type", "").startswith("gnss/sourcetable")
    chunked = "chunked" in headers.get("transfer-encoding", "").lower()
    return _Response(
        status=status,
        reason=reason,
        headers=headers,
        sourcetable=sourcetable,
        chunked=chunked,
        rest=rest,
    )


def _check(resp: _Response, what: str, mount: str) -> None:
    if resp.status == 401:
        raise SourceRejectedError(
            f"{what}: 401 unauthorized: check the user in the URL and the password secret",
            status="unauthorized",
        )
    if resp.status == 404 or (resp.status == 200 and resp.sourcetable and mount):
        raise SourceRejectedError(
            f"{what}: mountpoint not found: {mount!r} is not in the caster's sourcetable",
            status="mount-not-found",
        )
    if resp.status != 200:
        raise SourceUnavailableError(f"{what}: caster answered {resp.status} {resp.reason}")


class NtripTransport:
    """The data stream of one mountpoint."""

    def __init__(
        self,
        tcp: TcpTransport,
        resp: _Response,
        spec: NtripSource,
        *,
        what: str,
        utc_now: Callable[[], datetime],
    ):
        self._tcp = tcp
        self._spec = spec
        self._what = what
        self._utc_now = utc_now
        self._chunks = ChunkedDecoder() if resp.chunked else None
        self._pending = resp.rest
        self._next_gga = math.inf
        self._closed = False
        self.gga_sent = 0

    @classmethod
    async def connect(
        cls,
        spec: NtripSource,
        *,
        password: str = "",
        timeout_s: float = 10.0,
        utc_now: Callable[[], datetime] | None = None,
    ) -> Self:
        what = f"ntrip://{spec.host}:{spec.port}/{spec.mount}"
        tcp = await TcpTransport.connect(spec.host, spec.port, timeout_s=timeout_s)
        try:
            req = _request(
                spec.host, spec.mount, version=spec.version, user=spec.user, password=password
            )
            await tcp.write(req)
            async with asyncio.timeout(timeout_s):
                resp = await _read_head(tcp, what)
            _check(resp, what, spec.mount)
        except BaseException:
            await tcp.aclose()
            raise
        self = cls(tcp, resp, spec, what=what, utc_now=utc_now or (lambda: datetime.now(UTC)))
        if spec.gga_interval_s > 0:
            await self._send_gga()
        return self

    async def _send_gga(self) -> None:
        gga = format_gga(
            self._spec.lat_deg, self._spec.lon_deg, self._spec.height_m, self._utc_now()
        )
        await self._tcp.write(gga)
        self.gga_sent += 1
        self._next_gga = asyncio.get_running_loop().time() + self._spec.gga_interval_s

    async def _raw(self, max_bytes: int) -> bytes:
        if self._pending:
            out, self._pending = self._pending[:max_bytes], self._pending[max_bytes:]
            return out
        while True:
            if math.isinf(self._next_gga):
                return await self._tcp.read(max_bytes)
            try:
                async with asyncio.timeout_at(self._next_gga):
                    return await self._tcp.read(max_bytes)
            except TimeoutError:
                await self._send_gga()

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        if self._chunks is None:
            return await self._raw(max_bytes)
        while True:
            if self._chunks.done:
                return b""
            raw = await self._raw(max_bytes)
            if not raw:
                raise SourceUnavailableError(f"{self._what}: stream cut before the last chunk")
            data = self._chunks.feed(raw)
            if data:
                return data

    async def aclose(self) -> None:
        self._closed = True
        await self._tcp.aclose()


@dataclass(frozen=True, slots=True, kw_only=True)
class MountEntry:
    """One ``STR`` record of a sourcetable (RTCM 10410.1 Table 7: field order)."""

    mount: str
    identifier: str
    format: str
    nmea_required: bool  # field 12 "nmea": the caster needs a GGA upline
    network: bool  # field 13 "solution": 1 = network solution (VRS-style)


def parse_sourcetable(text: str) -> list[MountEntry]:
    """``STR`` lines of a sourcetable; other record kinds (CAS, NET) are skipped."""
    out = []
    for line in text.splitlines():
        fields = line.split(";")
        if fields[0] != "STR" or len(fields) < 13:
            continue
        out.append(
            MountEntry(
                mount=fields[1],
                identifier=fields[2],
                format=fields[3],
                nmea_required=fields[11].strip() == "1",
                network=fields[12].strip() == "1",
            )
        )
    return out


async def fetch_sourcetable(
    host: str,
    port: int = 2101,
    *,
    user: str = "",
    password: str = "",
    version: int = 2,
    timeout_s: float = 10.0,
) -> list[MountEntry]:
    """Ask the caster for its sourcetable (``GET /``) and parse its mount records."""
    what = f"ntrip://{host}:{port}/"
    tcp = await TcpTransport.connect(host, port, timeout_s=timeout_s)
    try:
        await tcp.write(_request(host, "", version=version, user=user, password=password))
        async with asyncio.timeout(timeout_s):
            resp = await _read_head(tcp, what)
            _check(resp, what, "")
            body = bytearray(resp.rest)
            dechunk = ChunkedDecoder() if resp.chunked else None
            if dechunk is not None:
                body = bytearray(dechunk.feed(bytes(body)))
            while b"ENDSOURCETABLE" not in body and not (dechunk is not None and dechunk.done):
                data = await tcp.read(65536)
                if not data:
                    break
                body += dechunk.feed(data) if dechunk is not None else data
                if len(body) > MAX_SOURCETABLE_BYTES:
                    raise TransportError(
                        f"{what}: sourcetable larger than {MAX_SOURCETABLE_BYTES} bytes"
                    )
    finally:
        await tcp.aclose()
    return parse_sourcetable(body.decode("latin-1"))
