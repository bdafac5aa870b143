"""`ionwarden run` as systemd runs it: a real process, $NOTIFY_SOCKET, SIGHUP and SIGTERM."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from .conftest import REPO


def _config(path: Path, ports: list[int], state: Path) -> None:
    text = "".join(
        f'[[stations]]\nname = "st{i}"\nsource = "tcp://127.0.0.1:{p}"\n'
        for i, p in enumerate(ports)
    )
    text += f'[mqtt]\nenabled = false\n[prometheus]\nport = 0\n[runtime]\nstate_dir = "{state}"\n'
    path.write_text(text)


def _recv_until(sock: socket.socket, prefix: str, timeout_s: float = 20.0) -> list[str]:
    """Collect notifications until one starts with ``prefix`` (bounded wait on the socket)."""
    got: list[str] = []
    sock.settimeout(timeout_s)
    while True:
        msg = sock.recv(4096).decode()
        got.append(msg)
        if msg.startswith(prefix):
            return got


@pytest.mark.integration
def test_run_process_notifies_reloads_on_sighup_and_stops_on_sigterm(tmp_path: Path) -> None:
    """ionwarden run sends READY=1, RELOADING=1 then READY=1 on SIGHUP, STOPPING=1 and exits 0 on SIGTERM."""
    listeners = [socket.create_server(("127.0.0.1", 0)) for _ in range(2)]
    ports = [s.getsockname()[1] for s in listeners]
    cfg = tmp_path / "ionwarden.toml"
    _config(cfg, ports[:1], tmp_path / "state")
    notify = tmp_path / "notify"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
        sock.bind(str(notify))
        env = dict(os.environ, NOTIFY_SOCKET=str(notify), PYTHONPATH=str(REPO))
        proc = subprocess.Popen(
            [
                sys.executable,
                "-c",
                "import sys; from ionwarden.daemon.cli import main; sys.exit(main())",
                "run",
                "--config",
                str(cfg),
            ],
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        try:
            first = _recv_until(sock, "READY=1")
            assert any("1/1 stations streaming" in m or "READY=1" in m for m in first)
            _config(cfg, ports, tmp_path / "state")  # add a second station
            proc.send_signal(signal.SIGHUP)
            reload = _recv_until(sock, "READY=1")
            assert any(m.startswith("RELOADING=1") for m in reload)
            t0 = time.monotonic()
            proc.send_signal(signal.SIGTERM)
            stop = _recv_until(sock, "STOPPING=1")
            rc = proc.wait(timeout=10)
            elapsed = time.monotonic() - t0
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
            for s in listeners:
                s.close()
        err = proc.stderr.read() if proc.stderr else ""
        if proc.stderr:
            proc.stderr.close()
    assert stop
    assert rc == 0, err
    assert elapsed < 5.0  # the unit's stop budget (issue 7)
    assert "reload: starting station st1" in err
    assert "reload: stopping station st0" not in err  # unchanged station kept running
