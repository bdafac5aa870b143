"""Serial ports through pyserial and its asyncio adapter (pyserial-asyncio-fast).

Framing comes from the source URL. Unplugging a USB adapter surfaces as EIO/ENXIO or a
``SerialException``; both are translated to :class:`SourceUnavailableError`, and the station
supervisor reopens the device path after a backoff delay (udev ``/dev/serial/by-id`` links work
well: the path survives a replug).
"""

from __future__ import annotations

import asyncio
import logging
import termios
from contextlib import contextmanager
from typing import TYPE_CHECKING, Self

import serial
import serial_asyncio_fast

from ionwarden.daemon.errors import TransportError

from ._net import TcpTransport
from ._transport import SourceUnavailableError, map_transport_errors

if TYPE_CHECKING:
    from collections.abc import Iterator

    from ._source import SerialSource

__all__ = ["SerialTransport"]

log = logging.getLogger("ionwarden.daemon.ingest.serial")

_PARITY = {
    "N": serial.PARITY_NONE,
    "E": serial.PARITY_EVEN,
    "O": serial.PARITY_ODD,
    "M": serial.PARITY_MARK,
    "S": serial.PARITY_SPACE,
}


@contextmanager
def _map_serial(what: str) -> Iterator[None]:
    try:
        with map_transport_errors(what):
            yield
    except serial.SerialException as exc:  # pyserial's own type (an OSError subclass without errno)
        raise SourceUnavailableError(f"{what}: {exc}") from exc
    except termios.error as exc:  # the tty refused a setting (not an OSError): say which device
        raise TransportError(f"{what}: the device refused the port settings: {exc}") from exc


class SerialTransport:
    """One open serial device; reads and writes go through the asyncio adapter's streams."""

    def __init__(self, inner: TcpTransport, *, what: str):
        self._inner = inner
        self._what = what

    @classmethod
    async def open(cls, spec: SerialSource) -> Self:
        what = f"serial://{spec.device}"
        with _map_serial(f"{what}: open"):
            reader, writer = await serial_asyncio_fast.open_serial_connection(
                url=spec.device,
                baudrate=spec.baud,
                bytesize=spec.bytesize,
                parity=_PARITY[spec.parity],
                stopbits=spec.stopbits,
                rtscts=spec.flow == "rtscts",
                xonxoff=spec.flow == "xonxoff",
            )
        log.info(
            "%s: open at %d baud %d%s%g", what, spec.baud, spec.bytesize, spec.parity, spec.stopbits
        )
        return cls(TcpTransport(reader, writer, what=what), what=what)

    async def read(self, max_bytes: int) -> bytes:
        try:
            return await self._inner.read(max_bytes)
        except TransportError:
            raise
        except asyncio.IncompleteReadError as exc:  # pragma: no cover - adapter detail
            raise SourceUnavailableError(f"{self._what}: read: {exc}") from exc
        except Exception:
            # Translated only when raised: _map_serial is two generator-based contexts, and one
            # such context around every read cost ~10k instructions a chunk (TcpTransport.read).
            with _map_serial(f"{self._what}: read"):
                raise

    async def aclose(self) -> None:
        await self._inner.aclose()
