"""Loaded by the daemon under ``bench/bench_paired.py`` (this directory first on ``PYTHONPATH``):
switches one runtime behaviour on and off every other burst, so that one run compares both under
the same host load. Inactive unless ``IONWARDEN_PAIRED`` is set.

A burst is a station read after at least 0.5 s without one (each process counts its own; they see
the same bursts). Even bursts run with the behaviour, odd ones without; each burst's number and
state are appended to ``$IONWARDEN_PAIRED_DIR/<pid>.txt``. Behaviours (``IONWARDEN_PAIRED``):

* ``ack-priority``: the step lane's gate (``[runtime] ack_priority_ms``) holds background steps
  in "on" bursts only;
* ``tick``: the burst tick (``[runtime] batch_estimates``) gathers stations in "on" bursts only;
  in "off" ones each station's held epoch is estimated right after its own step, alone;
* ``satellites-later``: a due satellites message is formatted in the station's background turn
  in "on" bursts only (``DeferredAlarms.defer_satellites``), at once with its summary in "off"
  ones.
"""

from __future__ import annotations

import os
import time

_MODE = os.environ.get("IONWARDEN_PAIRED", "")
if _MODE:
    from ionwarden.daemon.runtime import _burst, _deferred_alarms, _lane, _station

    _state = {"last": -1e9, "n": 0, "on": True}
    _path = os.path.join(os.environ.get("IONWARDEN_PAIRED_DIR", "."), f"{os.getpid()}.txt")
    _received = _station.StationRunner._received

    def _counted(self: _station.StationRunner, data: bytes) -> None:
        now = time.monotonic()
        if now - _state["last"] > 0.5:
            _state["n"] += 1
            _state["on"] = _state["n"] % 2 == 0
            with open(_path, "a", encoding="ascii") as f:
                f.write(f"{_state['n']} {int(_state['on'])}\n")
        _state["last"] = now
        _received(self, data)

    _station.StationRunner._received = _counted  # type: ignore[method-assign]
    if _MODE == "ack-priority":
        _gated = _lane.StepLane._gated

        def _gated_when_on(self: _lane.StepLane) -> bool:
            return bool(_state["on"]) and _gated(self)

        _lane.StepLane._gated = _gated_when_on  # type: ignore[method-assign]
    elif _MODE == "tick":
        _stepped = _burst.BurstTick.stepped

        def _stepped_when_on(
            self: _burst.BurstTick, runner: _station.StationRunner, arrived: float | None,
            urgent_waiting: bool,
        ) -> None:  # fmt: skip
            _stepped(self, runner, arrived, urgent_waiting and bool(_state["on"]))

        _burst.BurstTick.stepped = _stepped_when_on  # type: ignore[method-assign]
    elif _MODE == "satellites-later":
        _defer = _deferred_alarms.DeferredAlarms.defer_satellites

        def _defer_when_on(self: _deferred_alarms.DeferredAlarms, snap: object) -> None:
            if _state["on"]:
                _defer(self, snap)  # type: ignore[arg-type]
            elif self._publisher is not None:
                self._publisher.publish_satellites_nowait(snap)  # type: ignore[arg-type]

        _deferred_alarms.DeferredAlarms.defer_satellites = _defer_when_on  # type: ignore[method-assign]
    else:
        raise SystemExit(
            f"IONWARDEN_PAIRED: unknown behaviour {_MODE!r} (ack-priority, tick, satellites-later)"
        )
