"""atheris fuzz target: StreamDecoder must turn ANY byte stream into messages and counted errors.

Run (10 minutes, seeds from the real captures in ../shared/data/real/rtcm):
    .venv/bin/python tests/fuzz/fuzz_stream.py -max_total_time=600 -max_len=8192 -artifact_prefix=/tmp/ \
        /tmp/ionwarden-fuzz-corpus

Byte 0 chooses raw mode (the bytes as a stream) or frame mode (the bytes cut into valid RTCM frames
of the decoded message types, so the MSM/ephemeris decoders see mutated bodies); byte 1 chooses a
split point. Each input is fed twice, whole and split, and both runs must give the same messages:
any exception (StreamDecoder counts every error instead of raising) or assertion failure is a bug.
"""

from __future__ import annotations

import sys
from pathlib import Path

import atheris

with atheris.instrument_imports():
    from ionwarden.parsers._crc import frame_rtcm
    from ionwarden.parsers._epoch import ObsEpoch
    from ionwarden.parsers._gnsstime import GpsTime
    from ionwarden.parsers._msm import MSM_TYPES
    from ionwarden.parsers._rtcm_misc import DECODERS
    from ionwarden.parsers._stream import StreamDecoder

_REF = GpsTime(2300, 100_000.0)
_TYPES = sorted(MSM_TYPES | set(DECODERS))


def _summary(messages: list[object]) -> list[tuple[str, int]]:
    return [(type(m).__name__, len(m) if isinstance(m, ObsEpoch) else 0) for m in messages]


def _as_frames(body: bytes) -> bytes:
    """Wrap fuzz bytes in valid RTCM frames so that the message decoders see them (CRC passes).

    Pieces of up to 255 bytes each get a message number from the decoder tables in their first
    12 bits; the piece's own first byte picks which one.
    """
    out = []
    for start in range(0, len(body), 256):
        piece = bytearray(body[start : start + 256])
        if len(piece) < 3:
            break
        msg_type = _TYPES[piece[0] % len(_TYPES)]
        piece[0] = msg_type >> 4
        piece[1] = ((msg_type & 0xF) << 4) | (piece[1] & 0x0F)
        out.append(frame_rtcm(bytes(piece[:1023])))
    return b"".join(out)


def test_one_input(data: bytes) -> None:
    if len(data) < 2:
        return
    split = data[1] % max(1, len(data))
    body = data[2:]
    if data[0] & 1:  # half of the inputs: valid frames around mutated message bodies
        body = _as_frames(body)
    whole = StreamDecoder(reference_time=_REF)
    a = whole.feed(body) + whole.feed(b"")
    parts = StreamDecoder(reference_time=_REF)
    b = [m for chunk in (body[:split], body[split:]) if chunk for m in parts.feed(chunk)]
    b += parts.feed(b"")
    assert _summary(a) == _summary(b), "chunking changed the decoded messages"
    stats = whole.statistics()
    assert stats.framer.bytes_total == len(body)


def _seed_corpus(corpus: Path) -> None:
    """Cut the real captures into 2 kB seeds on the first run."""
    if corpus.exists() and any(corpus.iterdir()):
        return
    corpus.mkdir(parents=True, exist_ok=True)
    real = Path(__file__).resolve().parents[2].parent / "shared" / "data" / "real" / "rtcm"
    for path in sorted(real.glob("*")):
        data = path.read_bytes()
        for k, start in enumerate(range(0, min(len(data), 40_000), 2_000)):
            (corpus / f"{path.stem}-{k}").write_bytes(b"\0\0" + data[start : start + 2_000])


def main() -> None:
    dirs = [a for a in sys.argv[1:] if not a.startswith("-")]
    if dirs:
        _seed_corpus(Path(dirs[0]))
    atheris.Setup(sys.argv, test_one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
