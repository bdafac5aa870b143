"""StationPipeline(defer=True): the daemon's split of each step into the urgent part (bytes →
snapshot) and the deferred part (``settle``: the receiver-bias fit and the messages after the
epoch) changes the order of work only, never a figure.

Input: the simulator's invented quiet-day stream (our own scenario, daemon/sim), one chunk per
second, long enough for several receiver-bias fits (first after ``receiver_bias_min_arc_s``,
then every ``receiver_bias_update_s``).
"""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.daemon.sim._constellation import build_constellation
from ionwarden.parsers import KeplerEphemeris, ObsEpoch

from .test_estimator_fastpaths import _assert_same

SECONDS = 260


@pytest.fixture(scope="module")
def chunks() -> tuple[list[bytes], object]:
    sc = build_scenario("quiet-day", duration_s=float(SECONDS))
    return [data for _, data in iter_stream(Simulator(sc), 0)], sc.start


def _run(chunks: list[bytes], start: object, mode: str) -> tuple[list[object], StationPipeline]:
    """Outputs in order: ``plain`` (defer off), ``settled`` (settle after every feed, as the
    runtime does), ``lazy`` (never settled: each feed settles the previous chunk first)."""
    pipe = StationPipeline("HARC", reference_time=start, defer=mode != "plain")  # type: ignore[arg-type]
    out: list[object] = []
    for data in chunks:
        out += pipe.feed(data)
        if mode == "settled":
            out += pipe.settle()
            assert not pipe.unsettled()
    out += pipe.feed(b"")
    out += pipe.settle()
    return out, pipe


def _same_state(a: object, b: object) -> bool:
    """Nested state (dicts, lists, arrays, numbers) equal, NaN equal to NaN."""
    if isinstance(a, dict):
        return (
            isinstance(b, dict) and a.keys() == b.keys() and all(_same_state(a[k], b[k]) for k in a)
        )
    if isinstance(a, (list, tuple)):
        return (isinstance(b, (list, tuple)) and len(a) == len(b)
                and all(_same_state(x, y) for x, y in zip(a, b, strict=True)))  # fmt: skip
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        x, y = np.asarray(a), np.asarray(b)
        return x.shape == y.shape and bool(np.array_equal(x, y, equal_nan=x.dtype.kind == "f"))
    if isinstance(a, float) and isinstance(b, float) and np.isnan(a) and np.isnan(b):
        return True
    return a == b


def _assert_same_outputs(a: list[object], b: list[object]) -> None:
    assert [type(x) for x in a] == [type(x) for x in b]
    for x, y in zip(a, b, strict=True):
        if isinstance(x, StationSnapshot):
            assert isinstance(y, StationSnapshot)
            _assert_same(x, y)
            assert x.counters == y.counters
        else:
            assert x == y


def test_deferred_pipeline_gives_the_same_outputs_in_the_same_order(chunks):
    """Deferring the receiver-bias fit and the post-epoch messages (settled at once, or only by
    the next feed) gives the plain pipeline's snapshots bit for bit and its fix reports, in the
    same order; the receiver bias was really fitted (finite) in the run."""
    data, start = chunks
    plain, p_plain = _run(data, start, "plain")
    settled, p_settled = _run(data, start, "settled")
    lazy, _ = _run(data, start, "lazy")
    snaps = [x for x in plain if isinstance(x, StationSnapshot)]
    assert len(snaps) >= SECONDS - 2
    assert any(isinstance(x, FixStatus) for x in plain)
    assert np.isfinite(snaps[-1].receiver_bias_tecu)  # fits ran (and were applied) in the run
    _assert_same_outputs(plain, settled)
    _assert_same_outputs(plain, lazy)
    assert _same_state(p_plain.state_dict(), p_settled.state_dict())


def test_deferred_pipeline_holds_back_only_what_follows_the_epoch(chunks):
    """With defer on, a chunk's messages up to its last epoch are routed at once (the snapshot
    comes out of feed) and the rest (here the GGA/GST after the observations) waits for settle,
    which returns their fix report; without defer nothing is held back."""
    data, start = chunks
    pipe = StationPipeline("HARC", reference_time=start, defer=True)  # type: ignore[arg-type]
    plain = StationPipeline("HARC", reference_time=start)  # type: ignore[arg-type]
    for chunk in data[:5]:
        out = pipe.feed(chunk)
        assert [type(x) for x in out] == [StationSnapshot]
        assert pipe.unsettled()
        later = pipe.settle()
        assert later  # fix reports of the GGA and the GST
        assert all(type(x) is FixStatus for x in later)
        assert not pipe.unsettled()
        plain.feed(chunk)
        assert not plain.unsettled()
    msgs = pipe.decoder.feed(data[5])
    assert any(type(m) is ObsEpoch for m in msgs)


