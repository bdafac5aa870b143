"""Checkpoints of long-to-build estimator state (levelling arcs, receiver DCB, ROTI windows).

One file per station in the state directory (``$STATE_DIRECTORY`` under systemd), written
atomically (temporary file, fsync, rename). The format is numpy's ``.npz`` with pickling OFF: the
estimator's ``state_dict()`` is flattened to ``"a/b/c"`` keys holding arrays, numbers or strings,
so a tampered file can never run code. A checkpoint is restored only when it names the same station
and configuration fingerprint and is younger than ``max_age_s`` (wall clock).
"""

from __future__ import annotations

import hashlib
import logging
import os
import zipfile
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from collections.abc import Mapping
    from pathlib import Path

__all__ = ["CHECKPOINT_FORMAT", "fingerprint", "load_checkpoint", "save_checkpoint"]

log = logging.getLogger("ionwarden.daemon.runtime.checkpoint")

#: Bumped whenever the layout of the file itself changes.
CHECKPOINT_FORMAT = 1
_META = "__meta__/"


def fingerprint(*parts: str) -> str:
    """A short stable hash of what makes a checkpoint applicable (estimator config, source)."""
    return hashlib.sha256("\x1f".join(parts).encode()).hexdigest()[:16]


def _flatten(state: Mapping[str, Any], prefix: str, out: dict[str, np.ndarray[Any, Any]]) -> None:
    for key, value in state.items():
        if "/" in key:
            raise ValueError(f"checkpoint key {key!r} must not contain '/'")
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            _flatten(value, name + "/", out)
            continue
        arr = np.asarray(value)
        if arr.dtype == object:
            raise ValueError(
                f"checkpoint value {name!r} is not numeric or text ({type(value).__name__})"
            )
        out[name] = arr


def _unflatten(flat: Mapping[str, np.ndarray[Any, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name, arr in flat.items():
        *parents, leaf = name.split("/")
        node = out
        for p in parents:
            node = node.setdefault(p, {})
        node[leaf] = arr.item() if arr.ndim == 0 else arr
    return out


def _path(state_dir: Path, station: str) -> Path:
    return state_dir / f"checkpoint-{station}.npz"


def save_checkpoint(
    state_dir: Path, station: str, state: Mapping[str, Any], *, fp: str, wall_time_s: float
) -> Path:
    """Write ``state`` for ``station`` atomically; returns the file written."""
    flat: dict[str, np.ndarray[Any, Any]] = {}
    _flatten(state, "", flat)
    flat[_META + "format"] = np.asarray(CHECKPOINT_FORMAT)
    flat[_META + "station"] = np.asarray(station)
    flat[_META + "fingerprint"] = np.asarray(fp)
    flat[_META + "saved_wall_s"] = np.asarray(wall_time_s)
    state_dir.mkdir(parents=True, exist_ok=True)
    final = _path(state_dir, station)
    tmp = final.with_suffix(".tmp")
    with tmp.open("wb") as fh:
        np.savez(fh, allow_pickle=False, **flat)
        fh.flush()
        os.fsync(fh.fileno())
    tmp.replace(final)
    return final


def load_checkpoint(
    state_dir: Path, station: str, *, fp: str, wall_time_s: float, max_age_s: float
) -> dict[str, Any] | None:
    """The saved state when present, readable and still valid; else None (and why, logged)."""
    path = _path(state_dir, station)
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as npz:
            flat = {name: npz[name] for name in npz.files}
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as exc:
        log.warning("checkpoint %s unreadable, ignored: %s", path, exc)
        return None
    meta = {k.removeprefix(_META): v.item() for k, v in flat.items() if k.startswith(_META)}
    why = ""
    if meta.get("format") != CHECKPOINT_FORMAT:
        why = f"format {meta.get('format')} != {CHECKPOINT_FORMAT}"
    elif meta.get("station") != station:
        why = f"it belongs to station {meta.get('station')!r}"
    elif meta.get("fingerprint") != fp:
        why = "the configuration changed since it was written"
    elif not (0.0 <= wall_time_s - float(meta.get("saved_wall_s", -1e18)) <= max_age_s):
        why = f"older than {max_age_s:.0f} s"
    if why:
        log.info("checkpoint %s not restored: %s", path, why)
        return None
    return _unflatten({k: v for k, v in flat.items() if not k.startswith(_META)})
