"""Whether numpy gives a segment the same bits alone as cut out of a concatenation: the premise of
the batched tick (DEVELOPERS.md "What would reach the line", "What keeps its bits"), to check on
every platform the tick is to run on (numpy picks its SIMD routines by CPU: AVX2, AVX-512, NEON
on a Pi) before the tick's own bit-for-bit tests exist there.

    .venv/bin/python bench/bench_segment_bits.py [--trials T] [--seed S]

Each trial draws 2–20 segments of 5–60 float64 values (random data, no GNSS meaning), applies
each operation to the concatenation and to every segment alone, and compares the segment's slice
of the first with the second, byte for byte. Reported per operation: in how many trials a
segment differed. An operation that never differs is safe to batch over stations whatever
their offsets in the shared block; one that does (the segmented sum ``add.reduceat`` against
``add.reduce``, which sums pairwise) must stay per station or move both paths to one formula.
Exits 1 when an operation that the tick plans to batch differs.
"""

from __future__ import annotations

import argparse
import sys
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.daemon.estimator._npfast import einsum

if TYPE_CHECKING:
    from collections.abc import Callable

F64 = npt.NDArray[np.float64]

#: The elementwise operations of the estimator's per-epoch path, on (a, b) with b > 0.
_ELEMENTWISE: dict[str, Callable[[F64, F64], F64]] = {
    "add": np.add,
    "subtract": np.subtract,
    "multiply": np.multiply,
    "divide": np.divide,
    "maximum": np.maximum,
    "sqrt": lambda a, _b: np.sqrt(np.abs(a)),
    "sin": lambda a, _b: np.sin(a),
    "cos": lambda a, _b: np.cos(a),
    "exp": lambda a, _b: np.exp(a / 3.0),
    "arctan2": np.arctan2,
    "hypot": np.hypot,
    "degrees": lambda a, _b: np.degrees(a),
}
#: Differences expected (not batched as such; see the module docstring).
_EXPECTED = frozenset({"add.reduceat vs add.reduce"})


def _trial(rng: np.random.Generator, differs: dict[str, int]) -> None:
    lens = rng.integers(5, 61, size=int(rng.integers(2, 21)))
    off = np.concatenate([[0], np.cumsum(lens)])
    seg_a = [rng.uniform(-7.0, 7.0, n) for n in lens]
    seg_b = [rng.uniform(0.5, 7.0, n) for n in lens]
    a, b = np.concatenate(seg_a), np.concatenate(seg_b)
    for name, op in _ELEMENTWISE.items():
        whole = op(a, b)
        if any(
            whole[off[i] : off[i + 1]].tobytes() != op(seg_a[i], seg_b[i]).tobytes()
            for i in range(len(lens))
        ):
            differs[name] += 1
    # The linear combinations: (k, j, d) coefficients by (j, d) measurements, d the satellites.
    coef = [rng.normal(size=(6, 4, n)) for n in lens]
    meas = [rng.normal(size=(4, n)) * 1e7 for n in lens]
    whole = einsum("kjd,jd->kd", np.concatenate(coef, axis=2), np.concatenate(meas, axis=1))
    if any(
        np.ascontiguousarray(whole[:, off[i] : off[i + 1]]).tobytes()
        != einsum("kjd,jd->kd", coef[i], meas[i]).tobytes()
        for i in range(len(lens))
    ):
        differs["einsum kjd,jd->kd"] += 1
    sums = np.add.reduceat(a, off[:-1])
    if any(sums[i] != np.add.reduce(seg_a[i]) for i in range(len(lens))):
        differs["add.reduceat vs add.reduce"] += 1


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=(__doc__ or "").split("\n\n")[0])
    ap.add_argument("--trials", type=int, default=200)
    ap.add_argument("--seed", type=int, default=20261204)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    differs = dict.fromkeys([*_ELEMENTWISE, "einsum kjd,jd->kd", "add.reduceat vs add.reduce"], 0)
    for _ in range(args.trials):
        _trial(rng, differs)
    print(f"numpy {np.__version__}; {args.trials} trials of 2-20 segments of 5-60 values")
    for name, n in differs.items():
        note = " (expected: stays per station)" if name in _EXPECTED else ""
        print(f"  {name:28s} differs in {n:4d} of {args.trials} trials{note}")
    unsafe = [name for name, n in differs.items() if n and name not in _EXPECTED]
    if unsafe:
        print(f"not segment-stable here: {', '.join(unsafe)}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
