"""atheris fuzz target: StreamDecoder must turn ANY byte stream into messages and counted errors.

Run (10 minutes, seeds from the real captures in ../shared/data/real/rtcm):
    .venv/bin/python tests/fuzz/fuzz_stream.py -max_total_time=600 -max_len=8192 -artifact_prefix=/tmp/ \
        /tmp/ionwarden-fuzz-corpus

Each input is fed twice, whole and split at a data-chosen point, and both runs must give the same
messages: a crash or an assertion failure is a bug. Only our ParseError is allowed to escape
(it must not, StreamDecoder counts every error, but it is the one exception the API documents).
"""

from __future__ import annotations

import sys
from pathlib import Path

import atheris

with atheris.instrument_imports():
    from ionwarden.parsers._epoch import ObsEpoch
    from ionwarden.parsers._gnsstime import GpsTime
    from ionwarden.parsers._stream import StreamDecoder

_REF = GpsTime(2300, 100_000.0)


def _summary(messages: list[object]) -> list[tuple[str, int]]:
    return [(type(m).__name__, len(m) if isinstance(m, ObsEpoch) else 0) for m in messages]


def test_one_input(data: bytes) -> None:
    if not data:
        return
    split = data[0] % max(1, len(data))
    body = data[1:]
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
            (corpus / f"{path.stem}-{k}").write_bytes(b"\0" + data[start : start + 2_000])


def main() -> None:
    dirs = [a for a in sys.argv[1:] if not a.startswith("-")]
    if dirs:
        _seed_corpus(Path(dirs[0]))
    atheris.Setup(sys.argv, test_one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
