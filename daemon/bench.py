"""Built-in benchmarks behind ``ionwarden bench``: this machine, one core, the bundled demo.

Each figure is CPU time of this process (``time.process_time``), so other load on the machine
changes it less than wall time would. The demo capture is 1200 epochs at 1 Hz of four constellations
(MSM4 + ephemerides + NMEA), so "epochs/s" here reads directly as "how many 1 Hz stations one core
could decode/estimate".
"""

from __future__ import annotations

import resource
import time
from importlib import resources
from typing import TYPE_CHECKING

from ionwarden.parsers import ObsEpoch, StreamDecoder

if TYPE_CHECKING:
    from collections.abc import Callable

__all__ = ["demo_capture", "run_benchmarks"]

_CHUNK = 4096  # a typical socket read


def demo_capture() -> bytes:
    """The bundled demo capture (package data)."""
    return resources.files("ionwarden.daemon").joinpath("data/demo.bin").read_bytes()


def _repeat(fn: Callable[[], tuple[int, int]], seconds: float) -> tuple[float, int, int, int]:
    """Run ``fn`` until ``seconds`` of CPU have passed (at least once): (cpu s, runs, a, b)."""
    runs = total_a = total_b = 0
    start = time.process_time()
    while True:
        a, b = fn()
        runs += 1
        total_a += a
        total_b += b
        cpu = time.process_time() - start
        if cpu >= seconds:
            return cpu, runs, total_a, total_b


def _decode_once(data: bytes) -> tuple[int, int]:
    decoder = StreamDecoder()
    messages = epochs = 0
    for i in range(0, len(data), _CHUNK):
        for msg in decoder.feed(data[i : i + _CHUNK]):
            messages += 1
            epochs += isinstance(msg, ObsEpoch)
    decoder.feed(b"")
    return messages, epochs


def _pipeline_once(data: bytes) -> tuple[int, int]:
    from ionwarden.daemon.estimator import StationPipeline, StationSnapshot  # noqa: PLC0415

    pipeline = StationPipeline("bench")
    snapshots = 0
    for i in range(0, len(data), _CHUNK):
        snapshots += sum(
            1 for out in pipeline.feed(data[i : i + _CHUNK]) if isinstance(out, StationSnapshot)
        )
    pipeline.feed(b"")
    return snapshots, 0


def run_benchmarks(*, seconds: float) -> int:
    """Run each benchmark for about ``seconds`` of CPU; print one line per figure."""
    data = demo_capture()
    mb = len(data) / 1e6
    print(f"ionwarden bench: bundled demo capture, {mb:.2f} MB; CPU time of one core")

    cpu, runs, messages, epochs = _repeat(lambda: _decode_once(data), seconds)
    print(
        f"  decode    {runs * mb / cpu:8.2f} MB/s  {messages / cpu:10.0f} messages/s  "
        f"{epochs / cpu:8.0f} epochs/s"
    )
    cpu, runs, snapshots, _ = _repeat(lambda: _pipeline_once(data), seconds)
    per_epoch_us = cpu / snapshots * 1e6 if snapshots else float("nan")
    print(
        f"  pipeline  {snapshots / cpu:8.0f} epochs/s  {per_epoch_us:8.1f} µs/epoch "
        "(decode + estimate)  → 1 Hz stations per core ≈ "
        f"{snapshots / cpu:.0f}"
    )
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"  peak RSS  {rss_mb:8.1f} MB")
    return 0
