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

from pydantic import Field, SecretStr, field_validator

from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.ingest._source import SourceSpec, parse_source

from ._base import Section

__all__ = ["StationSettings"]


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
        try:  # the transport layer owns the URL forms (options, ranges, secrets not in URLs)
            parse_source(value)
        except ConfigError as exc:
            raise ValueError(exc.reason) from exc
        return value

    @property
    def source_spec(self) -> SourceSpec:
        """The parsed source (one of the ``ionwarden.daemon.ingest`` source specs)."""
        return parse_source(self.source)
