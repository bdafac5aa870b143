"""The one interface every byte source implements, plus the in-memory one used by tests (STYLE rule 12).

``read(max_bytes)`` waits for at least one byte and returns up to ``max_bytes`` of them; it returns
``b""`` only at end of stream (peer closed, end of file). ``aclose()`` releases the resource and is
idempotent. Failures surface as :class:`~ionwarden.daemon.errors.TransportError`: OS and serial
errors are translated where they enter (:func:`map_transport_errors`), never leaked.

Which failures are worth a reconnect is an explicit list (STYLE rule 10): :data:`TRANSIENT_ERRNOS`
for OS errors, and the :class:`TransportError` subclasses below. The station supervisor retries
exactly ``TransportError`` (and nothing else) after a backoff delay.
"""

from __future__ import annotations

import errno
from contextlib import contextmanager
from typing import TYPE_CHECKING, Protocol, runtime_checkable

from ionwarden.daemon.errors import TransportError

if TYPE_CHECKING:
    from collections.abc import Iterable, Iterator

__all__ = [
    "TRANSIENT_ERRNOS",
    "MemoryTransport",
    "SourceRejectedError",
    "SourceUnavailableError",
    "Transport",
    "map_transport_errors",
]

#: OS errors a source may raise that a reconnect can cure: link down, peer gone, device unplugged
#: (a USB serial adapter pulled gives EIO/ENXIO/ENODEV), name lookup hiccups (EAI via socket.gaierror).
TRANSIENT_ERRNOS: frozenset[int] = frozenset(
    {
        errno.ECONNREFUSED,
        errno.ECONNRESET,
        errno.ECONNABORTED,
        errno.EPIPE,
        errno.ETIMEDOUT,
        errno.EHOSTUNREACH,
        errno.ENETUNREACH,
        errno.ENETDOWN,
        errno.EHOSTDOWN,
        errno.EADDRNOTAVAIL,
        errno.EADDRINUSE,
        errno.EIO,
        errno.ENXIO,
        errno.ENODEV,
        errno.ENOENT,  # /dev/ttyUSB0 not there yet (adapter unplugged)
        errno.EBUSY,
        errno.EAGAIN,
    }
)


class SourceUnavailableError(TransportError):
    """The source could not be reached or dropped the link; a reconnect may succeed."""


class SourceRejectedError(TransportError):
    """The source answered but refused us (NTRIP 401, unknown mountpoint).

    Retried too (credentials and mount tables change on the caster side), but the station status
    names the refusal so that an operator sees it at once.
    """

    def __init__(self, reason: str, *, status: str):
        super().__init__(reason)
        self.status = status


@runtime_checkable
class Transport(Protocol):
    """A byte stream from one receiver."""

    async def read(self, max_bytes: int) -> bytes:
        """Wait for data; return 1..max_bytes bytes, or ``b""`` only at end of stream."""
        ...

    async def aclose(self) -> None:
        """Release the resource; safe to call twice."""
        ...


@contextmanager
def map_transport_errors(what: str) -> Iterator[None]:
    """Translate OS and serial errors raised inside the block to our transport errors.

    Errnos on :data:`TRANSIENT_ERRNOS` (and timeouts, EOF-like resets) become
    :class:`SourceUnavailableError`; any other ``OSError`` becomes a plain :class:`TransportError`,
    which the station supervisor also retries but logs at error level.
    """
    try:
        yield
    except TransportError:
        raise
    except (TimeoutError, ConnectionError) as exc:
        raise SourceUnavailableError(f"{what}: {exc or type(exc).__name__}") from exc
    except OSError as exc:
        if exc.errno in TRANSIENT_ERRNOS or exc.errno is None:
            raise SourceUnavailableError(f"{what}: {exc.strerror or exc}") from exc
        raise TransportError(f"{what}: {exc}") from exc


class MemoryTransport:
    """A transport that returns the given chunks in order, then EOF (or an error, if given).

    ``read`` never returns more than ``max_bytes``: a longer chunk is handed out in pieces.
    """

    def __init__(self, chunks: Iterable[bytes], *, error: TransportError | None = None):
        self._chunks = [bytes(c) for c in chunks if c]
        self._error = error
        self.closed = False

    async def read(self, max_bytes: int) -> bytes:
        if self.closed:
            raise TransportError("memory transport: read after close")
        if max_bytes <= 0:
            raise ValueError(f"max_bytes must be > 0, got {max_bytes}")
        if not self._chunks:
            if self._error is not None:
                raise self._error
            return b""
        head = self._chunks[0]
        if len(head) > max_bytes:
            self._chunks[0] = head[max_bytes:]
            return head[:max_bytes]
        del self._chunks[0]
        return head

    async def aclose(self) -> None:
        self.closed = True
