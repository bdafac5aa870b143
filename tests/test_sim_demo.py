"""The bundled demo capture: size, provenance (rebuilt byte for byte), decodability."""

from __future__ import annotations

import importlib.util
from importlib.machinery import SourceFileLoader
from pathlib import Path
from types import ModuleType

import pytest

DATA = Path(__file__).resolve().parents[1] / "daemon" / "data"


def _make_demo() -> ModuleType:
    """scripts/make-demo imported as a module (it has no .py suffix)."""
    path = Path(__file__).resolve().parents[1] / "scripts" / "make-demo"
    loader = SourceFileLoader("make_demo", str(path))
    spec = importlib.util.spec_from_loader("make_demo", loader)
    assert spec is not None
    module = importlib.util.module_from_spec(spec)
    loader.exec_module(module)
    return module


def test_demo_bin_is_small_and_documented() -> None:
    """demo.bin stays under 2 MB and demo.md describes the invented scenario."""
    assert (DATA / "demo.bin").stat().st_size < 2 * 1024 * 1024
    text = (DATA / "demo.md").read_text()
    assert "invented" in text
    assert f"{(DATA / 'demo.bin').stat().st_size:,}" in text


@pytest.mark.slow
def test_demo_bin_rebuilds_byte_identical_and_decodes_in_pyrtcm() -> None:
    """scripts/make-demo rebuilds demo.bin byte for byte; every frame parses (pyrtcm decode)."""
    from pyrtcm import RTCMReader

    data = _make_demo().build()
    assert data == (DATA / "demo.bin").read_bytes()
    i = frames = 0
    while i < len(data):
        if data[i] == 0xD3:
            n = ((data[i + 1] & 3) << 8) | data[i + 2]
            RTCMReader.parse(data[i : i + 6 + n], validate=1)  # raises on a CRC error
            frames += 1
            i += 6 + n
        else:
            assert data[i : i + 1] == b"$"
            i = data.index(b"\n", i) + 1
    assert frames > 9_000