def test_state_dict_includes_a_deferred_receiver_bias_fit(chunks):
    """A checkpoint taken between a step and its settle already contains the deferred fit
    (state_dict settles the estimator first)."""
    data, start = chunks
    plain = StationPipeline("HARC", reference_time=start)  # type: ignore[arg-type]
    pipe = StationPipeline("HARC", reference_time=start, defer=True)  # type: ignore[arg-type]
    fitted = False
    for chunk in data:
        plain.feed(chunk)
        pipe.feed(chunk)
        fitted = fitted or pipe.estimator.unsettled()
        assert _same_state(pipe.state_dict(), plain.state_dict())
        pipe.settle()
    assert fitted


@pytest.mark.parametrize("read_size", [None, 701])
def test_deferring_framing_core_gives_the_same_outputs(chunks, read_size):
    """FramingCore(defer=True) around StationPipeline(defer=True), as the daemon builds it: the
    frames after each chunk's last epoch (its NMEA) wait for settle(); settled after every feed
    (as the runtime does) or only by the next feed, the outputs equal the plain core's, bit for
    bit and in order, whether reads hold one second each or cut epochs anywhere (701 bytes)."""
    from ionwarden.daemon.runtime import FramingCore

    data, start = chunks
    if read_size is not None:
        stream = b"".join(data)
        data = [stream[i : i + read_size] for i in range(0, len(stream), read_size)]

    def run(defer: bool, settle: bool) -> tuple[list[object], FramingCore]:
        core = FramingCore(
            consumer=StationPipeline("HARC", reference_time=start, defer=defer),  # type: ignore[arg-type]
            defer=defer,
        )
        out: list[object] = []
        for chunk in data:
            out += core.feed(chunk)
            if settle:
                out += core.settle()
                assert not core.unsettled()
        out += core.end_stream()
        out += core.settle()
        return out, core

    plain, p_core = run(False, False)
    held = 0
    for settle in (True, False):
        out, core = run(True, settle)
        _assert_same_outputs(plain, out)
        assert core.frames_total() == p_core.frames_total()
        assert core.counts() == p_core.counts()
    core = FramingCore(
        consumer=StationPipeline("HARC", reference_time=start, defer=True),  # type: ignore[arg-type]
        defer=True,
    )
    for chunk in data[:40]:
        core.feed(chunk)
        held += bool(core._later or core._tail)
        core.settle()
    assert held > 0  # frames were really held back


@pytest.mark.parametrize("event", ["none", "new_ephemeris", "receiver_moved", "other_time"])
def test_geometry_prefetch_changes_no_result(event):
    """Geometry.prefetch (orbit rows evaluated in the deferred step for the next epoch's refresh)
    leaves every looked-up row bit for bit and the ephemeris store's counters as without it,
    also when a new ephemeris or a receiver position arrives in between or the epoch comes at
    another time (the rows are then evaluated again). Invented constellation (daemon/sim)."""
    from .test_estimator_station_shortcuts import RX, T0, _geometry

    cons = build_constellation("GER", 7, T0 - 3600.0, T0 + 3600.0)
    ephs = [e for s in cons.series.values() for group in s.ephemerides for e in group]
    ephs = [e for e in ephs if not isinstance(e, KeplerEphemeris)
            or abs(e.week * 604800.0 + e.toe_s - T0) < 7200.0]  # fmt: skip
    late_sat = int(cons.sats[3])
    base = [e for e in ephs if e.sat != late_sat]  # type: ignore[attr-defined]
    late = [e for e in ephs if e.sat == late_sat]  # type: ignore[attr-defined]
    fast, slow = _geometry(base), _geometry(base)
    sats = np.asarray(cons.sats, np.intp)
    sats.setflags(write=False)
    used = tried = 0
    for k in range(200):
        t = T0 + k
        if fast.refresh_due(sats, t):
            tried += 1
            fast.prefetch(sats, t + (0.5 if event == "other_time" else 0.0))
            if event == "new_ephemeris" and late:
                for g in (fast, slow):
                    g.add_ephemeris(late[0], t)  # type: ignore[arg-type]
                late = late[1:]
            if event == "receiver_moved":
                for g in (fast, slow):
                    g.set_receiver_position(RX + np.array([0.0, 0.0, 50.0 * (k % 2)]), "gga")
            used += fast._ahead is not None and fast._ahead[2] == fast._inputs()
        a, sa = fast.lookup(sats, t)
        b, sb = slow.lookup(sats, t)
        assert sa == sb, k
        assert a.tobytes() == b.tobytes(), k
        assert fast.store.statistics() == slow.store.statistics(), k
    assert tried >= 6
    if event == "none":
        assert used == tried
