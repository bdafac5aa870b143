"""Open the transport a source spec describes."""

from __future__ import annotations

from typing import TYPE_CHECKING, assert_never

from ._file import FileTransport, StdinTransport
from ._net import TcpListenTransport, TcpTransport, UdpTransport
from ._ntrip import NtripTransport
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
)

if TYPE_CHECKING:
    from ._transport import Transport

__all__ = ["open_transport"]


async def open_transport(spec: SourceSpec, *, password: str = "") -> Transport:
    """Connect, bind or open the source; raise ``TransportError`` when it cannot be done now.

    ``password`` is the NTRIP password from the station's secret; other sources ignore it.
    """
    if isinstance(spec, TcpSource):
        return await TcpTransport.connect(spec.host, spec.port)
    if isinstance(spec, TcpListenSource):
        return await TcpListenTransport.listen(spec.host, spec.port)
    if isinstance(spec, UdpSource):
        return await UdpTransport.bind(spec.host, spec.port)
    if isinstance(spec, SerialSource):
        return await SerialTransport.open(spec)
    if isinstance(spec, NtripSource):
        return await NtripTransport.connect(spec, password=password)
    if isinstance(spec, FileSource):
        return await FileTransport.open(spec.path, loop=spec.loop)
    if isinstance(spec, StdinSource):
        return await StdinTransport.open()
    assert_never(spec)
