"""The rolling windows' shortcuts equal their general paths bit for bit.

Oracles (STYLE rule 23): the same window fed writeable copies of the satellite arrays, which
never take a shortcut (no block of sums kept, no slice of consecutive columns: the general path
of ``SlotStd._push`` and ``LagRing._push``). Inputs: random values and times of our own.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest

from ionwarden.daemon.estimator import _windows
from ionwarden.daemon.estimator._windows import LagRing, SlotStd


def _layouts() -> list[np.ndarray]:
    # [1, 3, 5, 7] first: consecutive ring columns; [2, 3] later: columns 4 and 1 (a gather).
    out = [np.array([1, 3, 5, 7]), np.array([1, 3, 5, 7, 9]), np.array([2, 3])]
    for lay in out:
        lay.setflags(write=False)
    return out


def _pushes(seed: int, steps: int) -> Iterator[tuple[float, np.ndarray, np.ndarray]]:
    """Times with skipped slots and gaps longer than the window, layout changes, NaN values."""
    rng = np.random.default_rng(seed)
    layouts = _layouts()
    t, sats = 0.0, layouts[0]
    for step in range(steps):
        t += float(rng.choice([1.0] * 12 + [0.5, 2.0, 3.0, 7.0, 45.0]))
        if step % 53 == 0 or rng.random() < 0.02:
            sats = layouts[int(rng.integers(len(layouts)))]
        value = rng.normal(size=sats.shape[0])
        if rng.random() < 0.05:
            value[int(rng.integers(sats.shape[0]))] = np.nan
        yield t, sats, value


def test_slot_std_filling_block_equals_general_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """SlotStd.push_std filling empty entries through its block (window filling, slots skipped) gives the std and sums of a window fed writeable copies, bit for bit (source: the general path)."""
    added: list[int] = []
    add = _windows._SumBlock.add

    def counted(blk: _windows._SumBlock, new: np.ndarray) -> None:
        added.append(new.shape[0])
        add(blk, new)

    monkeypatch.setattr(_windows._SumBlock, "add", counted)
    fast, slow = SlotStd(16, 30.0, 1.0), SlotStd(16, 30.0, 1.0)
    for k, (t, sats, value) in enumerate(_pushes(3, 900)):
        min_count = (0, 1, 5)[k % 3] if k % 97 < 9 else 3  # the usual one, sometimes others
        got = fast.push_std(t, sats, value, min_count)
        expect = slow.push_std(t, sats.copy(), value, min_count)
        assert slow._blk is None  # the oracle never keeps a block
        np.testing.assert_array_equal(got, expect)
        if k % 41 == 0:  # reading acc writes the block back; the next push gathers it afresh
            np.testing.assert_array_equal(fast.acc, slow.acc)
    np.testing.assert_array_equal(fast.acc, slow.acc)
    assert len(added) > 100  # the filling block path ran


def test_slot_std_placed_block_equals_general_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """SlotStd.push_std dropping entries of other layouts (placed in block order, the block widened by their satellites outside it) and entries or values with NaN through its block gives the std and sums of a window fed writeable copies, bit for bit (source: the general path)."""
    calls = {"placed": 0, "outside": 0, "gaps": 0}
    sub, add = _windows._SumBlock.sub_placed, _windows._SumBlock.add_gaps

    def counted_sub(
        blk: _windows._SumBlock, place: _windows._Placement, v: np.ndarray, p: np.ndarray | None
    ) -> None:
        calls["placed"] += 1
        calls["outside"] += blk.cols.shape[0] > blk.sats.shape[0]  # widened by other satellites
        sub(blk, place, v, p)

    def counted_add(blk: _windows._SumBlock, v: np.ndarray, p: np.ndarray) -> None:
        calls["gaps"] += 1
        add(blk, v, p)

    monkeypatch.setattr(_windows._SumBlock, "sub_placed", counted_sub)
    monkeypatch.setattr(_windows._SumBlock, "add_gaps", counted_add)
    fast, slow = SlotStd(16, 30.0, 1.0), SlotStd(16, 30.0, 1.0)
    layouts = [*_layouts(), np.array([0, 3, 5, 6, 9])]
    layouts[-1].setflags(write=False)
    rng = np.random.default_rng(11)
    t, sats = 0.0, layouts[0]
    for k in range(1500):
        # Mostly regular slots (the placed path needs no skipped slot), layouts that change
        # more often than the window's 30 slots, NaN in some epochs.
        t += 1.0 if rng.random() < 0.97 else 3.0
        if rng.random() < 0.05:
            sats = layouts[int(rng.integers(len(layouts)))]
        value = rng.normal(size=sats.shape[0])
        if rng.random() < 0.1:
            value[int(rng.integers(sats.shape[0]))] = np.nan
        min_count = 5 if k % 89 else 0
        got = fast.push_std(t, sats, value, min_count)
        expect = slow.push_std(t, sats.copy(), value, min_count)
        assert slow._blk is None  # the oracle never keeps a block
        np.testing.assert_array_equal(got, expect)
        if k % 37 == 0:  # reading acc writes the block back; the next push gathers it afresh
            np.testing.assert_array_equal(fast.acc, slow.acc)
    np.testing.assert_array_equal(fast.acc, slow.acc)
    assert calls["placed"] > 100  # each path ran
    assert calls["outside"] > 20
    assert calls["gaps"] > 50


def test_lag_ring_column_slice_equals_general_path() -> None:
    """LagRing.lag_push through a slice of consecutive columns (read-only satellites) returns and stores the same values as a ring fed writeable copies (a column gather), bit for bit (source: the general path)."""
    fast, slow = LagRing(16, 5.0), LagRing(16, 5.0)
    arcs = dict.fromkeys(range(16), 0)
    rng = np.random.default_rng(5)
    sliced = gathered = 0
    arc_of: dict[int, np.ndarray] = {}
    for t, sats, value in _pushes(7, 600):
        if rng.random() < 0.02:
            arcs[int(rng.choice(sats))] += 1
            arc_of.clear()
        arc = arc_of.get(id(sats))
        if arc is None:
            arc = np.array([arcs[s] for s in sats.tolist()], np.int32)
            arc.setflags(write=False)
            arc_of[id(sats)] = arc
        got = fast.lag_push(t, sats, value, arc, 1.0)
        expect = slow.lag_push(t, sats.copy(), value, arc.copy(), 1.0)
        memo = fast._cols_of
        assert memo is not None
        sliced += isinstance(memo[1], slice)
        gathered += not isinstance(memo[1], slice)
        np.testing.assert_array_equal(got[0], expect[0])
        assert got[1] == expect[1] or (np.isnan(got[1]) and np.isnan(expect[1]))
        np.testing.assert_array_equal(fast.value, slow.value)
        lag = fast.lagged(t + 1.0, sats, arc, 1.0)
        np.testing.assert_array_equal(lag[0], slow.lagged(t + 1.0, sats.copy(), arc, 1.0)[0])
    assert sliced > 0  # both kinds of columns ran
    assert gathered > 0


def test_slot_std_rebuilt_sums_equal_sums_over_the_entries() -> None:
    """SlotStd's exact rebuild of its sums (each time the ring wraps) equals bincounts over the concatenated entries bit for bit (source: the invariant in the SlotStd docstring)."""
    win = SlotStd(16, 30.0, 1.0)
    for k, (t, sats, value) in enumerate(_pushes(9, 400)):
        win.push(t, sats, value)
        if k % 23 == 0:
            win._recompute()
            sats_all = np.concatenate([s for s, _ in win.entries])
            vals = np.concatenate([v for _, v in win.entries])
            expect = [
                np.bincount(sats_all, vals, 16),
                np.bincount(sats_all, vals * vals, 16),
                np.bincount(sats_all, minlength=16).astype(np.float64),
            ]
            np.testing.assert_array_equal(win.acc, np.array(expect))
