"""The cell router's repeat check (usable mask from code × phase when the frequencies repeat, all
finite) gives the layouts of the general computation bit for bit.

Oracle (STYLE rule 23): a fresh CellRouter per epoch (no cached layout: the full usable test of
code, phase and frequency, then a build) and the usable rule itself (code > 0, code, phase and
frequency finite; common practice). Inputs: an invented scenario (tests/_estimator_synth.py) with
random NaN, ±inf, 0, −0, negative and large codes and phases, and NaN/inf frequencies.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.estimator import PairTable
from ionwarden.daemon.estimator._cells import CellRouter, EpochLayout

from ._estimator_synth import Scenario, generate

_BAD = np.array([np.nan, np.inf, -np.inf, 0.0, -0.0, -2.0e7, 9.9e9, -9.9e9, 1.0e-300])


def _assert_same_layout(a: EpochLayout, b: EpochLayout) -> None:
    for f in dataclasses.fields(EpochLayout):
        va, vb = getattr(a, f.name), getattr(b, f.name)
        if isinstance(va, np.ndarray):
            assert va.dtype == vb.dtype, f.name
            np.testing.assert_array_equal(va, vb, err_msg=f.name)
        else:
            assert va == vb, f.name


def test_cached_layout_usable_mask_equals_fresh_build():
    """CellRouter.layout with its cache (code × phase test when the frequencies repeat) equals a fresh router's layout and the usable rule, over epochs with NaN, ±inf, ±0, negative and large values."""
    pairs = PairTable.from_config(EstimatorSettings().pairs)
    tr = generate(Scenario(n_sats=8, duration_s=200.0, seed=9))
    rng = np.random.default_rng(11)
    cached = CellRouter(pairs)
    n_hit = n_nan_freq = 0
    for ti, ep0 in enumerate(tr.epochs):
        pr, ph, fr = ep0.pseudorange_m.copy(), ep0.phase_cycles.copy(), ep0.freq_hz.copy()
        n = pr.shape[0]
        if ti % 3:  # a few bad code or phase values, sometimes repeated for several epochs
            k = rng.integers(0, 3)
            pr[rng.integers(0, n, k)] = rng.choice(_BAD, k)
            ph[rng.integers(0, n, k)] = rng.choice(_BAD, k)
        if 100 <= ti < 140:  # a carrier frequency unknown (NaN) or broken (inf) for a while
            fr[ti % n] = np.nan if ti < 120 else np.inf
            n_nan_freq += 1
        ep = dataclasses.replace(ep0, pseudorange_m=pr, phase_cycles=ph, freq_hz=fr)
        before = cached.rebuilds
        with np.errstate(invalid="ignore", over="ignore"):  # as in the estimator (inf · 0)
            lay = cached.layout(ep)
            fresh = CellRouter(pairs).layout(ep)
        n_hit += cached.rebuilds == before
        _assert_same_layout(lay, fresh)
        usable = np.isfinite(pr) & np.isfinite(ph) & np.isfinite(fr) & (pr > 0)
        assert lay.usable == usable.tobytes()
    assert n_hit >= 40  # cache hits (the code × phase test ran)
    assert n_nan_freq == 40


def test_layout_of_the_same_read_only_arrays_equals_fresh_build():
    """CellRouter.layout handed the same read-only sat, sig and freq_hz arrays again (as the decoder hands them while the layout repeats; no bytes compared) equals a fresh router's layout, through layout changes, unusable cells and broken frequencies (source: the general path (oracle), a fresh router per epoch)."""
    pairs = PairTable.from_config(EstimatorSettings().pairs)
    tr = generate(Scenario(n_sats=8, duration_s=200.0, seed=5))
    rng = np.random.default_rng(12)
    shared: dict[bytes, np.ndarray] = {}

    def read_only(a: np.ndarray) -> np.ndarray:
        """One read-only array object per content (the decoder's cache)."""
        key = a.dtype.str.encode() + a.tobytes()
        if key not in shared:
            shared[key] = a.copy()
            shared[key].setflags(write=False)
        return shared[key]

    cached = CellRouter(pairs)
    n_same = 0
    for ti, ep0 in enumerate(tr.epochs):
        pr, ph, fr = ep0.pseudorange_m.copy(), ep0.phase_cycles.copy(), ep0.freq_hz.copy()
        n = pr.shape[0]
        if ti % 4 == 1:
            pr[rng.integers(0, n)] = rng.choice(_BAD)
        if 100 <= ti < 140:  # a carrier frequency unknown (NaN) or broken (inf) for a while
            fr[ti % 3] = np.nan if ti < 120 else np.inf
        ep = dataclasses.replace(
            ep0, sat=read_only(ep0.sat), sig=read_only(ep0.sig), freq_hz=read_only(fr),
            pseudorange_m=pr, phase_cycles=ph,
        )  # fmt: skip
        src = cached._src
        n_same += src is not None and src[0] is ep.sat and src[2] is ep.freq_hz
        with np.errstate(invalid="ignore", over="ignore"):  # as in the estimator (inf · 0)
            lay = cached.layout(ep)
            fresh = CellRouter(pairs).layout(ep)
        _assert_same_layout(lay, fresh)
    assert n_same > 100  # the identity shortcut ran
    assert cached.rebuilds > 20  # so did layout changes
