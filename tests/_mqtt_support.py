"""Helpers for the MQTT tests and bench: the broker address, a private broker, a collecting client.

Not a test module. The shared broker comes from IONWARDEN_TEST_MQTT_HOST / _PORT (default
127.0.0.1:1883); tests that must kill a broker start their own ``mosquitto`` on a free port.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import shutil
import socket
import subprocess
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import aiomqtt
import pytest

BROKER_HOST = os.environ.get("IONWARDEN_TEST_MQTT_HOST", "127.0.0.1")
BROKER_PORT = int(os.environ.get("IONWARDEN_TEST_MQTT_PORT", "1883"))


def need(what: str, ok: bool) -> None:
    """Skip with a clear reason when a local service is missing — but fail under CI=true."""
    if ok:
        return
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"{what} is required in CI")
    pytest.skip(f"{what} not available (set CI=true to make this a failure)")


def port_open(host: str, port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.5)
        try:
            s.connect((host, port))
        except OSError:
            return False
    return True


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def unique_prefix() -> str:
    return f"iwtest/{uuid.uuid4().hex[:12]}"


class PrivateBroker:
    """A ``mosquitto`` subprocess on a free loopback port, with on-disk persistence so a subscriber's
    session (and the QoS 1 messages queued for it) survives a broker restart."""

    def __init__(self, workdir: Path, extra_config: str = "") -> None:
        self.port = free_port()
        self.conf = workdir / "mosquitto.conf"
        (workdir / "data").mkdir(exist_ok=True)
        self.conf.write_text(
            f"listener {self.port} 127.0.0.1\n"
            "allow_anonymous true\n"
            "persistence true\n"
            f"persistence_location {workdir / 'data'}/\n"
            "log_dest none\n" + ("user root\n" if os.geteuid() == 0 else "") + extra_config,
            # As root, mosquitto would drop to user "mosquitto", which cannot write into pytest's
            # private tmp dir: stay the invoking user (test-only setting).
            encoding="utf-8",
        )
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        self.proc = subprocess.Popen(
            [exe, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        deadline = time.monotonic() + 10.0
        while not port_open("127.0.0.1", self.port):
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("private mosquitto did not start")
            time.sleep(0.02)

    def stop(self) -> None:
        proc, self.proc = self.proc, None
        if proc is None:
            return
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)


@contextlib.contextmanager
def private_broker(workdir: Path) -> Iterator[PrivateBroker]:
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    need("mosquitto executable", Path(exe).exists())
    broker = PrivateBroker(workdir)
    broker.start()
    try:
        yield broker
    finally:
        broker.stop()


async def collect(
    client: aiomqtt.Client, *, until, timeout_s: float = 20.0
) -> list[tuple[str, dict, bool]]:
    """Receive (topic, JSON payload, retain flag) until ``until(received)`` is true (bounded)."""
    got: list[tuple[str, dict, bool]] = []
    if until(got):
        return got
    async with asyncio.timeout(timeout_s):
        async for msg in client.messages:
            payload = msg.payload if isinstance(msg.payload, bytes) else b""
            got.append((msg.topic.value, json.loads(payload) if payload else {}, msg.retain))
            if until(got):
                return got
    return got


def persistent_client(port: int, identifier: str) -> aiomqtt.Client:
    """A subscriber on the local broker at ``port`` whose session (subscriptions, queued QoS 1
    messages) outlives its connection: the same ``identifier``, clean_session off."""
    return aiomqtt.Client("127.0.0.1", port, identifier=identifier, clean_session=False, timeout=5)


def schema_of(topic: str) -> str:
    """Which payload schema a topic of our tree carries."""
    parts = topic.split("/")
    if parts[-2] == "alarm":
        return "alarm-state"
    leaf = parts[-1]
    if parts[-2] == "_daemon":
        return {"status": "daemon-status", "health": "daemon-health"}[leaf]
    return {
        "status": "station-status",
        "summary": "summary",
        "satellites": "satellites",
        "events": "alarm-event",
    }[leaf]


#: MQTT v5 CONNACK: session present 0, reason code 0 (success), no properties (MQTT 5.0 §3.2).
CONNACK_V5 = b"\x20\x03\x00\x00\x00"


class ScriptedBroker:
    """A scripted MQTT peer on a free loopback port, for the cases a real broker will not play
    (never acknowledging, acknowledging late): subclasses write ``_serve`` (one connection)."""

    def __init__(self) -> None:
        self.writers: list[asyncio.StreamWriter] = []
        self.server: asyncio.Server | None = None

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        raise NotImplementedError

    async def _accepted(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.writers.append(writer)
        await self._serve(reader, writer)

    async def __aenter__(self) -> ScriptedBroker:
        self.server = await asyncio.start_server(self._accepted, "127.0.0.1", 0)
        return self

    async def __aexit__(self, *exc: object) -> None:
        assert self.server is not None
        self.server.close()
        for w in self.writers:
            w.close()

    @property
    def port(self) -> int:
        assert self.server is not None
        return int(self.server.sockets[0].getsockname()[1])
