"""Receiver byte sources behind one tiny transport interface (STYLE rule 12).

``parse_source(url)`` validates a station's source URL; ``open_transport(spec)`` opens it. Every
transport has ``read(max_bytes) -> bytes`` (``b""`` only at end of stream) and ``aclose()``.
"""

from ._file import FileTransport, StdinTransport
from ._net import TcpListenTransport, TcpTransport, UdpTransport
from ._ntrip import ChunkedDecoder, MountEntry, NtripTransport, fetch_sourcetable, format_gga
from ._open import open_transport
from ._serial import SerialTransport
from ._source import (
    FileSource,
    NtripSource,
    SerialSource,
    SourceSpec,
    StdinSource,
    TcpListenSource,
    TcpSource,
    UdpSource,
    parse_source,
)
from ._transport import (
    TRANSIENT_ERRNOS,
    MemoryTransport,
    SourceRejectedError,
    SourceUnavailableError,
    Transport,
    map_transport_errors,
)

__all__ = [
    "TRANSIENT_ERRNOS",
    "ChunkedDecoder",
    "FileSource",
    "FileTransport",
    "MemoryTransport",
    "MountEntry",
    "NtripSource",
    "NtripTransport",
    "SerialSource",
    "SerialTransport",
    "SourceRejectedError",
    "SourceSpec",
    "SourceUnavailableError",
    "StdinSource",
    "StdinTransport",
    "TcpListenSource",
    "TcpListenTransport",
    "TcpSource",
    "TcpTransport",
    "Transport",
    "UdpSource",
    "UdpTransport",
    "fetch_sourcetable",
    "format_gga",
    "map_transport_errors",
    "open_transport",
    "parse_source",
]
