"""What a station keeps stays compact without changing a value (issue 7, memory per station).

Oracles (STYLE rule 23): plain numpy arrays over the full satellite axis, kept by loops in the
tests (the ring invariants stated in the LagRing and SlotStd docstrings), and a twin ring that went
through its checkpoint path. Inputs: random values of our own, and the demo capture (our
simulator) for the decoders.
"""

from __future__ import annotations

import gc
from pathlib import Path

import numpy as np

from ionwarden.daemon.estimator._windows import LagRing, SlotStd
from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris, StreamDecoder, _stream

DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"
N_SLOTS = 700  # MAX_SAT_ID: the satellite axis of a station's rings


def _layouts() -> list[np.ndarray]:
    out = [np.array([3, 17, 105, 240]), np.array([3, 17, 105, 240, 333, 601]), np.array([17, 9])]
    for lay in out:
        lay.setflags(write=False)
    return out


def test_lag_ring_column_store_equals_full_width_oracle() -> None:
    """LagRing keeps one column per satellite it saw, and its full-width ``value`` equals a plain (rows, slots) array written row by row (source: the LagRing invariant, plain-numpy oracle)."""
    rng = np.random.default_rng(5)
    ring = LagRing(N_SLOTS, 5.0)
    oracle = np.full((ring.rows, N_SLOTS), np.nan, np.float32)
    layouts = _layouts()
    arc_of = dict.fromkeys(range(N_SLOTS), 0)
    for step in range(120):
        sats = layouts[(step // 25) % len(layouts)]
        if step % 7 == 0:
            sats = sats.copy()  # a writeable array: the ring must not trust its identity
        arc = np.array([arc_of[s] for s in sats.tolist()], np.int32)
        value = rng.normal(size=sats.shape[0])
        ring.push(float(step), sats, value, arc)
        row = ring.head
        oracle[row] = np.nan
        oracle[row, sats] = value.astype(np.float32)
        np.testing.assert_array_equal(ring.value, oracle)
        got, t_lag = ring.lagged(float(step + 1), sats, arc, 1.0)
        if step >= 4:
            assert t_lag == float(step + 1) - 5.0
            np.testing.assert_array_equal(got, oracle[(row - 4) % ring.rows, sats])
    # 7 satellites seen: a few columns instead of 700 (memory, not time)
    assert ring._data.shape[1] < 20
    assert ring._data.nbytes < ring.value.nbytes / 30


def test_lag_ring_values_written_through_value_take_effect_at_loaded() -> None:
    """LagRing takes values written into ``value`` (as a checkpoint restore does) at ``loaded``, and differences them over the lag (source: the values written, plain arithmetic)."""
    ring = LagRing(N_SLOTS, 3.0)
    ring._alloc(ring.rows)
    sats = np.array([5, 420])
    arc = np.zeros(2, np.int32)
    ring.t[:3] = [0.0, 1.0, 2.0]
    ring.value[:3, sats] = [[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]]
    ring.head = 2
    ring.last_arc[sats] = 0
    ring.arc_t0[sats] = 0.0
    ring.loaded()
    got, t_lag = ring.lag_push(3.0, sats, np.array([7.0, 8.0]), arc, 1.0)
    assert t_lag == 0.0
    np.testing.assert_array_equal(got, [1.0, 2.0])
    assert ring._data.shape[1] == 2


def test_lag_ring_widens_for_new_satellites_inside_a_lagged_read() -> None:
    """LagRing.lag_push and lagged return NaN for satellites first seen after the lag and the old values for the others when the new ones widen the column store (source: the values pushed)."""
    for combined in (True, False):
        ring = LagRing(N_SLOTS, 2.0)
        old = np.array([1, 2])
        arc = np.zeros(2, np.int32)
        for t in range(3):
            ring.push(float(t), old, np.array([10.0 + t, 20.0 + t]), arc)
        sats = np.concatenate((old, np.arange(300, 330)))  # 30 new: more than the spare columns
        arcs = np.zeros(sats.shape[0], np.int32)
        if combined:
            got, t_lag = ring.lag_push(3.0, sats, np.ones(sats.shape[0]), arcs, 1.0)
        else:
            got, t_lag = ring.lagged(3.0, sats, arcs, 1.0)
        assert t_lag == 1.0
        np.testing.assert_array_equal(got[:2], [11.0, 21.0])
        assert np.isnan(got[2:]).all()


def test_slot_std_value_pool_keeps_the_pushed_values() -> None:
    """SlotStd's entries are the finite values pushed in the last R slots, satellites in push order, while the pool widens for more satellites (source: the SlotStd invariant, plain-loop oracle)."""
    rng = np.random.default_rng(9)
    win = SlotStd(N_SLOTS, window_s=10.0, slot_s=1.0)
    kept: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    layouts = _layouts()
    for step in range(60):
        sats = layouts[(step // 20) % len(layouts)]
        value = rng.normal(size=sats.shape[0])
        value[rng.random(sats.shape[0]) < 0.2] = np.nan
        win.push(float(step), sats, value)
        fin = ~np.isnan(value)
        kept[step % win.rows] = (sats[fin], value[fin])
        for r, (s, v) in enumerate(win.entries):
            np.testing.assert_array_equal(s, kept.get(r, (s[:0], v[:0]))[0])
            np.testing.assert_array_equal(v, kept.get(r, (s[:0], v[:0]))[1])
    assert win._vals.shape == (win.rows, 6)  # the widest layout


def test_slot_std_checkpointed_entries_give_the_same_sums() -> None:
    """SlotStd restored through ``entries``/``load_entries`` gives bit-identical sums and std to its twin (source: the twin, same arithmetic)."""
    rng = np.random.default_rng(4)
    a, b = SlotStd(N_SLOTS, 8.0, 1.0), SlotStd(N_SLOTS, 8.0, 1.0)
    sats = _layouts()[1]
    for step in range(40):
        value = rng.normal(size=sats.shape[0])
        value[rng.random(sats.shape[0]) < 0.3] = np.nan
        std_a = a.push_std(float(step), sats, value, 2)
        b.push(float(step), sats, value)
        if step % 5 == 0:
            b.load_entries([(s, v.copy()) for s, v in b.entries])
        np.testing.assert_array_equal(std_a, b.std(sats, 2))
        np.testing.assert_array_equal(a.acc, b.acc)


def test_slot_std_consecutive_slots_share_a_nan_filtered_subset() -> None:
    """SlotStd keeps one satellite array for consecutive slots whose values lack the same satellites (memory: no array per entry)."""
    win = SlotStd(N_SLOTS, 10.0, 1.0)
    sats = _layouts()[0]
    value = np.array([1.0, np.nan, 2.0, 3.0])
    for step in range(5):
        win.push(float(step), sats, value + step)
    subsets = {id(s) for s, _ in win.entries[:5]}
    assert len(subsets) == 1
    assert not win.entries[0][0].flags.writeable


def test_stream_decoders_share_equal_ephemerides() -> None:
    """Two StreamDecoders fed the same capture hand out the very same ephemeris objects (one copy per process), equal to what each decoded (demo capture, our simulator)."""
    data = DEMO.read_bytes()[:300_000]
    kinds = KeplerEphemeris | GlonassEphemeris
    a, b = StreamDecoder(), StreamDecoder()
    first = [m for m in a.feed(data) if isinstance(m, kinds)]
    second = [m for m in b.feed(data) if isinstance(m, kinds)]
    assert first
    assert len(first) == len(second)
    assert all(x is y for x, y in zip(first, second, strict=True))


def test_stream_shared_table_holds_only_what_caches_hold() -> None:
    """The process-wide table of shared values empties again when the decoders holding them are cleared or collected, and passes unhashable values through."""
    gc.collect()
    before = dict(_stream._SHARED)
    data = DEMO.read_bytes()[:300_000]
    a, b = StreamDecoder(), StreamDecoder()
    a.feed(data)
    b.feed(data)
    added = set(_stream._SHARED) - set(before)
    assert added
    held = {v: _stream._SHARED[v][1] for v in added}  # entries of both caches holding v
    _stream._release_cache(a._misc_cache)
    assert all(2 * _stream._SHARED[v][1] == n for v, n in held.items())  # b's half is left
    del a, b
    gc.collect()
    assert set(_stream._SHARED) == set(before)
    unhashable = [1, 2]
    assert _stream._share(unhashable) is unhashable  # type: ignore[type-var]
    assert set(_stream._SHARED) == set(before)
