"""GLONASS node table: lazy span, growth from the ends and the stacked forward/backward RK4 step give
exactly the nodes of plain RK4 steps from t_b (the definition, GLONASS ICD Ed. 5.1 §A.3.1.2)."""

from __future__ import annotations

import numpy as np

from ionwarden.daemon.geo import GlonassBatch, _glonass, glonass_state
from ionwarden.daemon.geo._glonass import GLONASS_STEP_S, rk4_propagate

from .test_geo_glonass import TB_GPS_S, _eph


def _batch() -> GlonassBatch:
    # ICD example state (from memory, see test_geo_glonass) on three satellites with other t_b
    return GlonassBatch.from_ephemerides(
        [_eph(), _eph(sat=106, tb_s=11700.0 - 900.0), _eph(sat=107, vz_mps=1200.0)]
    )


def _plain_nodes(batch: GlonassBatch, k: int) -> np.ndarray:
    """Oracle: node ±j = j single RK4 steps of ±h from the t_b state, one direction at a time."""
    n = len(batch)
    table = np.empty((n, 2 * k + 1, 6))
    table[:, k] = batch.state0
    for sign in (1.0, -1.0):
        s = batch.state0
        for j in range(1, k + 1):
            s = rk4_propagate(s, batch.acc_ls, np.full(n, sign * GLONASS_STEP_S), 1)
            table[:, k + int(sign) * j] = s
    return table


def test_nodes_equal_plain_rk4_steps_bitwise() -> None:
    """A fresh table equals the one-direction-at-a-time RK4 nodes bit for bit."""
    batch = _batch()
    tb = batch.resolve_tb(np.full(3, TB_GPS_S))
    table = batch.nodes(tb, 12)
    np.testing.assert_array_equal(table, _plain_nodes(batch, 12))


def test_nodes_grow_from_the_ends_bitwise() -> None:
    """Growing 3 → 9 (+2 headroom) → 40 gives the nodes of a table built at once."""
    batch = _batch()
    tb = batch.resolve_tb(np.full(3, TB_GPS_S))
    assert batch.nodes(tb, 3).shape[1] == 7
    assert batch.nodes(tb, 2).shape[1] == 7  # no shrink, no rebuild
    assert batch.nodes(tb, 9, 2).shape[1] == 23
    table = batch.nodes(tb, 40)
    np.testing.assert_array_equal(table, _plain_nodes(batch, 40))


def test_glonass_state_builds_only_the_span_it_needs() -> None:
    """Requests up to 25 min from t_b integrate 25 + 1 + 5 nodes each way (headroom 5), not more."""
    batch = _batch()
    glonass_state(batch, TB_GPS_S + 600.0)
    tb = batch.resolve_tb(np.full(3, TB_GPS_S + 600.0))
    # farthest |t − t_b| is 1500 s (sat 106): floor(1500/60) + 1 + 5 headroom
    assert batch.nodes(tb, 0).shape[1] == 2 * 31 + 1
    a = glonass_state(batch, TB_GPS_S + 3000.0)  # grows
    b = glonass_state(GlonassBatch.from_ephemerides([_eph()]), TB_GPS_S + 3000.0)
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x[:1], y)


def test_rows_shared_between_batches_bitwise(monkeypatch) -> None:
    """A batch that holds a row another batch of the process integrated copies it (no RK4 for that
    row) and its table still equals plain RK4 steps from t_b bit for bit (GLONASS ICD Ed. 5.1
    §A.3.1.2 integration, the oracle above)."""
    monkeypatch.setattr(_glonass, "_ROW_CACHE", {})
    first = GlonassBatch.from_ephemerides([_eph(), _eph(sat=106, tb_s=11700.0 - 900.0)])
    tb2 = first.resolve_tb(np.full(2, TB_GPS_S))
    first.nodes(tb2, 12)
    # Another station's batch: the same two ephemerides plus a new one.
    second = _batch()
    integrated: list[int] = []
    real = _glonass.rk4_propagate

    def counting(state, acc, step, steps):  # type: ignore[no-untyped-def]
        integrated.append(state.shape[0])
        return real(state, acc, step, steps)

    monkeypatch.setattr(_glonass, "rk4_propagate", counting)
    tb3 = second.resolve_tb(np.full(3, TB_GPS_S))
    table = second.nodes(tb3, 9)
    assert integrated
    assert set(integrated) == {2}  # only the new row, forward and backward
    np.testing.assert_array_equal(table, _plain_nodes(second, 9))


def test_row_cache_is_bounded(monkeypatch) -> None:
    """The process-wide row cache keeps at most _ROW_CACHE_MAX rows (oldest leave first)."""
    monkeypatch.setattr(_glonass, "_ROW_CACHE", {})
    monkeypatch.setattr(_glonass, "_ROW_CACHE_MAX", 4)
    for i in range(6):
        b = GlonassBatch.from_ephemerides([_eph(vz_mps=1000.0 + i)])
        b.nodes(b.resolve_tb(np.full(1, TB_GPS_S)), 2)
    assert len(_glonass._ROW_CACHE) == 4
