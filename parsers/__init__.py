"""Sans-IO decoders for GNSS receiver streams: NMEA 0183, RTCM 3 and RINEX (STYLE rules 3–8).

Nothing here opens a socket or file descriptor of its own, reads a clock, or logs: callers feed
bytes (or lines) and receive typed, immutable messages.
"""

from ._crc import frame_rtcm
from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._epoch import EPOCH_DTYPES, ObsEpoch
from ._errors import ConfigError, DaemonError, OutputError, ParseError, TransportError
from ._framer import (
    MAX_INCOMPLETE_FRAME,
    NEED_DATA,
    Frame,
    Framer,
    FramerStatistics,
    NeedData,
    NmeaFrame,
    RtcmFrame,
)
from ._gnsstime import (
    BDS_GPS_OFFSET_S,
    GPS_EPOCH,
    SECONDS_PER_WEEK,
    GpsTime,
    gps_to_utc,
    leap_seconds_at,
    utc_to_gps,
)
from ._msm import MSM_TYPES, MsmMessage, decode_msm
from ._msm_encode import encode_msm
from ._nmea import (
    GgaFix,
    GnsFix,
    GsaDop,
    GstErrors,
    GsvAssembler,
    GsvPart,
    NmeaMessage,
    NmeaOther,
    RmcFix,
    SatellitesInView,
    VtgVelocity,
    ZdaTime,
    decode_sentence,
    nmea_sat_id,
)
from ._nmea_encode import encode_gga, encode_gst, encode_gsv, encode_rmc
from ._rinex_nav import RinexNavHeader, RinexNavParser, iter_rinex_nav
from ._rinex_obs import RinexObsParser, RinexObsStatistics, iter_rinex_obs
from ._rinex_obs_header import RinexObsHeader
from ._rinex_open import open_rinex_text
from ._rinex_write import (
    format_nav_header,
    format_nav_record,
    format_obs_epoch,
    format_obs_header,
    write_rinex_nav,
    write_rinex_obs,
)
from ._rtcm_eph_encode import encode_1005, encode_ephemeris, quantise_for_rtcm
from ._rtcm_misc import DecodeContext
from ._rtcm_station import ReceiverDescriptor, StationReference
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
from ._stream import Message, RawRtcm, StreamDecoder, StreamStatistics

__all__ = [
    "BDS_GPS_OFFSET_S",
    "EPOCH_DTYPES",
    "GLO_NO_CHANNEL",
    "GPS_EPOCH",
    "MAX_INCOMPLETE_FRAME",
    "MAX_SAT_ID",
    "MSM_TYPES",
    "NEED_DATA",
    "SECONDS_PER_WEEK",
    "SYSTEMS",
    "ConfigError",
    "DaemonError",
    "DecodeContext",
    "Frame",
    "Framer",
    "FramerStatistics",
    "GgaFix",
    "GlonassEphemeris",
    "GnsFix",
    "GpsTime",
    "GsaDop",
    "GstErrors",
    "GsvAssembler",
    "GsvPart",
    "KeplerEphemeris",
    "Message",
    "MsmMessage",
    "NeedData",
    "NmeaFrame",
    "NmeaMessage",
    "NmeaOther",
    "ObsEpoch",
    "OutputError",
    "ParseError",
    "RawRtcm",
    "ReceiverDescriptor",
    "RinexNavHeader",
    "RinexNavParser",
    "RinexObsHeader",
    "RinexObsParser",
    "RinexObsStatistics",
    "RmcFix",
    "RtcmFrame",
    "SatellitesInView",
    "StationReference",
    "StreamDecoder",
    "StreamStatistics",
    "TransportError",
    "VtgVelocity",
    "ZdaTime",
    "carrier_frequency_hz",
    "decode_msm",
    "decode_sentence",
    "encode_1005",
    "encode_ephemeris",
    "encode_gga",
    "encode_gst",
    "encode_gsv",
    "encode_msm",
    "encode_rmc",
    "format_nav_header",
    "format_nav_record",
    "format_obs_epoch",
    "format_obs_header",
    "frame_rtcm",
    "frequencies_hz",
    "gps_to_utc",
    "iter_rinex_nav",
    "iter_rinex_obs",
    "leap_seconds_at",
    "nmea_sat_id",
    "open_rinex_text",
    "quantise_for_rtcm",
    "sat_id",
    "sat_name",
    "signal_code",
    "signal_name",
    "system_of",
    "utc_to_gps",
    "write_rinex_nav",
    "write_rinex_obs",
]
