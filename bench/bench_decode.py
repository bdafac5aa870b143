"""Decode throughput of an MSM7 GPS+Galileo+BeiDou stream: ours vs pyrtcm, same bytes, one run.

    .venv/bin/python bench/bench_decode.py [--repeat N] [--rounds R]

The stream is the 1077/1097/1127 frames of the real capture
../shared/data/real/rtcm/pygnssutils_ntrip_encode_none.bin (Trimble Alloy, 2024-08-18), repeated.
Also timed: the RTK134 MSM5 1075/1095/1125 frames. Everything runs in this one process, one thread,
best of R rounds each. Compared:

* pyrtcm: ``RTCMReader(BytesIO(data))`` iterated to the end (framing, CRC, full parse with scaling);
* ours, framing + MSM decode: ``Framer.feed`` then ``decode_msm`` on every frame;
* ours, full stream: ``StreamDecoder.feed`` (framing, decode, epoch assembly, time resolution)
  given the whole stream at once (a file replay: epochs closed by one feed are decoded together);
* ours, full stream fed one frame at a time (a live receiver: every epoch decoded on its own).
"""

from __future__ import annotations

import argparse
import io
import os
import platform
import time
from pathlib import Path

from pyrtcm import RTCMReader

from ionwarden.parsers import GpsTime
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._framer import Framer, RtcmFrame
from ionwarden.parsers._msm import decode_msm
from ionwarden.parsers._stream import StreamDecoder

REAL = Path(__file__).resolve().parents[1].parent / "shared" / "data" / "real" / "rtcm"


def _msm_stream(name: str, types: set[int]) -> bytes:
    framer = Framer()
    frames = framer.feed((REAL / name).read_bytes()) + framer.feed(b"")
    return b"".join(
        frame_rtcm(f.payload) for f in frames if isinstance(f, RtcmFrame) and f.msg_type in types
    )


def _best(fn, rounds: int) -> tuple[float, int]:
    best, count = float("inf"), 0
    for _ in range(rounds):
        t0 = time.perf_counter()
        count = fn()
        best = min(best, time.perf_counter() - t0)
    return best, count


def _pyrtcm(data: bytes) -> int:
    n = 0
    for _raw, msg in RTCMReader(io.BytesIO(data)):
        if msg is not None:
            n += 1
    return n


def _ours_decode(data: bytes) -> int:
    framer = Framer()
    n = 0
    for f in framer.feed(data):
        decode_msm(f.payload)  # type: ignore[union-attr]
        n += 1
    return n


def _ours_stream(data: bytes, ref: GpsTime) -> int:
    dec = StreamDecoder(reference_time=ref)
    dec.feed(data)
    dec.feed(b"")
    return sum(dec.statistics().decoded_by_type.values())


def _ours_stream_frames(frames: list[bytes], ref: GpsTime) -> int:
    dec = StreamDecoder(reference_time=ref)
    for frame in frames:
        dec.feed(frame)
    dec.feed(b"")
    return sum(dec.statistics().decoded_by_type.values())


def _split(data: bytes) -> list[bytes]:
    framer = Framer()
    frames = framer.feed(data) + framer.feed(b"")
    return [data[f.offset : f.offset + len(f.payload) + 6] for f in frames]  # type: ignore[union-attr]


def _report(label: str, data: bytes, ref: GpsTime, rounds: int) -> None:
    mb = len(data) / 1e6
    frames = _split(data)
    t_py, n_py = _best(lambda: _pyrtcm(data), rounds)
    t_ours, n_ours = _best(lambda: _ours_decode(data), rounds)
    t_stream, n_stream = _best(lambda: _ours_stream(data, ref), rounds)
    t_frames, n_frames = _best(lambda: _ours_stream_frames(frames, ref), rounds)
    assert n_py == n_ours == n_stream == n_frames, (n_py, n_ours, n_stream, n_frames)
    print(f"\n{label}: {len(data):,} bytes, {n_py:,} messages")
    print(f"  {'decoder':34s} {'MB/s':>8s} {'msg/s':>10s} {'x pyrtcm':>9s}")
    for name, t in (
        ("pyrtcm RTCMReader (full parse)", t_py),
        ("ours Framer + decode_msm", t_ours),
        ("ours StreamDecoder (epochs)", t_stream),
        ("ours StreamDecoder, frame by frame", t_frames),
    ):
        print(f"  {name:34s} {mb / t:8.2f} {n_py / t:10.0f} {t_py / t:9.1f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=20, help="copies of the capture's MSM frames")
    ap.add_argument("--rounds", type=int, default=3, help="timed rounds, best is kept")
    args = ap.parse_args()
    print(
        f"python {platform.python_version()} on {platform.machine()}, "
        f"{os.cpu_count()} CPUs (shared with other work: figures are under contention)"
    )
    msm7 = _msm_stream("pygnssutils_ntrip_encode_none.bin", {1077, 1097, 1127}) * args.repeat
    _report("MSM7 GPS+GAL+BDS (ntrip_encode_none.bin)", msm7, GpsTime(2328, 76_000.0), args.rounds)
    msm5 = _msm_stream("RTK134_202102051543.rtcm3", {1075, 1095, 1125})
    _report("MSM5 GPS+GAL+BDS (RTK134)", msm5, GpsTime(2143, 488_000.0), args.rounds)


if __name__ == "__main__":
    main()
