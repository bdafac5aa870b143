"""StationPipeline(defer=True, slack=True): of the deferred work, ``settle`` does the messages
after the epoch and leaves the heavy part — the receiver-bias fit every 30 s and the orbits
evaluated ahead for the next epoch's refresh — to ``settle_slack``, which the daemon runs midway
to the next epoch (issue 8: with every station's fit and refresh in the same second, those
seconds set the latency tail). It changes when work runs, never a figure: every estimator entry
that changes what a pending fit reads settles it first, and orbits evaluated ahead are used only
while still valid.

Input: the simulator's invented quiet-day stream (our own scenario, daemon/sim), one chunk per
second (1 Hz by construction), long enough for several fits and refreshes; and a real capture
(RTK134, ../shared/data/real), whose receiver sends its ephemerides after the observations.
"""

from __future__ import annotations

import dataclasses
import itertools

import pytest

from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.daemon.estimator._estimator import StationEstimator
from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.runtime import FramingCore
from ionwarden.daemon.runtime._core import _after_last_epoch
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import MSM_TYPES
from ionwarden.parsers._framer import Framer, RtcmFrame

from .test_msm_epoch import _CAPTURES
from .test_pipeline_settle import _assert_same_outputs, _same_state

SECONDS = 260


@pytest.fixture(scope="module")
def chunks() -> tuple[list[bytes], object]:
    sc = build_scenario("quiet-day", duration_s=float(SECONDS))
    return [data for _, data in iter_stream(Simulator(sc), 0)], sc.start


def _pipe(start: object, *, slack: bool, defer: bool = True) -> StationPipeline:
    return StationPipeline("HARC", reference_time=start, defer=defer, slack=slack)  # type: ignore[arg-type]


def _run(chunks: list[bytes], start: object, every: int) -> tuple[list[object], StationPipeline]:
    """A slack pipeline fed a chunk per second and settled after each, its slack settled after
    every ``every``-th second (0: never, each next feed settles it)."""
    pipe = _pipe(start, slack=True)
    out: list[object] = []
    for k, data in enumerate(chunks):
        out += pipe.feed(data)
        out += pipe.settle()
        assert not pipe.unsettled()
        if every and k % every == 0:
            out += pipe.settle_slack()
            assert pipe.slack_after_s() is None
    out += pipe.feed(b"")
    out += pipe.settle_slack()
    return out, pipe


@pytest.mark.parametrize("every", [1, 3, 0])
def test_slack_pipeline_gives_the_same_outputs(chunks, every):
    """Slack settled midway after every epoch (as the daemon runs it), after some, or never:
    the plain pipeline's snapshots bit for bit, its fix reports, in the same order, and the
    same persistent state."""
    data, start = chunks
    plain = _pipe(start, slack=False, defer=False)
    ref: list[object] = []
    for chunk in data:
        ref += plain.feed(chunk)
    ref += plain.feed(b"")
    out, pipe = _run(data, start, every)
    assert sum(isinstance(x, StationSnapshot) for x in ref) >= SECONDS - 2
    _assert_same_outputs(ref, out)
    assert _same_state(plain.state_dict(), pipe.state_dict())


def test_deferring_framing_core_with_slack_gives_the_same_outputs(chunks):
    """FramingCore(defer=True) around the slack pipeline, as the daemon builds it, over reads
    cut anywhere (701 bytes): settle after every read and settle_slack after every other read
    give the plain core's outputs bit for bit and in order."""
    data, start = chunks
    stream = b"".join(data)
    reads = [stream[i : i + 701] for i in range(0, len(stream), 701)]

    def run(slack: bool) -> list[object]:
        core = FramingCore(consumer=_pipe(start, slack=slack, defer=slack), defer=slack)
        out: list[object] = []
        for k, chunk in enumerate(reads):
            out += core.feed(chunk)
            if slack:
                out += core.settle()
                if k % 2:
                    out += core.settle_slack()
        out += core.end_stream()
        out += core.settle_slack()
        return out

    _assert_same_outputs(run(False), run(True))


