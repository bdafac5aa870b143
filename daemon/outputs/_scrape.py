"""The exporter's HTTP endpoint: a threaded WSGI server whose GET writes the exposition itself.

What is served matches prometheus_client's own WSGI app (``make_wsgi_app``): the same content
negotiation (``choose_encoder``: Prometheus text 0.0.4 by default, OpenMetrics 1.0 or text 1.0
when the ``Accept`` header asks), gzip only when ``Accept-Encoding`` names it, the same status
line, content types and body bytes. Only the writing differs: the snapshot families come from
:meth:`SnapshotCollector.render`, the registry's other families (the latency histogram, anything
else registered on it) from :class:`MetricWriter`. Whatever those do not cover — other methods,
``/favicon.ico``, ``name[]`` filters, escaping schemes that rewrite names, timestamps or
exemplars — prometheus_client writes as before.
"""

from __future__ import annotations

import gzip
import socket
import threading
from socketserver import ThreadingMixIn
from typing import TYPE_CHECKING, Any, Final
from urllib.parse import parse_qs
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

from prometheus_client.exposition import choose_encoder, gzip_accepted, make_wsgi_app

from ._exposition import MetricWriter

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable
    from typing import TypeAlias

    from prometheus_client import CollectorRegistry

    from ._exporter import SnapshotCollector

    #: A WSGI application (PEP 3333): environ, start_response → body chunks.
    WsgiApp: TypeAlias = Callable[[dict[str, Any], Callable[..., Any]], Iterable[bytes]]

__all__ = ["GZIP_LEVEL", "Scraper", "serve"]

#: gzip effort for compressed scrapes. prometheus_client uses 9; at ~300 kB of exposition level 1
#: is several times faster for a body ~25% larger, and the scrape is what issue 8 bounds.
GZIP_LEVEL: Final = 1
#: Escaping schemes (exposition format spec, "escaping" parameter) that leave our names — all
#: within the legacy [a-zA-Z_:][a-zA-Z0-9_:]* set — unchanged; others go to prometheus_client.
_NAME_PRESERVING = frozenset({"underscores", "allow-utf-8"})
_OPENMETRICS = "application/openmetrics-text"


class Scraper:
    """Builds the /metrics body of ``registry``, writing ``collector``'s families with our writer
    (:meth:`SnapshotCollector.render`) and the registry's other families with :class:`MetricWriter`.

    ``collector`` must be registered on ``registry`` before any other collector, so that the body
    keeps the registry's family order (ours first) and equals prometheus_client's byte for byte.
    """

    def __init__(self, registry: CollectorRegistry, collector: SnapshotCollector) -> None:
        self._registry = registry
        self._collector = collector
        self._writer = MetricWriter()
        self._fallback = make_wsgi_app(registry)

    def exposition(self, accept: str = "") -> tuple[bytes, str]:
        """The body (before any gzip) and content type a GET with this ``Accept`` header gets."""
        encoder, content_type = choose_encoder(accept)
        _, _, escaping = content_type.partition("escaping=")
        if escaping and escaping not in _NAME_PRESERVING:
            return encoder(self._registry), content_type
        openmetrics = content_type.startswith(_OPENMETRICS)
        ours = self._collector.render(openmetrics=openmetrics)
        with self._collector.silenced():
            others = list(self._registry.collect())
        rest = self._writer.render(others, openmetrics=openmetrics)
        if rest is None:  # something only prometheus_client writes: let it write everything
            return encoder(self._registry), content_type
        return (ours + rest + ("# EOF\n" if openmetrics else "")).encode(), content_type

    def app(self, environ: dict[str, Any], start_response: Callable[..., Any]) -> Iterable[bytes]:
        """The WSGI app (PEP 3333) the server runs."""
        query = environ.get("QUERY_STRING", "")
        if (
            environ["REQUEST_METHOD"] != "GET"
            or environ.get("PATH_INFO") == "/favicon.ico"
            or (query and "name[]" in parse_qs(query))
        ):
            return self._fallback(environ, start_response)  # type: ignore[no-any-return]
        output, content_type = self.exposition(environ.get("HTTP_ACCEPT", ""))
        headers = [("Content-Type", content_type)]
        if gzip_accepted(environ.get("HTTP_ACCEPT_ENCODING", "")):
            output = gzip.compress(output, compresslevel=GZIP_LEVEL)
            headers.append(("Content-Encoding", "gzip"))
        start_response("200 OK", headers)
        return [output]


class _QuietHandler(WSGIRequestHandler):
    """No access log on stderr (the daemon logs through ``logging`` only)."""

    def log_message(self, format: str, *args: Any) -> None:
        pass


class _ThreadingServer(ThreadingMixIn, WSGIServer):
    """One thread per scrape, so a slow client never holds up the next one."""

    daemon_threads = True  # request threads never outlive the process (the stdlib's leak fix)


def serve(app: WsgiApp, address: str, port: int) -> tuple[WSGIServer, threading.Thread]:
    """Bind ``address:port`` (IPv4 or IPv6, as the address resolves) and serve ``app`` from a
    daemon thread; the caller keeps both handles and shuts the server down (STYLE rule 19)."""
    family, _, _, _, sockaddr = socket.getaddrinfo(
        address, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE
    )[0]

    class Server(_ThreadingServer):
        address_family = family

    server = make_server(str(sockaddr[0]), port, app, Server, handler_class=_QuietHandler)
    thread = threading.Thread(
        target=server.serve_forever, name="daemon.output[prometheus]", daemon=True
    )
    thread.start()
    return server, thread
