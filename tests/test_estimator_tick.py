"""The batched tick (``TickBatch.update``) gives what each station's own path gives, bit for bit.

Two worlds take the same inputs: K ``StationPipeline`` s (``defer=True``, as the daemon builds
them) run normally, and K identical ones whose epoch route holds each chunk's last epoch, so that
every second's held epochs are estimated together by one ``TickBatch.update`` call. Per second,
both worlds feed every station's chunk, then (world B) run the tick, then settle every station.
Every output of every station (snapshots and fix reports, every field, arrays by dtype, shape and
bytes, floats by their bits, counters), each second and again at the end (a kept snapshot must
not change later), then each estimator's ``state_dict()``, full state rows and counters, and each
pipeline's counters and NMEA selection must be the same.

Oracles (STYLE rule 23): our own one-station path, ``StationEstimator.update`` (via
``StationPipeline``), run on the same inputs in the same order.
Inputs: the simulator's invented scenarios (``daemon.sim``), several sites and seeds at the same
1 Hz epoch times, events moved early so that a few minutes hold them (storm front with slips of 7,
2500 and a silent 1 cycle and a loss of lock; L2 band outage with single-frequency satellites, a
receiver restart and a stream gap; scintillation with a half-cycle slip); schedules perturbed
here (a late station, missing seconds, out-of-order epochs, a time reset, shuffled feed order,
mid-run checkpoints); and the real capture RTK134 (../shared/data/real/rtcm/, PROVENANCE.md),
read in place, as three copies, one of them a second late for a while.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
from dataclasses import replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest

from ionwarden.daemon.estimator import (
    PipelineOutput,
    StationEstimator,
    StationPipeline,
    StationSnapshot,
)
from ionwarden.daemon.estimator._pipeline import _FALLBACK_SENTENCES, _FIX_SENTENCES
from ionwarden.daemon.estimator._tick import TickBatch
from ionwarden.daemon.sim import (
    BandOutage,
    LossOfLock,
    ReceiverRestart,
    ScintillationWindow,
    Simulator,
    SlipEvent,
    StreamComposer,
    StreamGap,
    build_scenario,
)
from ionwarden.parsers import ObsEpoch, StreamDecoder

if TYPE_CHECKING:
    from collections.abc import Callable, Sequence
    from pathlib import Path

    from ionwarden.daemon.sim import Scenario
    from ionwarden.parsers import GpsTime

#: A station's input of one second: stream bytes, or messages already decoded (RTK134).
Chunk = bytes | list[object]
#: One second of input: (station index, chunk) in feed order.
Second = list[tuple[int, Chunk]]

QUIET_S = 400  # past the 5-min ROTI window (330 s): the steady state
EVENT_S = 240


# -- inputs ---------------------------------------------------------------------------------------
def _scenario(name: str) -> Scenario:
    """The invented scenario of ``name`` (events early: a few minutes of stream hold them)."""
    sites = build_scenario("storm-front").stations  # HARC and three rovers (10–80 km)
    if name == "quiet-a":
        return replace(build_scenario("quiet-day", seed=1, duration_s=QUIET_S), stations=sites)
    if name == "quiet-b":  # another seed: another constellation, other satellites in view
        return replace(build_scenario("quiet-day", seed=2, duration_s=QUIET_S), stations=sites[2:3])
    if name == "quiet-b-later":  # quiet-b's first station, its clock 2 h ahead (a time reset)
        sc = _scenario("quiet-b")
        return replace(sc, start=sc.start + 7200.0, duration_s=60.0)
    if name == "storm":
        sc = build_scenario("storm-front", duration_s=EVENT_S)
        return replace(
            sc,
            stations=sites[:3],
            storm=replace(sc.storm, onset_s=10.0, t_cross_s=150.0),  # type: ignore[type-var]
            slips=(
                SlipEvent(t_s=60.0, sat=-1, cycles=7),
                SlipEvent(t_s=110.0, sat=-1, cycles=2500, signals=("2W", "2C", "7Q", "7I")),
                SlipEvent(t_s=190.0, sat=-1, cycles=1, signals=("1C",), lock_reset=False),
            ),
            losses=(LossOfLock(t_s=130.0, sat=-1, duration_s=25.0),),
        )
    if name == "band-outage":
        return replace(
            build_scenario("band-outage", seed=4, duration_s=EVENT_S),
            outages=(
                BandOutage(start_s=30.0, end_s=70.0, drop_db=20.0),
                BandOutage(start_s=80.0, end_s=140.0),  # L2 lost: single-frequency satellites
            ),
            restarts=(ReceiverRestart(t_s=160.0, duration_s=10.0),),
            gaps=(StreamGap(start_s=200.0, end_s=210.0),),
        )
    assert name == "scintillation"
    return replace(
        build_scenario("scintillation", seed=5, duration_s=EVENT_S),
        scintillation=(
            ScintillationWindow(start_s=30.0, end_s=110.0, rms_tecu=0.8),
            ScintillationWindow(start_s=140.0, end_s=220.0, rms_tecu=1.5, fade_db=10.0),
        ),
        slips=(SlipEvent(t_s=80.0, sat=-1, cycles=0, half_cycle=True, signals=("1C",)),),
    )


@functools.cache
def _streams(name: str) -> tuple[GpsTime, tuple[tuple[str, tuple[bytes, ...]], ...]]:
    """Start and (station name, bytes of each second: b"" in gaps and restarts) per station,
    one simulator run for all stations of the scenario."""
    sc = _scenario(name)
    sim = Simulator(sc)
    # GSV every 10 s (the default 1 s costs most of the stream's time): the fallback geometry
    # is exercised where the ephemerides are gone (a restarted estimator)
    comps = [StreamComposer(sim, i, gsv_every_s=10.0) for i in range(len(sc.stations))]
    out: list[list[bytes]] = [[] for _ in comps]
    for blocks in sim.run():
        for comp, block, chunks in zip(comps, blocks, out, strict=True):
            chunks.extend(comp.epoch_bytes(block, e) for e in range(block.present.shape[0]))
    names = [f"{name}/{st.name}" for st in sc.stations]
    return sc.start, tuple((n, tuple(c)) for n, c in zip(names, out, strict=True))


def _pick(*picks: tuple[str, int]) -> tuple[GpsTime, list[str], list[list[Chunk]]]:
    """The start, names and per-second chunks of the stations ``(scenario, station index)``."""
    starts, names, chunks = set(), [], []
    for name, i in picks:
        start, stations = _streams(name)
        starts.add(start)
        names.append(stations[i][0])
        chunks.append(list[Chunk](stations[i][1]))
    assert len(starts) == 1, "stations of one run share their epoch times"
    return starts.pop(), names, chunks


def _schedule(
    chunks: Sequence[Sequence[Chunk]], n: int, *, shuffle: int | None = None
) -> list[Second]:
    """``n`` seconds: each station's chunk of each second (none when empty), in station order or
    a seeded random order per second."""
    rng = np.random.default_rng(shuffle) if shuffle is not None else None
    out: list[Second] = []
    for s in range(n):
        order = list(range(len(chunks))) if rng is None else rng.permutation(len(chunks)).tolist()
        out.append([(i, chunks[i][s]) for i in order if s < len(chunks[i]) and len(chunks[i][s])])
    return out


# -- the two worlds -------------------------------------------------------------------------------
class _World:
    """K pipelines fed second by second; ``batched``: each second's epochs go through one
    ``TickBatch.update`` (a chunk's earlier epochs, if it has several, through one each, at once:
    they precede the chunk's later messages)."""

    def __init__(self, names: Sequence[str], start: GpsTime | None, *, batched: bool) -> None:
        self.pipes = [StationPipeline(n, reference_time=start, defer=True) for n in names]
        self.outputs: list[list[PipelineOutput]] = [[] for _ in names]
        self.tick = TickBatch() if batched else None
        self.epochs_routed = 0
        #: Per tick over held epochs: (station-epochs in it, of them served batched).
        self.per_tick: list[tuple[int, int]] = []
        self._held: list[tuple[int, ObsEpoch]] = []
        self._left = [0] * len(names)
        if batched:
            for i, pipe in enumerate(self.pipes):
                assert pipe._routes[ObsEpoch] == pipe._on_epoch
                pipe._routes[ObsEpoch] = self._holder(i)

    def _holder(self, i: int) -> Callable[[ObsEpoch], StationSnapshot | None]:
        pipe = self.pipes[i]

        def hold(epoch: ObsEpoch) -> StationSnapshot | None:
            pipe._last_t = epoch.time  # as _on_epoch: the GSV/GGA after it are dated by it
            self.epochs_routed += 1
            self._left[i] -= 1
            if self._left[i] > 0:  # not the chunk's last epoch: estimated now
                return self._estimate([(i, epoch)])[0]
            self._held.append((i, epoch))
            return None

        return hold

    def _estimate(self, items: Sequence[tuple[int, ObsEpoch]]) -> list[StationSnapshot]:
        assert self.tick is not None
        snaps = self.tick.update([(self.pipes[i].estimator, ep) for i, ep in items])
        assert len(snaps) == len(items)
        for (i, _), snap in zip(items, snaps, strict=True):  # as _on_epoch
            self.pipes[i].decoder.nmea_wanted = (
                _FIX_SENTENCES if snap.geometry_source == "ephemeris" else _FALLBACK_SENTENCES
            )
        return snaps

    def second(self, chunks: Second) -> list[list[PipelineOutput]]:
        """Feed one second; the outputs of each station it produced."""
        new: list[list[PipelineOutput]] = [[] for _ in self.pipes]
        for i, chunk in chunks:
            pipe = self.pipes[i]
            if self.tick is None:
                new[i] += pipe.feed(chunk) if isinstance(chunk, bytes) else pipe._route(chunk)
                continue
            msgs = pipe.decoder.feed(chunk) if isinstance(chunk, bytes) else chunk
            self._left[i] = sum(type(m) is ObsEpoch for m in msgs)
            new[i] += pipe._route(msgs)  # what feed() does with the decoded messages
        if self._held:
            held, self._held = self._held, []
            assert len({i for i, _ in held}) == len(held)  # each estimator at most once a tick
            assert self.tick is not None
            n0 = self.tick.served_batched
            for (i, _), snap in zip(held, self._estimate(held), strict=True):
                new[i].append(snap)
            self.per_tick.append((len(held), self.tick.served_batched - n0))
        for i, pipe in enumerate(self.pipes):
            new[i] += pipe.settle()
            self.outputs[i] += new[i]
        return new


def _fresh_from_checkpoint(world: _World, batched: bool, i: int) -> None:
    """Station ``i`` restarts from its checkpoint: a new estimator loads its ``state_dict()``."""
    del batched
    pipe = world.pipes[i]
    fresh = StationEstimator(station=pipe.station, defer_fit=True)  # as StationPipeline builds it
    fresh.load_state(pipe.estimator.state_dict())
    pipe.estimator = fresh


def _run(
    names: Sequence[str],
    start: GpsTime | None,
    seconds: Sequence[Second],
    hooks: dict[int, list[Callable[[_World, bool], None]]] | None = None,
) -> tuple[_World, _World]:
    """Both worlds over ``seconds``, compared each second and at the end (see module doc)."""
    own, tick = _World(names, start, batched=False), _World(names, start, batched=True)
    for s, chunks in enumerate(seconds):
        got_own, got_tick = own.second(chunks), tick.second(chunks)
        for i, name in enumerate(names):
            _assert_bits(got_own[i], got_tick[i], f"second {s}, {name}")
            _assert_bits(own.pipes[i].estimator.counters, tick.pipes[i].estimator.counters,
                         f"second {s}, {name}, estimator counters")  # fmt: skip
            assert own.pipes[i].decoder.nmea_wanted == tick.pipes[i].decoder.nmea_wanted
        for hook in (hooks or {}).get(s, []):
            hook(own, False)
            hook(tick, True)
    for i, name in enumerate(names):
        a, b = own.pipes[i], tick.pipes[i]
        _assert_bits(own.outputs[i], tick.outputs[i], f"{name}: all outputs, kept to the end")
        _assert_bits(a.counters, b.counters, f"{name}: pipeline counters")
        _assert_bits(a.estimator.state_dict(), b.estimator.state_dict(), f"{name}: state_dict")
        _assert_bits(a.estimator.state_rows(), b.estimator.state_rows(), f"{name}: state rows")
        _assert_bits(a.estimator.counters, b.estimator.counters, f"{name}: estimator counters")
    assert tick.tick is not None
    snaps = sum(isinstance(o, StationSnapshot) for out in own.outputs for o in out)
    assert tick.epochs_routed == snaps > 0  # one snapshot per epoch
    assert tick.tick.served_batched + tick.tick.served_alone == tick.epochs_routed
    return own, tick


#: Values compared by ``==`` with their exact types (no float among them).
_PLAIN = frozenset({str, int, bool, bytes, type(None), np.int16, np.int32, np.int64, np.bool_})


def _assert_bits(a: object, b: object, where: str) -> None:
    """``a`` and ``b`` are the same bit for bit: types, dataclass fields, dict keys in order,
    array dtype/shape/bytes, floats by their bits (NaN payloads and signed zeros included)."""
    ta = type(a)
    assert ta is type(b), f"{where}: {ta.__name__} != {type(b).__name__}"
    if ta in _PLAIN or ta is frozenset:
        assert a == b, f"{where}: {a!r} != {b!r}"
    elif isinstance(a, np.ndarray):
        assert isinstance(b, np.ndarray)
        assert (a.dtype, a.shape) == (b.dtype, b.shape), f"{where}: dtype or shape"
        if a.tobytes() != b.tobytes():
            raise AssertionError(f"{where}: {_first_difference(a, b)}")
    elif isinstance(a, float | np.floating):
        assert np.asarray(a).tobytes() == np.asarray(b).tobytes(), f"{where}: {a!r} != {b!r}"
    elif dataclasses.is_dataclass(a) and not isinstance(a, type):
        for f in dataclasses.fields(a):
            _assert_bits(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
    elif isinstance(a, dict):
        assert isinstance(b, dict)
        assert list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        if all(type(v) in _PLAIN for v in a.values()) and a == b:
            assert [type(v) for v in a.values()] == [type(v) for v in b.values()], where
            return  # (counters: the common case, at once)
        for k, v in a.items():
            _assert_bits(v, b[k], f"{where}[{k!r}]")
    elif isinstance(a, list | tuple):
        assert isinstance(b, list | tuple)
        assert len(a) == len(b), f"{where}: length {len(a)} != {len(b)}"
        if all(type(v) in _PLAIN for v in a) and a == b:
            assert [type(v) for v in a] == [type(v) for v in b], where
            return  # (pair codes: the common case, at once)
        for k, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_bits(x, y, f"{where}[{k}]")
    else:
        raise TypeError(f"{where}: no bitwise comparison for {ta.__name__}")


def _first_difference(a: np.ndarray[Any, Any], b: np.ndarray[Any, Any]) -> str:
    """Where two arrays of one dtype and shape differ in their bits (for the failure message)."""
    n, size = a.size, a.dtype.itemsize
    ab = np.ascontiguousarray(a).reshape(-1).view(np.uint8).reshape(n, size)
    bb = np.ascontiguousarray(b).reshape(-1).view(np.uint8).reshape(n, size)
    at = np.flatnonzero((ab != bb).any(axis=1))
    k = int(at[0])
    return (
        f"{at.shape[0]} of {n} elements differ, the first at flat index {k}: "
        f"{a.reshape(-1)[k]!r} != {b.reshape(-1)[k]!r} (bits {ab[k].tobytes().hex()} != "
        f"{bb[k].tobytes().hex()})"
    )


# -- the tests ------------------------------------------------------------------------------------
@functools.cache
def _quiet_run() -> tuple[_World, _World]:
    """Five quiet stations (two seeds, four sites) past the ROTI window: the common second."""
    start, names, chunks = _pick(*[("quiet-a", i) for i in range(4)], ("quiet-b", 0))
    return _run(names, start, _schedule(chunks, QUIET_S))


def test_quiet_stations_tick_equals_own_path() -> None:
    """Five stations of a quiet day (other data, same epoch times), 400 s: every output, the
    state and the counters equal the one-station path's, bit for bit; every station-epoch is
    served once (batched or alone)."""
    own, _ = _quiet_run()
    assert all(len(out) >= 2 * QUIET_S for out in own.outputs)  # a snapshot and a fix a second


def test_tick_serves_common_seconds_batched() -> None:
    """Past the first minute of the quiet day, most station-epochs are served by the batched
    core: 79% with this code (slice 1), where an arc starting at any of the five stations sends
    the whole tick down each station's own path; the runs of slice 2 are to keep the others
    batched then."""
    _, tick = _quiet_run()
    later = tick.per_tick[60:]
    assert sum(b for _, b in later) >= 0.75 * sum(n for n, _ in later)


@pytest.mark.parametrize("case", ["storm", "mixed"])
def test_stations_with_events_tick_equals_own_path(case: str) -> None:
    """Stations with events, 240 s, bit for bit. ``storm``: three sites under a storm front, all
    with the same slips (7, 2500 and a silent 1 cycle) and loss of lock at the same seconds.
    ``mixed``: one L2 band outage station (C/N0 drop, then single-frequency satellites, a
    receiver restart and a stream gap: seconds missing) and one scintillation station (ROTI up,
    a half-cycle slip) among three quiet ones, which the fallback must not disturb."""
    if case == "storm":
        start, names, chunks = _pick(*[("storm", i) for i in range(3)])
    else:
        start, names, chunks = _pick(
            ("quiet-a", 0), ("band-outage", 0), ("quiet-a", 1), ("scintillation", 0), ("quiet-a", 3)
        )
    _, tick = _run(names, start, _schedule(chunks, EVENT_S))
    if case == "mixed":  # the restart and the stream gap: ticks without that station
        assert min(n for n, _ in tick.per_tick) == len(names) - 1


def test_irregular_schedules_tick_equals_own_path() -> None:
    """Stations out of step, 200 s, each second's feed order shuffled, bit for bit: a station
    late every 25 s (its chunk comes with the next one's: a chunk with two epochs, the first
    estimated at once), a station missing seconds, a station sending old epochs (out of order:
    one instead of its current one, one before its current one in a chunk), and a station whose
    clock jumps back 2 h (time reset)."""
    n = 200
    start, names, chunks = _pick(*[("quiet-a", i) for i in range(4)], ("quiet-b", 0))
    late, missing, old, reset = (chunks[i] for i in range(1, 5))
    for s in range(24, n, 25):
        late[s + 1], late[s] = _cat(late[s], late[s + 1]), b""
    for s in (50, 51, 52, 97, 150):
        missing[s] = b""
    old[70] = old[65]
    old[120] = _cat(old[115], old[120])
    reset[:60] = _streams("quiet-b-later")[1][0][1]  # 2 h ahead, then back to its own time
    own, tick = _run(names, start, _schedule(chunks, n, shuffle=7))
    est = own.pipes[4].estimator
    assert est.counters.get("time_resets") == 1
    assert own.pipes[3].estimator.counters["epochs_out_of_order"] == 2
    assert any(k < len(names) for k, _ in tick.per_tick)


def _cat(a: Chunk, b: Chunk) -> bytes:
    assert isinstance(a, bytes)
    assert isinstance(b, bytes)
    return a + b


def test_checkpoints_mid_run_tick_equals_own_path() -> None:
    """Checkpoint work between ticks, 200 s, bit for bit. In the batched world only (it must not
    change anything): the working block written back (``state_rows()``) at 120 s, an estimator
    replaced by its ``copy()`` at 120 s, a ``state_dict()`` taken at 121 s. In both worlds: two
    stations (one in the L2 band outage) restart at 120 s from their ``state_dict()`` in new
    estimators (``load_state``)."""

    def write_back(world: _World, batched: bool) -> None:
        if batched:
            world.pipes[0].estimator.state_rows()

    def copied(world: _World, batched: bool) -> None:
        if batched:
            world.pipes[1].estimator = world.pipes[1].estimator.copy()

    def saved(world: _World, batched: bool) -> None:
        if batched:
            world.pipes[3].state_dict()

    restarts = [functools.partial(_fresh_from_checkpoint, i=i) for i in (2, 4)]
    start, names, chunks = _pick(*[("quiet-a", i) for i in range(4)], ("band-outage", 0))
    own, _ = _run(
        names, start, _schedule(chunks, 200), {120: [write_back, copied, *restarts], 121: [saved]}
    )
    assert own.pipes[2].estimator.counters.get("state_resumed") == 1


def test_real_capture_copies_tick_equals_own_path(real_data: Path) -> None:
    """RTK134 (PROVENANCE.md: 1 Hz MSM5 of four constellations, a real receiver's noise), its
    first 240 epochs as three stations, bit for bit; the third copy is one second late from 80 s
    to 160 s (nothing at 80 s, two epochs at 160 s), so that ticks are in step before and after.
    Each chunk: the decoded messages from the middle of one epoch's gap to the next epoch's
    middle (some after the epoch: deferred to the settle)."""
    dec = StreamDecoder()
    data = (real_data / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    msgs = dec.feed(data[:280_000]) + dec.feed(b"")
    at = [k for k, m in enumerate(msgs) if type(m) is ObsEpoch]
    n = 240
    assert len(at) > n
    cuts = [0, *((a + b) // 2 + 1 for a, b in itertools.pairwise(at[: n + 1]))]
    chunks: list[Chunk] = [list[object](msgs[a:b]) for a, b in itertools.pairwise(cuts)]
    assert [sum(type(m) is ObsEpoch for m in c) for c in chunks] == [1] * n
    late = [*chunks[:80], [], *chunks[80:159], list[object](msgs[cuts[159] : cuts[161]])]
    late += chunks[161:]
    assert len(late) == n
    _run(["RTK134/a", "RTK134/b", "RTK134/late"], None, _schedule([chunks, chunks, late], n))


def test_harness_catches_a_wrong_snapshot() -> None:
    """The comparison catches what a broken tick would give: another station's snapshot, or its
    figures under this station's name, one ulp off, a NaN of the other sign (the harness's own
    check, on the one-station path's outputs)."""
    start, names, chunks = _pick(("quiet-a", 0), ("quiet-a", 1))
    own = _World(names, start, batched=False)
    out = [own.second(c) for c in _schedule(chunks, 5)]
    a, b = (next(o for o in out[-1][i] if isinstance(o, StationSnapshot)) for i in (0, 1))
    _assert_bits(a, a, "same")
    with pytest.raises(AssertionError, match=r"\.station"):
        _assert_bits(a, b, "other")
    with pytest.raises(AssertionError):
        _assert_bits(a, replace(b, station=a.station), "other, renamed")
    with pytest.raises(AssertionError, match=r"\.vtec_tecu"):
        _assert_bits(a, replace(a, vtec_tecu=float(np.nextafter(a.vtec_tecu, np.inf))), "ulp")
    with pytest.raises(AssertionError):
        _assert_bits(np.float64(np.nan), -np.float64(np.nan), "NaN sign")
