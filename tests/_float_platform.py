"""Which floating-point platform this is, for golden digests taken bit for bit.

numpy picks its vectorised math (sin, arctan2, exp, …) by the CPU's SIMD extensions at run time
(on x86-64 with AVX-512 it uses other routines than with AVX2), and OpenBLAS its matrix kernels by
CPU model; either may round a last bit differently. A golden digest over floats therefore holds
only where it was captured. ``fingerprint()`` hashes the results of the routines our code uses on
fixed inputs: two machines with the same fingerprint compute our outputs alike (as far as these
routines tell; add one here if a digest ever differs between machines that share a fingerprint).
Golden tests keep one set of digests per fingerprint, each captured from the previous code on
that platform, and skip (saying so) on a platform they have none for.

Digests captured before the fingerprint existed were kept under a coarser label (machine, numpy
release, AVX-512 or not) until 2026-12-03, when an AMD EPYC with AVX-512 matched the label of an
Intel Xeon with AVX-512 and failed its digests. They are now keyed by the fingerprint of the Xeon
they passed on, ``d82fbd5e3857987e`` (inferred: the last session on that Xeon reported 1,956 tests
passed with none skipped, so the urgent-cuts digests, kept only under that fingerprint, were found
there, and the label's digests held there too), and there is no label fallback. An AMD EPYC of
family 25 with AVX-512 (2026-12-04) has that fingerprint too, and every golden test passed there
(1,960 tests, none skipped): a fingerprint names a floating-point platform, not a CPU. Another
family-25 EPYC (2026-12-04, a later session) exposed AVX2 only and gave ``5cbd07108fd657e2``, the
AVX2 machine's of 2026-12-03, whose lean-golden and warm-cache digests passed there; the
urgent-cuts digests were captured there from 566fd88.
"""

from __future__ import annotations

import hashlib
import platform
from functools import cache
from typing import TypeVar

import numpy as np


@cache
def fingerprint() -> str:
    """A short hash of numpy's and OpenBLAS's results on fixed inputs (plus the machine and numpy's
    major.minor release)."""
    rng = np.random.default_rng(20261203)
    h = hashlib.sha256(f"{platform.machine()} {np.__version__.rsplit('.', 1)[0]}".encode())
    for dtype in (np.float64, np.float32):
        x = rng.uniform(-7.0, 7.0, 4099).astype(dtype)
        y = rng.uniform(-7.0, 7.0, 4099).astype(dtype)
        p = np.abs(x) + dtype(0.01)
        u = np.clip(x / dtype(7.5), -1, 1)
        for r in (
            np.sin(x), np.cos(x), np.tan(x / dtype(3)), np.arctan(x), np.arctan2(x, y),
            np.arcsin(u), np.arccos(u), np.exp(x), np.expm1(x), np.log(p), np.log10(p),
            np.log1p(p), np.sqrt(p), np.hypot(x, y), np.power(p, dtype(1.5)), np.cbrt(x),
            np.sinh(u), np.cosh(u), np.tanh(x), np.degrees(x), np.radians(x),
            np.sum(x), np.mean(x), np.std(x), np.var(x), np.nansum(x), np.cumsum(x), x @ y,
        ):  # fmt: skip
            h.update(np.ascontiguousarray(r).tobytes())
    a = rng.normal(size=(40, 4))
    b = rng.normal(size=40)
    for r in (
        a @ a.T, a.T @ a, a.T @ b, np.linalg.lstsq(a, b, rcond=None)[0],
        np.linalg.solve(a.T @ a, a.T @ b), np.linalg.inv(a.T @ a), np.einsum("ij,ij->i", a, a),
    ):  # fmt: skip
        h.update(np.ascontiguousarray(r).tobytes())
    return h.hexdigest()[:16]


T = TypeVar("T")


def golden_for(table: dict[str, T]) -> T | None:
    """This platform's golden values (by its fingerprint), or None."""
    return table.get(fingerprint())
