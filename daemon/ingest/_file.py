"""File replay and standard input.

A file is read in chunks as fast as the consumer takes them; pacing against the data's own
timestamps (``speed``) belongs to the station loop, which sees decoded epoch times (the transport
only sees bytes). Standard input is a pipe, a terminal or a redirected file.
"""

from __future__ import annotations

import asyncio
import os
import stat
from typing import Self

from ionwarden.daemon.errors import TransportError

from ._transport import SourceRejectedError, map_transport_errors

__all__ = ["FileTransport", "StdinTransport"]


class FileTransport:
    """A regular file (or file descriptor of one), read from its start; ``loop`` restarts at EOF.

    Reads run in a worker thread, so a slow disk (an SD card, NFS) never stalls the event loop.
    """

    def __init__(self, fd: int, *, what: str, loop: bool = False):
        self._fd = fd
        self._what = what
        self._loop = loop
        self._closed = False
        self.passes = 0  # completed passes over the file (counts loops)

    @classmethod
    async def open(cls, path: str, *, loop: bool = False) -> Self:
        """Open a regular file; a FIFO or device is refused (:class:`SourceRejectedError`).

        Opened non-blocking, so a FIFO without a writer cannot block the open: a worker thread
        stuck in ``open``/``read`` would hold up interpreter exit, and shutdown must stay bounded.
        """
        what = f"file://{path}"
        flags = os.O_RDONLY | os.O_CLOEXEC | os.O_NONBLOCK
        with map_transport_errors(f"{what}: open"):
            fd = await asyncio.to_thread(os.open, path, flags)
            try:
                regular = stat.S_ISREG(os.fstat(fd).st_mode)
                if regular:
                    os.set_blocking(fd, True)
            except BaseException:
                os.close(fd)
                raise
        if not regular:
            os.close(fd)
            raise SourceRejectedError(
                f"{what}: not a regular file (use stdin:// for a pipe, serial:// for a device)",
                status="not a regular file",
            )
        return cls(fd, what=what, loop=loop)

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        if max_bytes <= 0:
            raise ValueError(f"max_bytes must be > 0, got {max_bytes}")
        with map_transport_errors(f"{self._what}: read"):
            data = await asyncio.to_thread(os.read, self._fd, max_bytes)
            if not data and self._loop:
                self.passes += 1
                os.lseek(self._fd, 0, os.SEEK_SET)
                data = await asyncio.to_thread(os.read, self._fd, max_bytes)
        if not data:
            self.passes += 1
        return data

    async def aclose(self) -> None:
        if self._closed:
            return
        self._closed = True
        os.close(self._fd)


class _PipeTransport:
    def __init__(
        self, reader: asyncio.StreamReader, transport: asyncio.ReadTransport, *, what: str
    ):
        self._reader = reader
        self._transport = transport
        self._what = what
        self._closed = False

    async def read(self, max_bytes: int) -> bytes:
        if self._closed:
            raise TransportError(f"{self._what}: read after close")
        try:
            return await self._reader.read(max_bytes)
        except OSError:  # translated only when raised (as TcpTransport.read)
            with map_transport_errors(f"{self._what}: read"):
                raise

    async def aclose(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._transport.close()


class StdinTransport:
    """Standard input (or any inherited descriptor ``fd``), duplicated so closing leaves fd 0 alone."""

    @staticmethod
    async def open(fd: int = 0) -> FileTransport | _PipeTransport:
        what = "stdin:" if fd == 0 else f"fd:{fd}"
        with map_transport_errors(f"{what}: open"):
            own = os.dup(fd)
            if stat.S_ISREG(os.fstat(own).st_mode):
                return FileTransport(own, what=what)
            loop = asyncio.get_running_loop()
            reader = asyncio.StreamReader(limit=1 << 20)
            pipe = os.fdopen(own, "rb", buffering=0, closefd=True)
            transport, _ = await loop.connect_read_pipe(
                lambda: asyncio.StreamReaderProtocol(reader), pipe
            )
        return _PipeTransport(reader, transport, what=what)
