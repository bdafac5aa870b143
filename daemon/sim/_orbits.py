"""Satellite positions and clocks for a block of epochs × all satellites, via ``ionwarden.daemon.geo``.

Axes: ``E`` epochs, ``S`` satellites of the constellation (``Constellation.sats`` order). A block
never straddles an ephemeris set change, so each system uses one Kepler or GLONASS batch per block.

Keplerian systems go through :func:`geo.kepler_state` on the batch repeated E times. GLONASS uses the
batch's own RK4 node table (:meth:`GlonassBatch.nodes`) with the same cubic Hermite interpolation as
:func:`geo.glonass_state`, evaluated on the whole ``(E, S)`` grid at once (tests check the two agree).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon.geo import GlonassBatch, KeplerBatch, kepler_state
from ionwarden.daemon.geo._glonass import GLONASS_STEP_S

if TYPE_CHECKING:
    import numpy.typing as npt

    from ._constellation import Constellation

__all__ = ["block_states"]

_MIN_SPAN_S = 30 * 60.0


def _glonass_grid(
    batch: GlonassBatch, t: npt.NDArray[np.float64]
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    n = len(batch)
    tb = batch.resolve_tb(np.full(n, t[0]))
    dt = t[:, None] - tb[None, :]
    need = float(np.max(np.abs(dt)))
    span_k = max(math.ceil(_MIN_SPAN_S / GLONASS_STEP_S), math.ceil(need / GLONASS_STEP_S))
    table = batch.nodes(tb, span_k)
    k = (table.shape[1] - 1) // 2
    h = GLONASS_STEP_S
    j = np.minimum(np.floor(dt / h).astype(np.intp), k - 1)
    s = ((dt - j * h) / h)[..., None]
    rows = np.arange(n)[None, :]
    a = table[rows, j + k]
    b = table[rows, j + k + 1]
    s2 = s * s
    s3 = s2 * s
    pos = (
        (2.0 * s3 - 3.0 * s2 + 1.0) * a[..., :3]
        + (h * (s3 - 2.0 * s2 + s)) * a[..., 3:]
        + (3.0 * s2 - 2.0 * s3) * b[..., :3]
        + (h * (s3 - s2)) * b[..., 3:]
    )
    vel = (
        ((6.0 * s2 - 6.0 * s) / h) * (a[..., :3] - b[..., :3])
        + (3.0 * s2 - 4.0 * s + 1.0) * a[..., 3:]
        + (3.0 * s2 - 2.0 * s) * b[..., 3:]
    )
    clock = -batch.tau_n_s[None, :] + batch.gamma_n[None, :] * dt
    return pos, vel, clock


def _kepler_grid(
    batch: KeplerBatch, t: npt.NDArray[np.float64]
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    e = t.shape[0]
    n = len(batch)
    rep = batch.take(np.tile(np.arange(n), e))
    pos, vel, clock = kepler_state(rep, np.repeat(t, n))
    return pos.reshape(e, n, 3), vel.reshape(e, n, 3), clock.reshape(e, n)


def block_states(
    const: Constellation, t_gps_s: npt.NDArray[np.float64]
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """ECEF position (E, S, 3) m, velocity (E, S, 3) m/s, clock offset (E, S) s at GPS times
    ``t_gps_s`` (E,) — all within one ephemeris set of every system."""
    e = t_gps_s.shape[0]
    s_all = const.sats.shape[0]
    pos = np.empty((e, s_all, 3))
    vel = np.empty((e, s_all, 3))
    clk = np.empty((e, s_all))
    col = 0
    for series in const.series.values():
        k = series.set_index(float(t_gps_s[0]))
        assert series.set_index(float(t_gps_s[-1])) == k, "block straddles an ephemeris change"
        batch = series.batches[k]
        n = len(batch)
        if isinstance(batch, GlonassBatch):
            p, v, c = _glonass_grid(batch, t_gps_s)
        else:
            p, v, c = _kepler_grid(batch, t_gps_s)
        pos[:, col : col + n] = p
        vel[:, col : col + n] = v
        clk[:, col : col + n] = c
        col += n
    return pos, vel, clk
