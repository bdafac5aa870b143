"""When the geometry re-evaluates orbits: never in the epoch a new ephemeris arrives with, so
that a station's deferred step evaluates them ahead (``daemon/estimator/_geometry.py``).

What is checked is our own rule (module doc there), counted as calls of ``Geometry._evaluate``;
the rows themselves are compared with a twin geometry, bit for bit. Inputs: our invented
constellation (``daemon.sim`` ephemerides) over an invented site.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest

from ionwarden.daemon.estimator._geometry import Geometry
from ionwarden.daemon.sim._constellation import build_constellation
from ionwarden.parsers import KeplerEphemeris
from tests.test_estimator_station_shortcuts import T0
from tests.test_estimator_station_shortcuts import _geometry as _shortcuts_geometry

#: The refresh interval of the shortcuts tests' geometry (``Geometry(400, 30.0, …)``).
REFRESH_S = 30.0


@pytest.fixture(scope="module")
def sets() -> tuple[np.ndarray, dict[int, KeplerEphemeris]]:
    """Visible GPS and Galileo satellites and one broadcast set each (the one nearest T0)."""
    cons = build_constellation("GE", 7, T0 - 3600.0, T0 + 3600.0)
    best: dict[int, KeplerEphemeris] = {}
    for s in cons.series.values():
        for group in s.ephemerides:
            for e in group:
                assert isinstance(e, KeplerEphemeris)
                age = abs(e.week * 604800.0 + e.toe_s - T0)
                if e.sat not in best or age < abs(
                    best[e.sat].week * 604800.0 + best[e.sat].toe_s - T0
                ):
                    best[e.sat] = e
    g = _geometry(best.values())
    rows, _ = g.lookup(np.array(sorted(best), np.intp), T0)
    up = np.array(sorted(best), np.intp)[rows[0] > 0.0]  # above the horizon at T0
    assert up.shape[0] >= 6
    return up, {int(s): best[int(s)] for s in up}


def _geometry(ephs: Any) -> Geometry:
    """The shortcuts tests' geometry (invented site, ephemerides added at T0)."""
    g = _shortcuts_geometry(list(ephs))
    assert g.refresh_s == REFRESH_S
    return g


def _ro(a: np.ndarray) -> np.ndarray:
    a = a.copy()
    a.setflags(write=False)  # as the estimator's layouts hand them over
    return a


@pytest.fixture
def evaluations(monkeypatch: pytest.MonkeyPatch) -> list[tuple[int, float]]:
    """(id of the geometry, time) of every orbit evaluation."""
    seen: list[tuple[int, float]] = []
    evaluate = Geometry._evaluate

    def counting(self: Geometry, sats: Any, t_s: float) -> Any:
        seen.append((id(self), t_s))
        return evaluate(self, sats, t_s)

    monkeypatch.setattr(Geometry, "_evaluate", counting)
    return seen


def _newer(e: KeplerEphemeris, dt_s: float) -> KeplerEphemeris:
    """Another set of the same satellite (a later time of ephemeris; the same orbit elements)."""
    return dataclasses.replace(e, toe_s=e.toe_s + dt_s)


def test_a_new_set_for_a_satellite_with_rows_waits_for_its_next_refresh(sets, evaluations):
    """A new set of a satellite that has rows evaluates nothing in the epoch it arrives with:
    the rows are those of a twin that never got it, bit for bit, until the next refresh."""
    up, ephs = sets
    sats = _ro(up)
    g, twin = _geometry(ephs.values()), _geometry(ephs.values())
    first = int(up[0])
    for k in range(40):
        t = T0 + k
        if k == 5:
            g.add_ephemeris(_newer(ephs[first], 16.0), t)
        n = len(evaluations)
        a, _ = g.lookup(sats, t)
        b, _ = twin.lookup(sats, t)
        mine = [x for x in evaluations[n:] if x[0] == id(g)]
        if k == 0:
            assert mine  # start-up: evaluated at once
        elif k < REFRESH_S + 1:
            assert not mine, k
            assert a.tobytes() == b.tobytes(), k
    # the regular refresh (age > REFRESH_S at T0 + 31) came in a quiet epoch and used the new set
    assert any(i == id(g) and t == T0 + REFRESH_S + 1 for i, t in evaluations)


def test_a_satellite_without_rows_gets_them_at_the_next_quiet_epoch_evaluated_ahead(
    sets, evaluations
):
    """A satellite refreshed without an orbit gets rows once its set arrives: not in that epoch,
    but in the next one before which nothing was stored, from rows the deferred step evaluated
    ahead (its rate from a second evaluation, not 0); equal bit for bit to a twin that
    evaluates them itself."""
    up, ephs = sets
    sats = _ro(up)
    late = int(up[1])
    others = [e for s, e in ephs.items() if s != late]
    g, twin = _geometry(others), _geometry(others)
    col = int(np.flatnonzero(up == late)[0])
    for k in range(12):
        t = T0 + k
        if k == 10:
            for x in (g, twin):
                x.add_ephemeris(ephs[late], t)
        if k == 11:
            assert g.refresh_due(sats, t)
            g.prefetch(sats, t)  # the station's deferred step after epoch 10
        n = len(evaluations)
        a, _ = g.lookup(sats, t)
        b, _ = twin.lookup(sats, t)
        mine = [x for x in evaluations[n:] if x[0] == id(g)]
        theirs = [x for x in evaluations[n:] if x[0] == id(twin)]
        assert a.tobytes() == b.tobytes(), k
        if 1 <= k <= 10:
            assert not mine, k
            assert not theirs, k
            assert np.isnan(a[0, col]), k  # no orbit for it yet
        if k == 11:
            assert not mine  # evaluated ahead
            assert len(theirs) == 2  # the rows, and a second evaluation for the cold satellite
            assert np.isfinite(a[0, col])
            assert g.rate[0, late] != 0.0
            assert g.rate[:, late].tobytes() == twin.rate[:, late].tobytes()


def test_a_refresh_due_while_sets_arrive_waits_twice_refresh_s_at_most(sets, evaluations):
    """While a new set arrives before every epoch, the refresh due at T0 + 31 s waits; once the
    rows are 2 × refresh_s old it runs anyway (T0 + 61 s), and the rows in between stay finite."""
    up, ephs = sets
    sats = _ro(up)
    g = _geometry(ephs.values())
    first = int(up[0])
    at: list[int] = []
    for k in range(75):
        t = T0 + k
        if 25 <= k < 70:
            g.add_ephemeris(_newer(ephs[first], float(k)), t)
        n = len(evaluations)
        a, _ = g.lookup(sats, t)
        if [x for x in evaluations[n:] if x[0] == id(g)]:
            at.append(k)
        assert np.isfinite(a).all(), k
    assert at == [0, 2 * int(REFRESH_S) + 1]
