"""The estimator's kept working blocks give bit-identical results to the paths they shortcut.

Oracles (STYLE rule 23): the same computation without the shortcut — the slip detector's general
path (``ArcState._general``) for its common path, a ROTI window whose sums are gathered afresh
every push for one that keeps them in a block, an estimator that never was copied for a copied or
pickled one — and, for the window, the batch population std of the values it holds (the
``SlotStd`` invariant, plain numpy). Inputs: our invented scenarios (tests/_estimator_synth.py).
"""

from __future__ import annotations

import copy
import dataclasses
import pickle

import numpy as np

from ionwarden.daemon.estimator import StationEstimator
from ionwarden.daemon.estimator._windows import SlotStd
from ionwarden.parsers import ObsEpoch

from ._estimator_synth import RX_ECEF, Scenario, generate
from .test_estimator_fastpaths import _assert_same


def _with_locks(epochs: list[ObsEpoch], t0: float) -> list[ObsEpoch]:
    """The epochs with MSM lock-time indicators and decoded lock times that grow (the synthetic
    generator leaves them unknown)."""
    out = []
    for ep in epochs:
        age = ep.time.total_s - t0 + 100.0
        n = ep.sat.shape[0]
        out.append(
            dataclasses.replace(
                ep,
                lock_indicator=np.full(n, min(int(age), 600), np.int16),
                lock_time_s=np.full(n, age, np.float32),
            )
        )
    return out


def _feed(est: StationEstimator, tr, epochs: list[ObsEpoch], first: int) -> list:
    snaps = []
    for ti, ep in enumerate(epochs, start=first):
        est.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
        snaps.append(est.update(ep))
    return snaps


def test_slip_detector_common_path_equals_general_path():
    """Epochs whose lock indicators vanish (−1) every third epoch take ArcState._general without starting an arc; their snapshots equal the common path's bit for bit."""
    tr = generate(Scenario(n_sats=6, duration_s=300.0, seed=3))
    epochs = _with_locks(tr.epochs, tr.epochs[0].time.total_s)
    odd = [
        dataclasses.replace(ep, lock_indicator=np.full(ep.sat.shape[0], -1, np.int16))
        if k % 3 == 1
        else ep
        for k, ep in enumerate(epochs)
    ]  # fmt: skip
    fast, slow = StationEstimator(), StationEstimator()
    general = []
    inner = slow.arcs._general

    def counted(*args, **kwargs):
        new, reason = inner(*args, **kwargs)
        general.append(reason is None)
        return new, reason

    slow.arcs._general = counted  # type: ignore[method-assign]
    for est in (fast, slow):
        est.set_receiver_position(RX_ECEF, "config")
    for a, b in zip(_feed(fast, tr, epochs, 0), _feed(slow, tr, odd, 0), strict=True):
        _assert_same(a, b)
    assert sum(general) >= 90  # the general path ran without an arc start


def _window_pushes(seed: int):
    """(t, satellites, values) of a ROTI window's pushes: a repeated read-only satellite array,
    NaN values, sub-slot epochs, skipped slots and satellite changes."""
    rng = np.random.default_rng(seed)
    layouts = [np.array([1, 3, 5, 7]), np.array([1, 3, 5, 7, 9]), np.array([2, 3])]
    for lay in layouts:
        lay.setflags(write=False)
    sats = layouts[0]
    t = 0.0
    for step in range(400):
        t += float(rng.choice([1.0] * 12 + [0.5, 2.0, 3.0]))
        if step % 97 == 50:
            sats = layouts[int(rng.integers(len(layouts)))]
        value = rng.normal(size=sats.shape[0])
        if rng.random() < 0.05:
            value[int(rng.integers(sats.shape[0]))] = np.nan
        yield t, sats, value


def test_slot_std_kept_block_equals_gathered_sums_and_batch_std():
    """SlotStd keeping a satellite array's sums in a block gives the std of a window gathering them from acc every push bit for bit, the batch std of its entries (abs_tol 1e-9), and copies that continue alike."""
    kept, gathered = SlotStd(16, 12.0, 1.0), SlotStd(16, 12.0, 1.0)
    copies: list[SlotStd] = []
    for k, (t, sats, value) in enumerate(_window_pushes(5)):
        got = kept.push_std(t, sats, value, 3)
        expect = gathered.push_std(t, sats, value, 3)
        gathered.acc  # noqa: B018 - writes its block back: the next push gathers it afresh
        np.testing.assert_array_equal(got, expect)
        for c in copies:
            np.testing.assert_array_equal(c.push_std(t, sats, value, 3), got)
        if k in (120, 250):  # mid-block
            copies += [copy.deepcopy(kept), pickle.loads(pickle.dumps(kept))]
        # batch oracle: population std of the finite values held for each satellite
        held: dict[int, list[float]] = {}
        for s, v in kept.entries:
            for si, vi in zip(s.tolist(), v.tolist(), strict=True):
                held.setdefault(si, []).append(vi)
        for si, g in zip(sats.tolist(), got.tolist(), strict=True):
            vals = held.get(si, [])
            if len(vals) >= 3:
                assert abs(g - float(np.std(vals))) <= 1e-9
            else:
                assert np.isnan(g)
    assert kept._blk is not None  # the block was in use
    np.testing.assert_array_equal(kept.acc, gathered.acc)


def test_estimator_copied_mid_block_sees_lock_drops_like_the_original():
    """A deep copy or pickle of a StationEstimator taken while a working block is kept continues bit for bit, including an arc started by a lock-time drop after the copy (the block's views are rebuilt, not copied apart)."""
    tr = generate(Scenario(n_sats=6, duration_s=200.0, seed=8))
    epochs = _with_locks(tr.epochs, tr.epochs[0].time.total_s)
    drop = 150
    ep = epochs[drop]
    lock = ep.lock_time_s.copy()
    lock[ep.sat == tr.sats[2]] = 1.0
    epochs[drop] = dataclasses.replace(ep, lock_time_s=lock)
    a = StationEstimator()
    a.set_receiver_position(RX_ECEF, "config")
    _feed(a, tr, epochs[:120], 0)
    b, c = copy.deepcopy(a), pickle.loads(pickle.dumps(a))
    runs = [_feed(est, tr, epochs[120:], 120) for est in (a, b, c)]
    slipped = runs[0][drop - 120].satellites
    assert slipped.slip.tolist() == (slipped.sat == tr.sats[2]).tolist()
    for x, y, z in zip(*runs, strict=True):
        _assert_same(x, y)
        _assert_same(x, z)
