"""The ``[[stations]]`` section: one receiver feed per entry, named by a source URL.

Accepted source URLs (scheme → transport):

* ``serial:///dev/ttyUSB0?baud=115200&parity=N&flow=none``: a receiver on a serial port or USB CDC.
* ``tcp://host:port``: connect to a receiver or stream server that serves raw bytes.
* ``tcp-listen://0.0.0.0:port``: wait for a receiver that pushes its stream to us.
* ``udp://0.0.0.0:port``: datagrams from a receiver.
* ``ntrip://user@caster:2101/MOUNT``: an NTRIP caster mountpoint (the password comes from
  ``ntrip_password`` or a secret, never from the URL).
* ``file://relative/or/absolute/path?speed=10``: replay a capture (RTCM/NMEA bytes or RINEX)
  at ``speed`` × real time (0 = as fast as possible).
* ``stdin:``: read the stream from standard input.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from urllib.parse import parse_qsl, urlsplit

from pydantic import Field, SecretStr, field_validator

from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.ingest._source import parse_source as parse_transport_source

from ._base import Section

__all__ = ["SOURCE_SCHEMES", "SourceSpec", "StationSettings", "parse_source"]

#: Schemes we accept, each with whether it needs a host:port.
SOURCE_SCHEMES: dict[str, bool] = {
    "serial": False,
    "tcp": True,
    "tcp-listen": True,
    "udp": True,
    "ntrip": True,
    "file": False,
    "stdin": False,
}


@dataclass(frozen=True, slots=True)
class SourceSpec:
    """A parsed source URL."""

    scheme: str
    host: str = ""
    port: int = 0
    path: str = ""
    user: str = ""
    params: dict[str, str] = field(default_factory=dict)


def parse_source(url: str) -> SourceSpec:
    """Parse and check a source URL; raises ValueError with a one-line reason."""
    scheme, sep, _ = url.partition(":")
    if not sep:
        raise ValueError(f"not a URL: {url!r} (want e.g. tcp://host:port)")
    scheme = scheme.lower()
    if scheme not in SOURCE_SCHEMES:
        known = ", ".join(sorted(SOURCE_SCHEMES))
        raise ValueError(f"unknown scheme {scheme!r} (known: {known})")
    if scheme == "stdin":
        return SourceSpec(scheme="stdin")
    parts = urlsplit(url)
    params = dict(parse_qsl(parts.query, keep_blank_values=True))
    if SOURCE_SCHEMES[scheme]:
        if not parts.hostname:
            raise ValueError(f"{scheme} source needs a host: {url!r}")
        try:
            port = parts.port
        except ValueError as exc:
            raise ValueError(f"bad port in {url!r}") from exc
        if port is None:
            if scheme != "ntrip":
                raise ValueError(f"{scheme} source needs a port: {url!r}")
            port = 2101  # the NTRIP registered port (IANA, "rtcm-sc104")
        if scheme == "ntrip" and not parts.path.strip("/"):
            raise ValueError(f"ntrip source needs a mountpoint: {url!r}")
        return SourceSpec(
            scheme=scheme,
            host=parts.hostname,
            port=port,
            path=parts.path.lstrip("/"),
            user=parts.username or "",
            params=params,
        )
    # serial:///dev/ttyUSB0 and file://path (netloc + path, so relative paths work)
    path = (parts.netloc + parts.path) if scheme == "file" else parts.path
    if not path:
        raise ValueError(f"{scheme} source needs a path: {url!r}")
    if scheme == "serial" and "baud" in params and not params["baud"].isdigit():
        raise ValueError(f"baud must be a whole number, got {params['baud']!r}")
    if scheme == "file" and "speed" in params:
        try:
            if float(params["speed"]) < 0:
                raise ValueError
        except ValueError as exc:
            raise ValueError(f"speed must be a number >= 0, got {params['speed']!r}") from exc
    return SourceSpec(scheme=scheme, path=path, params=params)


class StationSettings(Section):
    """One receiver feed."""

    name: str = Field(
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,47}$",
        description="Station name, used in topics and labels.",
    )
    source: str = Field(description="Source URL, e.g. tcp://192.0.2.10:5018 (see module doc).")
    enabled: bool = True
    #: Known antenna reference point (ECEF, m); otherwise taken from RTCM 1005/1006, then GGA.
    position_ecef_m: tuple[float, float, float] | None = None
    ntrip_password: SecretStr | None = Field(
        default=None, description="NTRIP password (prefer a secret file)."
    )
    #: Seconds between GGA sentences sent up to an NTRIP network mount (0 = never).
    ntrip_gga_interval_s: float = Field(default=0.0, ge=0.0)

    @field_validator("source")
    @classmethod
    def _check_source(cls, value: str) -> str:
        parse_source(value)
        try:  # the transport layer's own, stricter check (options, ranges, secrets not in URLs)
            parse_transport_source(value)
        except ConfigError as exc:
            raise ValueError(exc.reason) from exc
        return value

    @property
    def source_spec(self) -> SourceSpec:
        return parse_source(self.source)