def test_settle_leaves_the_fit_and_the_orbits_ahead_to_settle_slack(chunks):
    """In the daemon's order (feed, settle, settle_slack) no receiver-bias fit and no orbit
    rate runs in ``feed`` or ``settle`` (past the cold start's): they run in ``settle_slack``
    (the fit's update, and a solve every receiver_bias_update_s = 30 s once arcs are long
    enough; the refresh every geometry_refresh_s = 30 s).
    ``slack_after_s`` is half the epoch interval while slack work waits (the stream is 1 Hz),
    None after ``settle_slack`` and for a pipeline without ``slack``."""
    data, start = chunks
    where = "feed"
    calls: dict[tuple[str, str], int] = {}
    fit, rate = StationEstimator._update_receiver_bias, Geometry._rate

    def count(what: str) -> None:
        calls[where, what] = calls.get((where, what), 0) + 1

    def counting_fit(self: StationEstimator, *a: object, **kw: object) -> object:
        count("fit")
        return fit(self, *a, **kw)  # type: ignore[arg-type]

    def counting_rate(*a: object) -> object:
        count("rate")
        return rate(*a)  # type: ignore[arg-type]

    waited = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(StationEstimator, "_update_receiver_bias", counting_fit)
        mp.setattr(Geometry, "_rate", staticmethod(counting_rate))
        for slack in (False, True):
            pipe = _pipe(start, slack=slack)
            for chunk in data:
                where = f"feed {slack}"
                pipe.feed(chunk)
                where = f"settle {slack}"
                pipe.settle()
                if slack:
                    waited.append(pipe.slack_after_s())
                    where = "slack"
                    pipe.settle_slack()
                    assert pipe.slack_after_s() is None
    assert calls.get(("slack", "fit"), 0) >= 100, calls
    assert calls.get(("slack", "rate"), 0) >= 7, calls
    assert calls.get(("feed True", "fit"), 0) == 0, calls
    # (at the start, before the ephemerides, a GSV after the epoch is routed as the geometry's
    # fallback: its entry, set_gsv, settles the fit first)
    assert calls.get(("settle True", "fit"), 0) <= 1, calls
    assert calls.get(("settle True", "rate"), 0) == 0, calls
    # in feed only the refreshes nothing could evaluate ahead, as without slack (the cold
    # start, a refresh whose satellites changed)
    assert calls.get(("feed True", "rate"), 0) == calls.get(("feed False", "rate"), 0) <= 3, calls
    assert set(waited) == {None, 0.5}
    assert waited.count(0.5) >= 8  # the fits and the refreshes ahead, every 30 s
    no_slack = _pipe(start, slack=False)
    for chunk in data[:40]:
        no_slack.feed(chunk)
        assert no_slack.slack_after_s() is None


def _epoch_chunks(data: bytes) -> list[bytes]:
    """A capture cut as its receiver sent it: each chunk from an epoch's first MSM frame to the
    next epoch's, so what follows an epoch (here its ephemerides and 1230) rides with it."""
    cuts, closed = [0], True
    for f in Framer().feed(data):
        if type(f) is RtcmFrame and f.msg_type in MSM_TYPES:
            if closed and f.offset > 0:
                cuts.append(f.offset)
            closed = _after_last_epoch([f]) == 1  # its multiple-message bit is 0
    cuts.append(len(data))
    return [data[a:b] for a, b in itertools.pairwise(cuts) if b > a]


def test_a_real_receivers_order_leaves_the_fits_to_settle_slack(real_data):
    """The real capture RTK134 (../shared/data/real, PROVENANCE.md) sends its ephemerides after
    each epoch's observations, so the daemon's ``settle`` routes them. A repeated ephemeris
    changes nothing and settles nothing: in steady state the fits run in ``settle_slack``
    (only a new set's satellite delays settle a pending fit first); none runs in ``feed``. The
    outputs equal the plain pipeline's in the daemon's order and when the slack is never
    settled (each next entry settles it)."""
    data = (real_data / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    ref_t = _CAPTURES["RTK134_202102051543.rtcm3"]
    chunks = _epoch_chunks(data)
    assert len(chunks) > 900
    plain = FramingCore(consumer=_pipe(ref_t, slack=False, defer=False))
    ref: list[object] = []
    for chunk in chunks:
        ref += plain.feed(chunk)
    ref += plain.end_stream()
    where, at, fits = "feed", 0, []
    fit = StationEstimator._update_receiver_bias

    def noting_fit(self: StationEstimator, *a: object, **kw: object) -> object:
        fits.append((where, at))
        return fit(self, *a, **kw)  # type: ignore[arg-type]

    for midway in (True, False):
        fits.clear()
        core = FramingCore(consumer=_pipe(ref_t, slack=True), defer=True)
        out: list[object] = []
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(StationEstimator, "_update_receiver_bias", noting_fit)
            for at, chunk in enumerate(chunks):  # noqa: B007 - noting_fit reads it
                where = "feed"
                out += core.feed(chunk)
                where = "settle"
                out += core.settle()
                if midway:
                    where = "slack"
                    out += core.settle_slack()
            out += core.end_stream()
            out += core.settle_slack()
        assert sum(isinstance(x, StationSnapshot) for x in ref) > 900
        _assert_same_outputs(ref, out)
        if midway:
            steady = [w for w, k in fits if k >= 300]  # past the first sets of ephemerides
            assert len(steady) >= 10, fits
            assert steady.count("slack") >= 0.9 * len(steady), steady
            assert all(w != "feed" for w, _ in fits), fits


def test_a_new_ephemeris_while_a_fit_waits(chunks):
    """A new broadcast set with other group delays (an invented change of T_GD, IS-GPS-200
    §20.3.3.3.3.2) while a fit waits for its slack, the fit then settled only by the next
    epoch: the plain pipeline's outputs, the new delays applied after the fit as undeferred."""
    data, start = chunks
    plain = _pipe(start, slack=False, defer=False)
    pipe = _pipe(start, slack=True)
    ref: list[object] = []
    out: list[object] = []
    injected = 0
    for k, chunk in enumerate(data):
        ref += plain.feed(chunk)
        out += pipe.feed(chunk)
        out += pipe.settle()
        if k > 150 and pipe.estimator._pending_fit is not None and injected < 3:
            gps = [e for e in pipe.estimator._last_eph.values() if hasattr(e, "tgd_s")]
            eph = dataclasses.replace(gps[injected], tgd_s=(gps[injected].tgd_s[0] + 4e-9, 0.0))
            plain.estimator.add_ephemeris(eph)
            pipe.estimator.add_ephemeris(eph)
            injected += 1
    assert injected == 3
    _assert_same_outputs(ref, out)
