"""Sans-IO decoders for GNSS receiver streams: NMEA 0183, RTCM 3 and RINEX (STYLE rules 3–8).

Nothing here opens a socket or file descriptor of its own, reads a clock, or logs: callers feed
bytes (or lines) and receive typed, immutable messages.
"""

from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._epoch import EPOCH_DTYPES, ObsEpoch
from ._errors import ConfigError, DaemonError, OutputError, ParseError, TransportError
from ._gnsstime import (
    BDS_GPS_OFFSET_S,
    GPS_EPOCH,
    SECONDS_PER_WEEK,
    GpsTime,
    gps_to_utc,
    leap_seconds_at,
    utc_to_gps,
)
from ._signals import (
    GLO_NO_CHANNEL,
    MAX_SAT_ID,
    SYSTEMS,
    carrier_frequency_hz,
    frequencies_hz,
    sat_id,
    sat_name,
    signal_code,
    signal_name,
    system_of,
)

__all__ = [
    "BDS_GPS_OFFSET_S",
    "EPOCH_DTYPES",
    "GLO_NO_CHANNEL",
    "GPS_EPOCH",
    "MAX_SAT_ID",
    "SECONDS_PER_WEEK",
    "SYSTEMS",
    "ConfigError",
    "DaemonError",
    "GlonassEphemeris",
    "GpsTime",
    "KeplerEphemeris",
    "ObsEpoch",
    "OutputError",
    "ParseError",
    "TransportError",
    "carrier_frequency_hz",
    "frequencies_hz",
    "gps_to_utc",
    "leap_seconds_at",
    "sat_id",
    "sat_name",
    "signal_code",
    "signal_name",
    "system_of",
    "utc_to_gps",
]
