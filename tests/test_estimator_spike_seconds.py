"""The seconds that cost more than others, made like the others without changing a figure.

Every 10 s a receiver repeats its RTCM 1005/1006 station reference, every 30 s the orbit
geometry is refreshed and the receiver bias refitted. Those seconds used to cost each station's
urgent step more (issue 8: with 20 synchronised stations they set the latency tail), because:

* a repeated, unchanged position bumped the geometry's version, which rebuilt its cache;
* the refresh computed its extrapolation rates in the urgent step;
* the epoch after a fit computed the new bias correction in its urgent step.

Now an unchanged position changes nothing, the rates are computed with the orbit rows ahead
(``Geometry.prefetch``) and the correction right after the fit (``StationEstimator.settle``),
each from the inputs the urgent step would use, so the figures are the same bit for bit
(``tests/test_pipeline_settle.py`` and ``tests/test_estimator_urgent_cuts.py``' golden digests
check them; here that each shortcut is taken). Input: the simulator's invented scenarios.
"""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationPipeline
from ionwarden.daemon.estimator._biases import BiasModel
from ionwarden.daemon.estimator._estimator import StationEstimator
from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.daemon.sim._constellation import build_constellation
from ionwarden.parsers import KeplerEphemeris

from .test_estimator_station_shortcuts import RX, T0, _geometry
from .test_pipeline_settle import _assert_same_outputs

SECONDS = 260


def test_an_unchanged_position_changes_nothing():
    """The same position from the same source again keeps the geometry's version (its cache);
    another source or another position is a change."""
    g = Geometry(400, 30.0, shell_m=350e3)
    g.set_receiver_position(RX, "rtcm")
    v = g.version
    g.set_receiver_position(np.array(RX, copy=True), "rtcm")
    assert g.version == v
    g.set_receiver_position(RX, "config")
    assert g.version == v + 1
    assert g.rx_source == "config"
    g.set_receiver_position(RX + np.array([0.0, 0.0, 0.001]), "config")
    assert g.version == v + 2


def test_refresh_takes_the_rates_computed_ahead():
    """A prefetched refresh stores the rates computed with the rows ahead (no rate computed in
    the lookup) and looks up the same rows, bit for bit, as a geometry without prefetch."""
    cons = build_constellation("GER", 7, T0 - 3600.0, T0 + 3600.0)
    ephs = [e for s in cons.series.values() for group in s.ephemerides for e in group]
    ephs = [e for e in ephs if not isinstance(e, KeplerEphemeris)
            or abs(e.week * 604800.0 + e.toe_s - T0) < 7200.0]  # fmt: skip
    fast, slow = _geometry(ephs), _geometry(ephs)
    sats = np.asarray(cons.sats, np.intp)
    sats.setflags(write=False)
    in_lookup = rated = ahead = 0
    rate = Geometry._rate

    def counting(new: np.ndarray, old: np.ndarray, span: np.ndarray) -> np.ndarray:
        nonlocal rated
        rated += in_lookup
        return rate(new, old, span)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(Geometry, "_rate", staticmethod(counting))
        for k in range(300):
            t = T0 + k
            in_lookup = 1
            a, sa = fast.lookup(sats, t)
            in_lookup = 0
            b, sb = slow.lookup(sats, t)
            assert sa == sb, k
            assert a.tobytes() == b.tobytes(), k
            if fast.refresh_due(sats, t + 1.0):  # as the estimator's settle after epoch t
                fast.prefetch(sats, t + 1.0)
                ahead += fast._ahead is not None and fast._ahead[6] is not None
    assert ahead >= 8  # refreshes every 30 s, the first (cold) one computed in the lookup
    assert rated <= 2  # the cold start only


def _urgent_corrections(chunks: list[bytes], start: object, *, renew: bool) -> tuple[int, list]:
    """Calls of ``BiasModel.correction`` in the urgent steps of a deferred pipeline fed a chunk
    per second and settled after each (as the daemon runs it), and its outputs."""
    calls = 0
    urgent = False
    correction = BiasModel.correction

    def counting(self: BiasModel, *args: object, **kw: object) -> object:
        nonlocal calls
        calls += urgent
        return correction(self, *args, **kw)  # type: ignore[arg-type]

    out: list[object] = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(BiasModel, "correction", counting)
        if not renew:
            mp.setattr(StationEstimator, "_renew_bias_cache", lambda self: None)
        pipe = StationPipeline("HARC", reference_time=start, defer=True)  # type: ignore[arg-type]
        for data in chunks:
            urgent = True
            out += pipe.feed(data)
            urgent = False
            out += pipe.settle()
    return calls, out


def test_the_correction_after_a_fit_is_computed_in_settle():
    """After each receiver-bias fit the next epoch's correction comes from the settle, not from
    its urgent step; the outputs are those of computing it in the urgent step."""
    sc = build_scenario("quiet-day", duration_s=float(SECONDS))
    chunks = [data for _, data in iter_stream(Simulator(sc), 0)]
    renewed, out = _urgent_corrections(chunks, sc.start, renew=True)
    urgent, ref = _urgent_corrections(chunks, sc.start, renew=False)
    _assert_same_outputs(out, ref)
    # fits every receiver_bias_update_s (30 s) once arcs are long enough: several in 260 s
    assert urgent - renewed >= 4, (urgent, renewed)
