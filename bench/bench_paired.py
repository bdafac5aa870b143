"""Paired end-to-end A/B: one ``bench_e2e.py`` run whose daemon switches a behaviour on and off
every other burst (``bench/paired/sitecustomize.py``), then frame sent → summary delivered split
by the bursts' state.

    .venv/bin/python bench/bench_paired.py {ack-priority,tick,satellites-later} [bench_e2e.py options]

e.g. ``bench/bench_paired.py tick --warm-up 330 --seconds 60 --workers 2 --runtime
batch_estimates=10``. Why: the host's load drifts by more than the effects being measured (whole
60-s runs of the same code differ by ±0.5 ms in the mean and ±2 ms at p99 here), so interleaved
runs need many rounds to see a 0.5-ms change; alternate seconds of one run see the same drift.
Printed for each half: the mean, median, p90 and p99 of every summary's latency, the share within
10 ms, and the median over the seconds of each second's slowest summary ("last station").
Latencies are the bench's (sent → delivered to its subscriber: the daemon's own frame received →
PUBACK is one histogram per run and cannot be split).
"""

from __future__ import annotations

import csv
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _flags(folder: Path, seconds: int) -> list[int]:
    """Each timed second's state (1 on, 0 off): the last ``seconds`` bursts each process saw (the
    timed ones end the run), the same in every process."""
    seen = []
    for path in sorted(folder.glob("*.txt")):
        states = [int(line.split()[1]) for line in path.read_text().splitlines()]
        if len(states) >= seconds:  # (the main process of workers reads no station)
            seen.append(states[-seconds:])
    if not seen or any(s != seen[0] for s in seen):
        raise SystemExit(
            f"bench_paired: the processes' burst states disagree or are missing: {seen}"
        )
    return seen[0]


def _line(name: str, lat: list[float], last: list[float]) -> str:
    v = sorted(lat)
    return (
        f"  {name:<4} n={len(v)} mean {statistics.mean(v):.2f} ms, median {statistics.median(v):.2f}"
        f", p90 {v[int(0.9 * len(v))]:.2f}, p99 {v[int(0.99 * len(v))]:.2f} ms; "
        f"{100 * sum(x <= 10.0 for x in v) / len(v):.1f}% within 10 ms; last station's median "
        f"{statistics.median(last):.2f} ms"
    )


def main() -> int:
    if len(sys.argv) < 2 or sys.argv[1] not in ("ack-priority", "tick", "satellites-later"):
        print(__doc__)
        return 2
    mode, rest = sys.argv[1], sys.argv[2:]
    with tempfile.TemporaryDirectory(prefix="iw-paired-") as tmp:
        series = Path(tmp) / "series.csv"
        flags = Path(tmp) / "flags"
        flags.mkdir()
        env = {
            **os.environ,
            "IONWARDEN_PAIRED": mode,
            "IONWARDEN_PAIRED_DIR": str(flags),
            "PYTHONPATH": os.pathsep.join(
                p for p in (str(HERE / "paired"), os.environ.get("PYTHONPATH", "")) if p
            ),
        }
        cmd = [sys.executable, str(HERE / "bench_e2e.py"), *rest, "--series", str(series)]
        if subprocess.run(cmd, env=env, check=False).returncode != 0:
            return 1
        with series.open(encoding="utf-8") as f:
            rows = [(int(r["second"]), float(r["latency_ms"])) for r in csv.DictReader(f)]
        seconds = max(s for s, _ in rows) + 1
        state = _flags(flags, seconds)
    halves: dict[int, tuple[list[float], list[float]]] = {1: ([], []), 0: ([], [])}
    for s in range(seconds):
        lat = [x for t, x in rows if t == s]
        if lat:
            halves[state[s]][0].extend(lat)
            halves[state[s]][1].append(max(lat))
    print(f"paired ({mode} on in even bursts, off in odd ones), frame sent -> summary delivered:")
    print(_line("on", *halves[1]))
    print(_line("off", *halves[0]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
