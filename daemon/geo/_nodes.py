"""Exact orbit states on a fixed time grid, for cheap per-epoch interpolation.

:func:`satellite_geometry` is called every epoch for the same satellites with slowly advancing t.
Instead of running the full broadcast model per epoch, the exact states (``kepler_state`` /
``glonass_state``) are computed at grid nodes t = j·h (h = 30 s of continuous GPS time) and cubic
Hermite interpolation of position and velocity (linear for the clock) fills the gap.

The result is a pure function of the ephemerides and t: the grid is fixed, so it never depends on
which epochs were asked before. Interpolation error against the exact model (h⁴/384·|x⁗| for
position): 0.11 mm, 1.1e-5 m/s and 3e-13 s at most in tests/test_geo_geometry.py (GPS, a
GLONASS row and an e = 0.16 Galileo row), far under broadcast orbit errors (~1 m).

Axes: ``m`` request rows (the selection's satellites, NaN rows where no ephemeris is usable).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ._glonass import glonass_state
from ._hermite import hermite_matrix
from ._kepler import kepler_state

if TYPE_CHECKING:
    from ._glonass import GlonassBatch
    from ._kepler import KeplerBatch

__all__ = ["NODE_STEP_S", "OrbitNodes"]

F64 = npt.NDArray[np.float64]
#: Grid step (s). Halving it divides the interpolation error by 16 and doubles the node rate.
NODE_STEP_S = 30.0
#: Grid nodes kept (a little more than the two that bracket t, for jitter around a node).
_KEEP_NODES = 4
_NAN_ROW = np.full((1, 3), np.nan)
#: (position, velocity, clock) of no satellite: what the state functions give an empty batch.
_EMPTY_STATE = (np.empty((0, 3)), np.empty((0, 3)), np.empty(0))


_HERMITE = hermite_matrix(NODE_STEP_S)


class OrbitNodes:
    """Exact states at grid nodes for one selection, and the interpolation between them.

    A mutable cache owned by one :class:`EphemerisSelection` (whose batches never change)."""

    __slots__ = ("_nodes", "_pairs")

    def __init__(self) -> None:
        self._nodes: dict[int, tuple[F64, F64, F64]] = {}
        self._pairs: dict[int, tuple[F64, F64, F64]] = {}

    def interpolate(
        self,
        t_s: F64,
        t_ref_s: float,
        kepler: KeplerBatch,
        glonass: GlonassBatch,
        gather_index: npt.NDArray[np.intp] | None,
    ) -> tuple[F64, F64, F64]:
        """Position (m, 3), velocity (m, 3), clock (m,) at times ``t_s`` (m,), all within about a
        second of ``t_ref_s`` (which picks the grid cell). ``gather_index`` maps request rows into
        [Keplerian rows, GLONASS rows, NaN row]; None when every row is Keplerian, in order."""
        j = int(np.floor(t_ref_s / NODE_STEP_S))
        pair = self._pairs.get(j)
        if pair is None:
            pa, va, ca = self._node(j, kepler, glonass, gather_index)
            pb, vb, cb = self._node(j + 1, kepler, glonass, gather_index)
            pair = (np.stack((pa, va, pb, vb), axis=1), ca, cb - ca)
            _put(self._pairs, j, pair, 2)
        nodes, clk_a, clk_step = pair
        m = nodes.shape[0]
        s = (t_s - j * NODE_STEP_S) / NODE_STEP_S
        s2 = s * s
        weights = (np.stack((np.ones_like(s), s, s2, s2 * s), axis=1) @ _HERMITE).reshape(m, 2, 4)
        out = weights @ nodes
        return out[:, 0], out[:, 1], clk_a + s * clk_step

    def _node(
        self,
        j: int,
        kepler: KeplerBatch,
        glonass: GlonassBatch,
        gather_index: npt.NDArray[np.intp] | None,
    ) -> tuple[F64, F64, F64]:
        node = self._nodes.get(j)
        if node is None:
            t = j * NODE_STEP_S
            if gather_index is None:
                node = kepler_state(kepler, t)
            else:  # an empty batch's state costs its ~40 numpy calls: skip it
                pk, vk, ck = kepler_state(kepler, t) if len(kepler) else _EMPTY_STATE
                pg, vg, cg = glonass_state(glonass, t) if len(glonass) else _EMPTY_STATE
                node = (
                    np.concatenate((pk, pg, _NAN_ROW))[gather_index],
                    np.concatenate((vk, vg, _NAN_ROW))[gather_index],
                    np.concatenate((ck, cg, _NAN_ROW[0, :1]))[gather_index],
                )
            _put(self._nodes, j, node, _KEEP_NODES)
        return node


def _put(
    cache: dict[int, tuple[F64, F64, F64]], key: int, value: tuple[F64, F64, F64], keep: int
) -> None:
    cache[key] = value
    while len(cache) > keep:
        del cache[next(iter(cache))]
