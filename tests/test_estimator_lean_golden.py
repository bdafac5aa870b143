"""The estimator's outputs stay bit for bit what they were before the per-epoch instruction cuts.

Oracle: golden digests captured from our own previous code (the unchanged estimator at the
baseline of the instruction cuts, run on the same inputs): SHA-256 over every snapshot field and
array (dtype, shape and bytes; floats by their bits; the counters) of every epoch, then over the
final ``state_dict``. Inputs: the demo capture (our simulator, ``daemon/data/demo.bin``: L2
jammed then lost, so single-frequency satellites), the simulator's invented quiet-day stream
(``daemon.sim``), and our invented scenario with slips, outages and GSV geometry
(tests/_estimator_synth.py).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationEstimator, StationPipeline, StationSnapshot
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream

from ._estimator_synth import RX_ECEF, Scenario, generate
from ._float_platform import fingerprint, golden_for

DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"

#: Golden digests per floating-point platform (tests/_float_platform.py), each captured from our
#: own previous code (the estimator before the cuts, 59a3a98^) run on that platform. The demo's
#: changed on purpose on 2026-12-04 (new ephemerides no longer force an orbit refresh in the
#: epoch they arrive with: _geometry.py): captured again on d82fbd5e3857987e only, the
#: other platforms' dropped (the test skips there, saying so) until a session there captures it.
GOLDEN_BY_PLATFORM: dict[str, dict[str, str]] = {
    # x86-64 with AVX-512 (an Intel Xeon), captured 2026-12-03 before fingerprints were recorded,
    # under a coarser label; keyed by the fingerprint of the machine they passed on since (an AMD
    # EPYC of family 25 has it too: they passed there, 2026-12-04)
    "d82fbd5e3857987e": {
        # the demo's from this session's code (2026-12-04, an AMD EPYC of family 25 with
        # AVX-512): the new geometry-refresh rule (daemon/estimator/_geometry.py) moves its VTEC
        # by <= 9.2e-5 TECU against 59a3a98^
        "demo": "4b72443ca0c08a8c9d4ebfbdc3a98142707cb2196d2747337446ab61fd400411",
        "quiet-day": "beb80db0c2ad3555a02cfa90e0d4adfa31485b3100f6c08b8713699800be900f",
        "synthetic": "2e1427f22da570e783e5b573b4078c9139dd0e349c188cb7aea1c8a275443e4a",
    },
    # x86-64, AVX2 without AVX-512 (numpy 2.4: X86_V3), captured 2026-12-03
    "5cbd07108fd657e2": {
        "quiet-day": "ac2f078525068c156096efb0864b1c65af134f924101a535803b2c73ef92a11d",
        "synthetic": "6bcfcbdf1785a183970b4eb3bba32b3b27015df099d2788d430f806573cbd2ce",
    },
    # x86-64 with AVX-512, AMD EPYC (family 26), captured 2026-12-03 from 59a3a98^
    "5ab1952dc3a158c0": {
        "quiet-day": "777d4a0c9ef150ab4b35c71514277b655953ca80940229a7e3d0c506e252d8a8",
        "synthetic": "7cbafadce654fd0e1f58c376ee33739a79fdee27988282f62c50cf40b2e3adbf",
    },
}
SOURCES = ("demo", "quiet-day", "synthetic")
GOLDEN = golden_for(GOLDEN_BY_PLATFORM)


def _feed(h: Any, v: object) -> None:
    """Hash ``v`` with its type: arrays by dtype, shape and bytes, floats by their bits."""
    if isinstance(v, np.ndarray):
        h.update(f"A{v.dtype.str}{v.shape}".encode())
        h.update(np.ascontiguousarray(v).tobytes())
    elif isinstance(v, float | np.floating):
        h.update(b"F" + struct.pack("<d", float(v)) + type(v).__name__.encode())
    elif isinstance(v, dict):
        h.update(f"D{len(v)}".encode())
        for k, x in v.items():  # in insertion order: the order is part of the output
            _feed(h, k)
            _feed(h, x)
    elif isinstance(v, list | tuple):
        h.update(f"L{type(v).__name__}{len(v)}".encode())
        for x in v:
            _feed(h, x)
    elif dataclasses.is_dataclass(v) and not isinstance(v, type):
        h.update(f"C{type(v).__name__}".encode())
        for f in dataclasses.fields(v):
            _feed(h, f.name)
            _feed(h, getattr(v, f.name))
    else:
        h.update(f"V{type(v).__name__}{v!r}".encode())


def _digest_snapshots(snaps: list[object], est: StationEstimator) -> str:
    h = hashlib.sha256()
    n = 0
    for s in snaps:
        if isinstance(s, StationSnapshot):
            _feed(h, s)
            n += 1
    assert n >= 100
    _feed(h, est.state_dict())
    return h.hexdigest()


def _pipeline_run(chunks: list[bytes], name: str, **kw: Any) -> str:
    p = StationPipeline(name, **kw)
    snaps: list[object] = []
    for c in chunks:
        snaps.extend(p.feed(c))
    snaps.extend(p.feed(b""))
    return _digest_snapshots(snaps, p.estimator)


def digest(source: str) -> str:
    """The digest of one input (also run under the baseline code to capture ``GOLDEN``)."""
    if source == "demo":
        data = DEMO.read_bytes()
        return _pipeline_run(
            [data[i : i + 4096] for i in range(0, len(data), 4096)], "demo", ephemerides_per_sat=50
        )
    if source == "quiet-day":  # 420 s: the ROTI window fills, then the steady path
        sc = build_scenario(source, duration_s=420.0)
        chunks = [data for _, data in iter_stream(Simulator(sc), 0)]
        return _pipeline_run(chunks, source, reference_time=sc.start)
    assert source == "synthetic"
    sc_syn = Scenario(
        n_sats=8, duration_s=500.0, slips=[(1, 150, 1, 0), (2, 300, 0, 1), (5, 420, 3, 3)],
        outages=[(0, "2W", 200, 260), (3, "5Q", 100, 400), (6, "2W", 350, 352),
                 (4, "2W", 250, 280), (4, "5Q", 250, 290)], seed=11,
    )  # fmt: skip
    tr = generate(sc_syn)
    est = StationEstimator()
    est.set_receiver_position(RX_ECEF, "config")
    snaps: list[object] = []
    for ti, ep in enumerate(tr.epochs):
        if ti % 7 != 3:  # GSV geometry, missing now and then
            est.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
        snaps.append(est.update(ep))
    return _digest_snapshots(snaps, est)


#: numpy's vectorised math (sin, arctan2, …) and OpenBLAS may round a last bit differently on
#: another CPU, which this test would take for a change of ours: it runs where it has digests for
#: this platform; elsewhere the path tests (tests/test_estimator_lean_paths.py) still hold.
@pytest.mark.skipif(
    GOLDEN is None,
    reason=f"no golden digests for floating-point platform {fingerprint()} "
    "(capture them from 59a3a98^: see tests/_float_platform.py)",
)
@pytest.mark.parametrize("source", SOURCES)
def test_outputs_equal_golden_digest(source: str) -> None:
    """Every snapshot field, array (dtype, value), counter and the final state_dict equal the
    previous code's, bit for bit (golden digest of our own previous code)."""
    assert GOLDEN is not None
    if source not in GOLDEN:  # the demo's, since the geometry-refresh rule of 2026-12-04
        pytest.skip(f"no golden digest of {source!r} for platform {fingerprint()}: capture one")
    assert digest(source) == GOLDEN[source]


def test_digest_sees_one_bit() -> None:
    """The digest tells apart floats that differ in one bit and arrays that differ in dtype."""
    h1, h2, h3 = hashlib.sha256(), hashlib.sha256(), hashlib.sha256()
    _feed(h1, {"a": np.array([1.0, 2.0]), "b": 0.5})
    _feed(h2, {"a": np.array([1.0, math.nextafter(2.0, 3.0)]), "b": 0.5})
    _feed(h3, {"a": np.array([1.0, 2.0], np.float32), "b": 0.5})
    assert len({h1.hexdigest(), h2.hexdigest(), h3.hexdigest()}) == 3


def test_golden_lookup_takes_the_fingerprint_only() -> None:
    """Golden values are found by this platform's fingerprint, else not at all (the golden tests
    then skip): no coarser key, which once matched a platform whose results differ."""
    assert golden_for({fingerprint(): 1, "x86_64 numpy 2.4 AVX-512": 2}) == 1
    assert golden_for({"0000000000000000": 1, "x86_64 numpy 2.4 AVX-512": 2}) is None
