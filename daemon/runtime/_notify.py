"""The systemd notification protocol (sd_notify(3)): one datagram per message to $NOTIFY_SOCKET.

Written here rather than imported: it is a dozen lines. ``READY=1``, ``STATUS=…``, ``WATCHDOG=1``,
``STOPPING=1`` and ``RELOADING=1`` are the fields we send. Outside systemd (no $NOTIFY_SOCKET) every
call is a no-op. Sending never blocks (datagram socket, non-blocking): a full socket buffer loses one
notification rather than stalling the daemon.
"""

from __future__ import annotations

import logging
import os
import socket

__all__ = ["SdNotifier", "watchdog_interval_s"]

log = logging.getLogger("ionwarden.daemon.runtime.notify")


class SdNotifier:
    """Sends notifications to the socket named by ``address`` (default: ``$NOTIFY_SOCKET``)."""

    def __init__(self, address: str | None = None):
        addr = os.environ.get("NOTIFY_SOCKET", "") if address is None else address
        self._sock: socket.socket | None = None
        self._addr = ""
        self.sent: list[str] = []  # the last few messages, for status and tests
        if not addr:
            return
        if addr.startswith("@"):  # abstract namespace (sd_notify(3))
            addr = "\0" + addr[1:]
        elif not addr.startswith("/"):
            log.warning("NOTIFY_SOCKET=%r is neither a path nor abstract; not notifying", addr)
            return
        self._addr = addr
        self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
        self._sock.setblocking(False)

    @property
    def enabled(self) -> bool:
        return self._sock is not None

    def notify(self, *fields: str) -> None:
        """Send ``fields`` (``"READY=1"``, ``"STATUS=…"``) as one datagram; never raises, never blocks."""
        message = "\n".join(fields)
        self.sent = [*self.sent[-15:], message]
        if self._sock is None:
            return
        try:
            self._sock.sendto(message.encode("utf-8", "replace"), self._addr)
        except OSError as exc:  # systemd gone or buffer full: nothing a daemon can do but note it
            log.debug("sd_notify %r failed: %s", message[:40], exc)

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None


def watchdog_interval_s(environ: dict[str, str] | None = None) -> float | None:
    """Half of systemd's WatchdogSec (``$WATCHDOG_USEC``) for this process, or None when off."""
    env = os.environ if environ is None else environ
    usec = env.get("WATCHDOG_USEC", "")
    pid = env.get("WATCHDOG_PID", "")
    if not usec.isdigit() or int(usec) == 0:
        return None
    if pid and pid.isdigit() and int(pid) != os.getpid():
        return None
    return int(usec) / 2e6
