"""The bundled demo capture: size, provenance (rebuilt byte for byte), decodability."""

from __future__ import annotations

from pathlib import Path

import pytest

from ionwarden.daemon.sim import build_demo, demo_path

DATA = Path(__file__).resolve().parents[1] / "daemon" / "data"


def test_demo_bin_is_small_and_documented() -> None:
    """demo.bin stays under 2 MB, is found as package data, and demo.md describes it."""
    assert demo_path().read_bytes() == (DATA / "demo.bin").read_bytes()
    assert (DATA / "demo.bin").stat().st_size < 2 * 1024 * 1024
    text = (DATA / "demo.md").read_text()
    assert "invented" in text
    assert f"{(DATA / 'demo.bin').stat().st_size:,}" in text


@pytest.mark.slow
def test_demo_bin_rebuilds_byte_identical_and_decodes_in_pyrtcm() -> None:
    """build_demo (what scripts/make-demo writes) rebuilds demo.bin byte for byte; every frame
    parses (pyrtcm decode)."""
    from pyrtcm import RTCMReader

    data = build_demo()
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


def test_demo_bin_decodes_cleanly_in_our_stream_decoder() -> None:
    """The demo goes through StreamDecoder with no CRC, checksum or decode error, 1200 epochs."""
    from ionwarden.parsers._stream import StreamDecoder

    data = (DATA / "demo.bin").read_bytes()
    dec = StreamDecoder()
    epochs = 0
    for i in range(0, len(data), 4096):
        epochs += sum(1 for m in dec.feed(data[i : i + 4096]) if hasattr(m, "pseudorange_m"))
    epochs += sum(1 for m in dec.feed(b"") if hasattr(m, "pseudorange_m"))
    st = dec.statistics()
    assert epochs == 1200
    assert st.framer.crc_failures == 0
    assert st.framer.nmea_checksum_failures == 0
    assert st.framer.bytes_discarded == 0
    assert not st.decode_errors_by_type
    assert st.epochs_unresolved == 0
