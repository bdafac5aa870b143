"""Benchmark of the NMEA sentence decoder and the RTCM ephemeris/station decoders.

NMEA: ``decode_sentence`` over every sentence of the real u-blox extract
(../shared/data/real/nmea/pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea, 4,661 sentences), side by
side with ``pynmeagps.NMEAReader.parse`` alone on the same bytes, plus the cost per sentence type.
Live path: the framer and StreamDecoder over the same extract as one byte stream, every sentence
decoded and with only GGA/GST wanted (as StationPipeline sets ``nmea_wanted`` once every satellite
has orbit geometry; the framer checks runs of sentences with one numpy call, the decoder skips the
second checksum). RTCM: 1019/1020/1045 and 1006/1033 decoders over RTK134_202102051543.rtcm3 (3,104
messages), side by side with pyrtcm on the same frames. Run:
    .venv/bin/python bench/bench_nmea_eph.py
Figures depend on the machine and on other load (shared dev box: note contention).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING

from pynmeagps import NMEAReader
from pyrtcm import RTCMReader

from ionwarden.parsers import Framer, GsvAssembler, StreamDecoder, decode_sentence
from ionwarden.parsers._crc import crc24q
from ionwarden.parsers._rtcm_misc import DECODERS, DecodeContext

if TYPE_CHECKING:
    from collections.abc import Callable

REAL = Path(__file__).resolve().parents[2] / "shared" / "data" / "real"
REPEAT = 5


def best_of(fn: Callable[[], object], repeat: int = REPEAT) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def bench_nmea() -> None:
    data = (REAL / "nmea" / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes()
    lines = [line + b"\r\n" for line in data.splitlines() if line.startswith(b"$")]

    def ours() -> None:
        asm = GsvAssembler()
        for s in lines:
            asm.push(decode_sentence(s))

    def reference() -> None:
        for s in lines:
            NMEAReader.parse(s, validate=1)

    t_ours, t_ref = best_of(ours), best_of(reference)
    n = len(lines)
    print(f"NMEA extract: {n} sentences, {len(data) / 1e3:.0f} kB")
    print(f"  ionwarden decode_sentence + GSV assembly: {n / t_ours:10.0f} sentences/s "
          f"({t_ours / n * 1e6:6.1f} µs/sentence)")  # fmt: skip
    print(f"  pynmeagps NMEAReader.parse alone:         {n / t_ref:10.0f} sentences/s "
          f"({t_ref / n * 1e6:6.1f} µs/sentence)")  # fmt: skip
    by_type: dict[bytes, list[bytes]] = {}
    for s in lines:
        by_type.setdefault(s[3:6], []).append(s)
    for kind, group in sorted(by_type.items()):
        t = best_of(lambda g=group: [decode_sentence(s) for s in g])  # type: ignore[misc]
        print(f"    {kind.decode()}: {t / len(group) * 1e6:6.1f} µs/sentence ({len(group)})")
    stream = b"".join(lines)

    def framer() -> None:
        Framer().feed(stream)

    def decoder(wanted: frozenset[str] | None) -> Callable[[], None]:
        def run() -> None:
            d = StreamDecoder()
            d.nmea_wanted = wanted
            for i in range(0, len(stream), 4096):
                d.feed(stream[i : i + 4096])

        return run

    t_fr = best_of(framer)
    t_all = best_of(decoder(None))
    t_fix = best_of(decoder(frozenset({"GGA", "GST"})))
    print(f"  live path, one byte stream: Framer {t_fr / n * 1e6:5.2f} µs/sentence; StreamDecoder "
          f"all decoded {t_all / n * 1e6:5.1f}, GGA/GST wanted {t_fix / n * 1e6:5.1f} µs/sentence")  # fmt: skip


def bench_rtcm() -> None:
    data = (REAL / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    frames: list[tuple[int, bytes, bytes]] = []
    i = 0
    while (i := data.find(b"\xd3", i)) >= 0 and i + 6 <= len(data):
        n = ((data[i + 1] & 3) << 8) | data[i + 2]
        frame = data[i : i + 6 + n]
        if crc24q(frame[:-3]) == int.from_bytes(frame[-3:], "big"):
            mt = (frame[3] << 4) | (frame[4] >> 4)
            if mt in DECODERS:
                frames.append((mt, frame[3:-3], frame))
            i += 6 + n
        else:
            i += 1
    ctx = DecodeContext()

    def ours() -> None:
        for mt, body, _ in frames:
            DECODERS[mt](body, ctx)

    def reference() -> None:
        for _, _, frame in frames:
            RTCMReader.parse(frame)

    t_ours, t_ref = best_of(ours), best_of(reference, 2)
    n = len(frames)
    print(f"RTCM RTK134 ephemeris/station messages: {n}")
    print(f"  ionwarden DECODERS: {n / t_ours:9.0f} messages/s ({t_ours / n * 1e6:6.1f} µs/msg)")
    print(f"  pyrtcm parse:       {n / t_ref:9.0f} messages/s ({t_ref / n * 1e6:6.1f} µs/msg)")
    print(f"  ratio: {t_ref / t_ours:.1f}x")


if __name__ == "__main__":
    bench_nmea()
    bench_rtcm()
