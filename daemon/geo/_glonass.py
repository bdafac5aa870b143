"""GLONASS broadcast orbits: the PZ-90 state vector at t_b integrated to the requested time.

GLONASS ICD Ed. 5.1 §A.3.1.2: the equations of motion in the Earth-fixed PZ-90 frame with the
central term, the J2 zonal term, the centrifugal and Coriolis terms and the broadcast lunisolar
accelerations (constant over the interval), integrated by 4th-order Runge–Kutta. PZ-90.11 is treated
as WGS 84: the frames agree to a few centimetres, far below broadcast orbit errors.

Axes: ``n`` satellites along the leading axis; state rows are (x, y, z, vx, vy, vz) in m and m/s.

Integration is done once per batch on a fixed grid of nodes t_b + k·h (h = 60 s, RK4 on (n, 6)
arrays, forward and backward from t_b), and each request is answered by cubic Hermite interpolation
of position and velocity between the two bracketing nodes. The result is a pure function of the
ephemeris and t (the grid never depends on earlier calls), so the estimator and the simulator get
identical positions; against a 1 s-step integration the error is below 2 mm and 2e-5 m/s up to
1 h from t_b (see tests/test_geo_glonass.py).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import GlonassEphemeris, GpsTime, gps_to_utc, leap_seconds_at

from ._constants import GLO_AE_M, GLO_J20, GLO_MU_M3PS2, GLO_OMEGA_E_RADPS
from ._hermite import hermite_matrix

if TYPE_CHECKING:
    from collections.abc import Sequence

__all__ = [
    "GLONASS_STEP_S",
    "MAX_GLONASS_PROPAGATION_S",
    "GlonassBatch",
    "glonass_derivative",
    "glonass_state",
    "resolve_glonass_tb",
    "rk4_propagate",
]

F64 = npt.NDArray[np.float64]
#: RK4 step and node spacing (s); the ICD example integrates with steps of this order.
GLONASS_STEP_S = 60.0
#: Nodes added beyond the farthest request when the table is built or grows (±5 min of headroom:
#: the table then grows about once per 5 min of use instead of every minute).
_GROW_SPAN_K = 5
#: Beyond this distance from t_b the result is NaN: a broadcast GLONASS orbit is meant for about
#: ±15 min (SCIENCE.md §6) and is worthless after a few hours.
MAX_GLONASS_PROPAGATION_S = 4 * 3600.0
_DAY_S = 86_400.0
#: The leap-second count is looked up again once t has moved by more than this (s).
_SHIFT_REUSE_S = 600.0
_HALF_DAY_S = 43_200.0
#: GLONASS time = UTC(SU) + 3 h (GLONASS ICD Ed. 5.1 §3.3.3).
_MOSCOW_OFFSET_S = 10_800.0


def glonass_derivative(state: F64, acc_ls: F64) -> F64:
    """d(state)/dt (n, 6) per GLONASS ICD Ed. 5.1 §A.3.1.2 (PZ-90 rotating frame)."""
    x = state[:, 0]
    y = state[:, 1]
    z = state[:, 2]
    vx = state[:, 3]
    vy = state[:, 4]
    r2 = x * x + y * y + z * z
    r = np.sqrt(r2)
    mu_r3 = GLO_MU_M3PS2 / (r2 * r)
    j2 = 1.5 * GLO_J20 * GLO_MU_M3PS2 * GLO_AE_M**2 / (r2 * r2 * r)
    z2_r2 = 5.0 * z * z / r2
    w2 = GLO_OMEGA_E_RADPS**2
    w = GLO_OMEGA_E_RADPS
    out = np.empty_like(state)
    out[:, 0:3] = state[:, 3:6]
    common = -mu_r3 - j2 * (1.0 - z2_r2)
    out[:, 3] = (common + w2) * x + 2.0 * w * vy + acc_ls[:, 0]
    out[:, 4] = (common + w2) * y - 2.0 * w * vx + acc_ls[:, 1]
    out[:, 5] = (-mu_r3 - j2 * (3.0 - z2_r2)) * z + acc_ls[:, 2]
    return out


def rk4_propagate(state: F64, acc_ls: F64, dt_s: F64, steps: int) -> F64:
    """Classical RK4 from ``state`` (n, 6) over ``dt_s`` (n,) in ``steps`` equal steps."""
    h = (np.asarray(dt_s, dtype=np.float64) / steps)[:, None]
    s = np.array(state, dtype=np.float64, copy=True)
    for _ in range(steps):
        k1 = glonass_derivative(s, acc_ls)
        k2 = glonass_derivative(s + 0.5 * h * k1, acc_ls)
        k3 = glonass_derivative(s + 0.5 * h * k2, acc_ls)
        k4 = glonass_derivative(s + h * k3, acc_ls)
        s = s + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
    return s


def _day_shift(t_gps_s: float) -> float:
    """GPS seconds between a GLONASS-day start and a multiple of 86 400 s: GPS − UTC (leap
    seconds in force) minus the 3 h of UTC(SU) + 3 h."""
    utc = gps_to_utc(GpsTime.from_total(max(t_gps_s, 0.0)))
    return float(leap_seconds_at(utc)) - _MOSCOW_OFFSET_S


def resolve_glonass_tb(tb_s: float, t_gps_s: float) -> float:
    """t_b (GLONASS time of day, s) as continuous GPS seconds: the GLONASS day containing t, moved
    by ±1 day so that |t − t_b| ≤ 12 h. GLONASS time = UTC(SU) + 3 h (GLONASS ICD Ed. 5.1 §3.3.3);
    GPS − UTC from the leap-second table. Built from whole seconds so repeated calls agree exactly.
    """
    shift = _day_shift(t_gps_s)
    ref = math.floor((t_gps_s - shift) / _DAY_S) * _DAY_S + shift + tb_s
    if ref - t_gps_s > _HALF_DAY_S:
        return ref - _DAY_S
    if t_gps_s - ref > _HALF_DAY_S:
        return ref + _DAY_S
    return ref


class GlonassBatch:
    """Structure of arrays over n GLONASS ephemerides, plus the cached RK4 node table.

    ``tb_s``: t_b as GLONASS time of day; ``state0``: (n, 6) PZ-90 state at t_b; ``acc_ls``:
    (n, 3) broadcast lunisolar accelerations; ``tau_n_s``, ``gamma_n``: clock terms.
    """

    __slots__ = (
        "_nodes",
        "_shift",
        "_shift_at_s",
        "_span_k",
        "_tb_gps_s",
        "acc_ls",
        "channel",
        "gamma_n",
        "sat",
        "state0",
        "tau_n_s",
        "tb_s",
    )

    def __init__(
        self,
        *,
        sat: npt.NDArray[np.int16],
        channel: npt.NDArray[np.int8],
        tb_s: F64,
        state0: F64,
        acc_ls: F64,
        tau_n_s: F64,
        gamma_n: F64,
    ) -> None:
        n = sat.shape[0]
        assert state0.shape == (n, 6), state0.shape
        assert acc_ls.shape == (n, 3), acc_ls.shape
        self.sat = sat
        self.channel = channel
        self.tb_s = tb_s
        self.state0 = state0
        self.acc_ls = acc_ls
        self.tau_n_s = tau_n_s
        self.gamma_n = gamma_n
        self._tb_gps_s: F64 | None = None
        self._nodes: F64 = np.empty((n, 0, 6))
        self._span_k = 0
        self._shift = 0.0
        self._shift_at_s = -math.inf

    def __len__(self) -> int:
        return int(self.sat.shape[0])

    @classmethod
    def from_ephemerides(cls, ephemerides: Sequence[GlonassEphemeris]) -> GlonassBatch:
        n = len(ephemerides)

        def col(name: str) -> F64:
            return np.fromiter(
                (float(getattr(e, name)) for e in ephemerides), dtype=np.float64, count=n
            )

        state0 = np.stack(
            [col(k) for k in ("x_m", "y_m", "z_m", "vx_mps", "vy_mps", "vz_mps")], axis=-1
        ).reshape(n, 6)
        acc = np.stack([col(k) for k in ("ax_mps2", "ay_mps2", "az_mps2")], axis=-1).reshape(n, 3)
        return cls(
            sat=np.fromiter((e.sat for e in ephemerides), dtype=np.int16, count=n),
            channel=np.fromiter((e.channel for e in ephemerides), dtype=np.int8, count=n),
            tb_s=col("tb_s"),
            state0=state0,
            acc_ls=acc,
            tau_n_s=col("tau_n_s"),
            gamma_n=col("gamma_n"),
        )

    def resolve_tb(self, t_gps_s: F64) -> F64:
        """t_b of every row as continuous GPS seconds, resolved against t (see
        :func:`resolve_glonass_tb`). The leap-second count is looked up at the latest t and reused
        while t stays within 10 min (GPS − UTC has not changed since 2017)."""
        t_ref = float(np.nanmax(t_gps_s, initial=0.0))
        if abs(t_ref - self._shift_at_s) > _SHIFT_REUSE_S:
            self._shift = _day_shift(t_ref)
            self._shift_at_s = t_ref
        shift = self._shift
        day_start = np.floor((t_gps_s - shift) / _DAY_S) * _DAY_S + shift
        tb = day_start + self.tb_s
        tb = np.where(tb - t_gps_s > _HALF_DAY_S, tb - _DAY_S, tb)
        return np.where(t_gps_s - tb > _HALF_DAY_S, tb + _DAY_S, tb)

    def nodes(self, tb_gps_s: F64, span_k: int, grow_k: int = 0) -> F64:
        """Node table (n, 2K+1, 6), K ≥ ``span_k``: the RK4 state at t_b + (k − K)·h. Built anew
        when t_b moves to another day; when only the span must grow, the table is extended from
        its ends (the same steps from t_b, so the same values), to ``span_k + grow_k``. Rows
        another batch of this process already integrated far enough (every station of a daemon
        receives the same ephemerides) are copied from the shared row cache, not integrated."""
        same_tb = self._tb_gps_s is not None and np.array_equal(self._tb_gps_s, tb_gps_s)
        if same_tb and span_k <= self._span_k:
            return self._nodes
        k0 = self._span_k if same_tb else 0
        k = max(span_k + grow_k, k0)
        n = len(self)
        table = np.empty((n, 2 * k + 1, 6), dtype=np.float64)
        keys = [self.state0[i].tobytes() + self.acc_ls[i].tobytes() for i in range(n)]
        todo: list[int] = []
        for i, key in enumerate(keys):
            hit = _ROW_CACHE.get(key)
            if hit is not None and hit[0] >= k:
                table[i] = hit[1][hit[0] - k : hit[0] + k + 1]
            else:
                todo.append(i)
        if todo:
            rows = np.asarray(todo, dtype=np.intp)
            part = np.empty((rows.shape[0], 2 * k + 1, 6), dtype=np.float64)
            if k0:
                part[:, k - k0 : k + k0 + 1] = self._nodes[rows]
            else:
                part[:, k] = self.state0[rows]
            _integrate(part, self.acc_ls[rows], k0, k)
            table[rows] = part
            for j, i in enumerate(todo):
                _cache_row(keys[i], k, part[j])
        self._nodes = table
        self._span_k = k
        self._tb_gps_s = np.array(tb_gps_s, copy=True)
        return table


#: Node rows shared by every GLONASS batch of the process, keyed by the row's state at t_b and
#: lunisolar accelerations (the nodes depend on nothing else): (K, (2K+1, 6) nodes). The rows of
#: a table are independent (elementwise IEEE operations), so a row integrated in one batch is
#: bit for bit the row any other batch would integrate. Bounded: oldest rows leave first.
_ROW_CACHE: dict[bytes, tuple[int, F64]] = {}
_ROW_CACHE_MAX = 128


def _cache_row(key: bytes, k: int, row: F64) -> None:
    old = _ROW_CACHE.pop(key, None)
    if old is not None and old[0] >= k:
        _ROW_CACHE[key] = old
        return
    _ROW_CACHE[key] = (k, row.copy())
    while len(_ROW_CACHE) > _ROW_CACHE_MAX:
        del _ROW_CACHE[next(iter(_ROW_CACHE))]


def _integrate(table: F64, acc_ls: F64, k0: int, k: int) -> None:
    """Fill nodes k0+1 … k each way of ``table`` (n, 2k+1, 6) from its nodes ±k0 (k0 = 0: the
    t_b state in the middle column)."""
    n = table.shape[0]
    # Forward and backward rows in one (2n, 6) RK4 step: elementwise IEEE operations (+ − × ÷
    # and sqrt, all correctly rounded), so each row's values do not depend on the batch.
    state = np.concatenate((table[:, k + k0], table[:, k - k0]))
    acc = np.concatenate((acc_ls, acc_ls))
    step = np.concatenate((np.full(n, GLONASS_STEP_S), np.full(n, -GLONASS_STEP_S)))
    for j in range(k0 + 1, k + 1):
        state = rk4_propagate(state, acc, step, 1)
        table[:, k + j] = state[:n]
        table[:, k - j] = state[n:]


_HERMITE_T = hermite_matrix(GLONASS_STEP_S)  # (4, 8)


def glonass_state(batch: GlonassBatch, t_gps_s: npt.ArrayLike) -> tuple[F64, F64, F64]:
    """ECEF (PZ-90 ≈ WGS 84) position (n, 3) m, velocity (n, 3) m/s and clock offset (n,) s
    (−τ_n + γ_n·(t − t_b), GLONASS ICD Ed. 5.1 §3.3.3 relation; GLONASS-to-GPS system time offset
    not applied) at GPS time ``t_gps_s`` (scalar or (n,)). NaN beyond ±4 h from t_b."""
    n = len(batch)
    t = np.array(np.broadcast_to(np.asarray(t_gps_s, dtype=np.float64), (n,)))
    tb = batch.resolve_tb(t)
    dt = t - tb
    need = float(np.max(np.abs(dt), initial=0.0)) if n else 0.0
    valid = None
    if not need <= MAX_GLONASS_PROPAGATION_S:  # also true for NaN
        valid = np.abs(dt) <= MAX_GLONASS_PROPAGATION_S
        dt = np.where(valid, dt, 0.0)
        need = float(np.max(np.abs(dt), initial=0.0))
    # Nodes up to the one past the farthest request (then j below is never clamped), plus room to
    # grow: a fresh batch (every new GLONASS ephemeris) integrates only what is used.
    table = batch.nodes(tb, math.floor(need / GLONASS_STEP_S) + 1, _GROW_SPAN_K)
    k = (table.shape[1] - 1) // 2
    h = GLONASS_STEP_S
    j = np.minimum(np.floor(dt / h), k - 1)
    s = dt / h - j
    s2 = s * s
    powers = np.stack((np.ones_like(s), s, s2, s2 * s), axis=1)  # (n, 4)
    weights = (powers @ _HERMITE_T).reshape(n, 2, 4)
    col = j.astype(np.intp) + k
    # (n, 2, 6) rows: node a, node b → (n, 4, 3): p_a, v_a, p_b, v_b.
    nodes = table[np.arange(n)[:, None], col[:, None] + _PAIR].reshape(n, 4, 3)
    out = weights @ nodes
    pos = out[:, 0]
    vel = out[:, 1]
    clock = batch.gamma_n * dt - batch.tau_n_s
    if valid is not None:
        bad = ~valid
        pos[bad] = np.nan
        vel[bad] = np.nan
        clock[bad] = np.nan
    return pos, vel, clock


_PAIR = np.array([0, 1], dtype=np.intp)
