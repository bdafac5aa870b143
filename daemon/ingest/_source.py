"""Source URLs → validated, immutable source specs.

Accepted forms (our own scheme names; query keys are ours too)::

    serial:///dev/ttyUSB0?baud=115200&parity=N&bytesize=8&stopbits=1&flow=none|rtscts|xonxoff
    tcp://host:port                 connect to a receiver or stream server
    tcp-listen://0.0.0.0:port       wait for a receiver that pushes its stream to us
    udp://0.0.0.0:port              receive datagrams (bind address and port)
    ntrip://user@caster:2101/MOUNT?version=2&gga_interval=10&lat=..&lon=..&height=..
    file:///path/to/capture.bin?speed=10&loop=0     replay; speed=0 is as fast as possible
    stdin:

The NTRIP password never sits in the URL: it comes from a secret (config or systemd credential).
Errors are :class:`ConfigError` naming the key ``source`` and what is wrong, in one line.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from urllib.parse import parse_qsl, unquote, urlsplit

from ionwarden.daemon.errors import ConfigError

__all__ = [
    "FileSource",
    "NtripSource",
    "SerialSource",
    "SourceSpec",
    "StdinSource",
    "TcpListenSource",
    "TcpSource",
    "UdpSource",
    "parse_source",
]

SCHEMES = ("serial", "tcp", "tcp-listen", "udp", "ntrip", "file", "stdin")


@dataclass(frozen=True, slots=True, kw_only=True)
class SerialSource:
    """A serial port; framing as in termios (parity N/E/O/M/S, flow control none/rtscts/xonxoff)."""

    device: str
    baud: int = 115200
    bytesize: int = 8
    parity: str = "N"
    stopbits: float = 1
    flow: str = "none"


@dataclass(frozen=True, slots=True, kw_only=True)
class TcpSource:
    host: str
    port: int


@dataclass(frozen=True, slots=True, kw_only=True)
class TcpListenSource:
    host: str
    port: int


@dataclass(frozen=True, slots=True, kw_only=True)
class UdpSource:
    host: str
    port: int


@dataclass(frozen=True, slots=True, kw_only=True)
class NtripSource:
    """An NTRIP caster mountpoint (NTRIP 1.0 or 2.0 over HTTP/1.1).

    ``gga_interval_s`` > 0 sends a GGA upline with ``lat_deg``/``lon_deg``/``height_m`` every that
    many seconds (network/VRS mounts need it); 0 sends none.
    """

    host: str
    port: int = 2101
    mount: str
    user: str = ""
    version: int = 2
    gga_interval_s: float = 0.0
    lat_deg: float = math.nan
    lon_deg: float = math.nan
    height_m: float = 0.0


@dataclass(frozen=True, slots=True, kw_only=True)
class FileSource:
    """Replay of a capture; ``speed`` is the rate factor against data time (0 = as fast as possible)."""

    path: str
    speed: float = 1.0
    loop: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class StdinSource:
    pass


SourceSpec = (
    SerialSource | TcpSource | TcpListenSource | UdpSource | NtripSource | FileSource | StdinSource
)


def _bad(reason: str) -> ConfigError:
    return ConfigError("source", reason)


def _query(query: str, allowed: set[str], url: str) -> dict[str, str]:
    params = dict(parse_qsl(query, keep_blank_values=True))
    unknown = sorted(set(params) - allowed)
    if unknown:
        hint = f"allowed: {', '.join(sorted(allowed))}" if allowed else "this scheme takes none"
        raise _bad(f"unknown option {unknown[0]!r} in {url!r} ({hint})")
    return params


def _number(params: dict[str, str], key: str, default: float, *, lo: float, hi: float) -> float:
    if key not in params:
        return default
    try:
        value = float(params[key])
    except ValueError:
        raise _bad(f"{key}={params[key]!r} is not a number") from None
    if not (lo <= value <= hi):
        raise _bad(f"{key}={params[key]} is outside [{lo:g}, {hi:g}]")
    return value


def _host_port(url: str, default_port: int | None) -> tuple[str, int]:
    parts = urlsplit(url)
    host = parts.hostname
    try:
        port = parts.port
    except ValueError:
        raise _bad(f"bad port in {url!r}") from None
    if not host:
        raise _bad(f"missing host in {url!r}")
    if port is None:
        if default_port is None:
            raise _bad(f"missing port in {url!r}")
        port = default_port
    if port == 0 and not url.startswith(("tcp-listen:", "udp:")):
        raise _bad(f"port 0 in {url!r}")
    return host, port


def parse_source(url: str) -> SourceSpec:
    """Parse and validate a source URL; raise :class:`ConfigError` (key ``source``) when wrong."""
    scheme, sep, _rest = url.partition(":")
    if not sep or scheme not in SCHEMES:
        raise _bad(f"unknown scheme {scheme!r} in {url!r} (use one of {', '.join(SCHEMES)})")
    parts = urlsplit(url)
    if scheme == "stdin":
        if _rest.strip("/"):
            raise _bad(f"stdin takes no path: {url!r}")
        return StdinSource()
    if scheme == "serial":
        params = _query(parts.query, {"baud", "bytesize", "parity", "stopbits", "flow"}, url)
        device = unquote(parts.path)
        if not device.startswith("/"):
            raise _bad(f"serial needs an absolute device path, e.g. serial:///dev/ttyUSB0: {url!r}")
        parity = params.get("parity", "N").upper()
        if parity not in {"N", "E", "O", "M", "S"}:
            raise _bad(f"parity={params['parity']!r} (use N, E, O, M or S)")
        flow = params.get("flow", "none").lower()
        if flow not in {"none", "rtscts", "xonxoff"}:
            raise _bad(f"flow={params['flow']!r} (use none, rtscts or xonxoff)")
        stopbits = _number(params, "stopbits", 1, lo=1, hi=2)
        if stopbits not in {1, 1.5, 2}:
            raise _bad(f"stopbits={params['stopbits']} (use 1, 1.5 or 2)")
        return SerialSource(
            device=device,
            baud=int(_number(params, "baud", 115200, lo=50, hi=4_000_000)),
            bytesize=int(_number(params, "bytesize", 8, lo=5, hi=8)),
            parity=parity,
            stopbits=stopbits,
            flow=flow,
        )
    if scheme in {"tcp", "tcp-listen", "udp"}:
        _query(parts.query, set(), url)
        host, port = _host_port(url, None)
        if scheme == "tcp":
            return TcpSource(host=host, port=port)
        if scheme == "udp":
            return UdpSource(host=host, port=port)
        return TcpListenSource(host=host, port=port)
    if scheme == "ntrip":
        params = _query(parts.query, {"version", "gga_interval", "lat", "lon", "height"}, url)
        host, port = _host_port(url, 2101)
        if parts.password is not None:
            raise _bad(
                "put the NTRIP password in a secret (config or systemd credential), not the URL"
            )
        mount = unquote(parts.path.lstrip("/"))
        if not mount or "/" in mount:
            raise _bad(f"ntrip needs one mountpoint, e.g. ntrip://user@caster:2101/MOUNT: {url!r}")
        version = int(_number(params, "version", 2, lo=1, hi=2))
        gga = _number(params, "gga_interval", 0.0, lo=0.0, hi=3600.0)
        lat = _number(params, "lat", math.nan, lo=-90.0, hi=90.0)
        lon = _number(params, "lon", math.nan, lo=-180.0, hi=180.0)
        if gga > 0 and (math.isnan(lat) or math.isnan(lon)):
            raise _bad("gga_interval needs lat and lon (the approximate station position)")
        return NtripSource(
            host=host,
            port=port,
            mount=mount,
            user=unquote(parts.username or ""),
            version=version,
            gga_interval_s=gga,
            lat_deg=lat,
            lon_deg=lon,
            height_m=_number(params, "height", 0.0, lo=-1000.0, hi=20000.0),
        )
    # file
    params = _query(parts.query, {"speed", "loop"}, url)
    path = unquote(parts.netloc + parts.path) if parts.netloc else unquote(parts.path)
    if not path:
        raise _bad(f"file needs a path, e.g. file:///var/lib/ionwarden/capture.bin: {url!r}")
    loop = params.get("loop", "0")
    if loop not in {"0", "1", "true", "false"}:
        raise _bad(f"loop={loop!r} (use 0 or 1)")
    return FileSource(
        path=path,
        speed=_number(params, "speed", 1.0, lo=0.0, hi=1e6),
        loop=loop in {"1", "true"},
    )
