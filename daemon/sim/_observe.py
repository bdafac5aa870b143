"""From block geometry to observations: C/N0, events, ambiguities, lock, code and phase.

Axes: ``E`` epochs, ``S`` satellites of the block (``cols`` into the constellation), ``K`` signal
slots. See :mod:`._engine` for the observation equations. Everything is computed on whole
``(E, S, K)`` arrays; the only loops run over the scenario's (few) events.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol

import numpy as np

from ionwarden.parsers import signal_code

from ._atmosphere import first_order_delay_m, second_order_delay_m
from ._signals import MAX_SLOTS, SignalTable

if TYPE_CHECKING:
    import numpy.typing as npt

    from ._scenario import LossOfLock, Scenario, SlipEvent

__all__ = ["BlockGeometry", "SimBlock", "StationState", "noise_scale", "observe"]

C_MPS = 299_792_458.0
_CN0_MIN_DBHZ = 24.0
_F64 = np.float64


class _Sim(Protocol):
    scenario: Scenario
    signals: SignalTable
    sats: npt.NDArray[np.int16]
    rx_bias_m: npt.NDArray[np.float64]
    slips: tuple[SlipEvent, ...]
    losses: tuple[LossOfLock, ...]


class StationState:
    """What one station carries from block to block (all (S_all, K) unless noted)."""

    def __init__(self, n_sats: int, rng: np.random.Generator) -> None:
        shape = (n_sats, MAX_SLOTS)
        self.clock_s = float(rng.uniform(-4e-4, 4e-4))  # unsteered (wrapped on output)
        self.drift = float(rng.uniform(1.5e-7, 3e-7) * rng.choice((-1.0, 1.0)))
        self.present = np.zeros(shape, np.bool_)
        self.ambiguity = np.zeros(shape)
        self.lock_start = np.zeros(shape)
        self.half_from = np.full(shape, np.inf)
        self.half_until = np.full(shape, -np.inf)
        self.stec_hist = np.full((0, n_sats), np.nan)
        self.rot_hist = np.full((0, n_sats), np.nan)


@dataclass(frozen=True, slots=True, kw_only=True)
class BlockGeometry:
    """Geometry and atmosphere of one station's block; (E, S) arrays over ``cols``."""

    station: int
    block: int
    epoch_index: npt.NDArray[np.int64]
    t_tag_s: npt.NDArray[np.float64]  # continuous GPS s (float64: ~0.2 µs steps at today's dates)
    week: npt.NDArray[np.int64]  # exact epoch tags as GPS week and seconds of week
    tow_s: npt.NDArray[np.float64]
    t_rel_s: npt.NDArray[np.float64]  # true time from the scenario start
    rx_clock_s: npt.NDArray[np.float64]
    cols: npt.NDArray[np.intp]
    el_rad: npt.NDArray[np.float64]
    az_rad: npt.NDArray[np.float64]
    range_m: npt.NDArray[np.float64]
    range_rate_mps: npt.NDArray[np.float64]
    sat_clock_s: npt.NDArray[np.float64]
    stec_tecu: npt.NDArray[np.float64]
    vtec_tecu: npt.NDArray[np.float64]
    rot_tecu_per_min: npt.NDArray[np.float64]
    roti_tecu_per_min: npt.NDArray[np.float64]
    ipp_lat_rad: npt.NDArray[np.float64]
    ipp_lon_rad: npt.NDArray[np.float64]
    tropo_m: npt.NDArray[np.float64]
    fade_db: npt.NDArray[np.float64]


@dataclass(frozen=True, slots=True, kw_only=True)
class SimBlock:
    """One block of one station: cells (E, S, K), truth (E, S), S = ``sat_index`` columns."""

    geometry: BlockGeometry
    sat: npt.NDArray[np.int16]  # (S,) satellite ids
    code: npt.NDArray[np.uint16]  # (S, K) packed RINEX signal codes
    freq_hz: npt.NDArray[np.float64]  # (S, K)
    sat_bias_m: npt.NDArray[np.float64]  # (S, K) truth
    rx_bias_m: npt.NDArray[np.float64]  # (S, K) truth
    in_stream: npt.NDArray[np.bool_]  # (E,)
    present: npt.NDArray[np.bool_]
    pseudorange_m: npt.NDArray[np.float64]
    phase_cycles: npt.NDArray[np.float64]
    range_rate_mps: npt.NDArray[np.float64]
    cn0_dbhz: npt.NDArray[np.float64]
    lock_time_s: npt.NDArray[np.float64]
    half_cycle: npt.NDArray[np.bool_]
    lli: npt.NDArray[np.uint8]
    slipped: npt.NDArray[np.bool_]
    ambiguity_cycles: npt.NDArray[np.float64]
    iono_m: npt.NDArray[np.float64]  # (E, S, K) first-order group delay per signal
    if_expected_m: npt.NDArray[np.float64]  # (E, S) slots 0/1 iono-free code without noise


def noise_scale(
    cn0_dbhz: npt.NDArray[np.float64], cn0_zenith_dbhz: npt.NDArray[np.float64]
) -> npt.NDArray[np.float64]:
    """Noise multiplier of a cell: σ grows as 10^(ΔC/N0 / 20) below the zenith C/N0 (thermal
    noise of a tracking loop ∝ 1/√(C/N0), common practice), capped at 10×."""
    return np.clip(10.0 ** ((cn0_zenith_dbhz - cn0_dbhz) / 20.0), 1.0, 10.0)


def _ffill_index(event: npt.NDArray[np.bool_]) -> npt.NDArray[np.intp]:
    """Index of the latest ``event`` at or before each epoch along axis 0 (−1 if none)."""
    e = event.shape[0]
    ar = np.arange(e).reshape((e,) + (1,) * (event.ndim - 1))
    return np.maximum.accumulate(np.where(event, ar, -1), axis=0)


def _take0(a: npt.NDArray[np.float64], idx: npt.NDArray[np.intp]) -> npt.NDArray[np.float64]:
    return np.take_along_axis(a, np.maximum(idx, 0), axis=0)


def observe(sim: _Sim, st: StationState, rng: np.random.Generator, g: BlockGeometry) -> SimBlock:
    sc = sim.scenario
    sig = sim.signals
    cols = g.cols
    e, s = g.el_rad.shape
    k = MAX_SLOTS
    tt = g.epoch_index / sc.rate_hz  # tag time from the start: events are scheduled on it
    half = 0.5 / sc.rate_hz
    valid = sig.valid[cols]
    f = sig.freq_hz[cols]
    lam = C_MPS / f
    code = sig.code[cols]
    el_pos = np.maximum(g.el_rad, 0.0)
    sin_el = np.sin(el_pos)

    # C/N0: zenith value, elevation roll-off, scintillation fading, interference, noise.
    cn0 = (
        sig.cn0_zenith_dbhz[cols][None]
        - (20.0 * (1.0 - sin_el) ** 1.5)[..., None]
        - g.fade_db[..., None]
        + rng.normal(0.0, 0.4, (e, s, k))
    )
    lost = np.zeros((e, s, k), np.bool_)
    f_mhz = np.nan_to_num(f, nan=0.0) / 1e6
    for o in sc.outages:
        in_band = (f_mhz >= o.low_mhz) & (f_mhz <= o.high_mhz)
        win = ((tt >= o.start_s) & (tt < o.end_s))[:, None, None] & in_band[None]
        if o.drop_db is None:
            lost |= win
        else:
            cn0 = cn0 - o.drop_db * win
    col_of = {int(sat): i for i, sat in enumerate(sim.sats[cols].tolist())}
    for loss in sim.losses:
        c = col_of.get(loss.sat)
        if c is not None:
            lost[(tt >= loss.t_s) & (tt < loss.t_s + loss.duration_s), c, :] = True
    for r in sc.restarts:
        lost[(tt >= r.t_s) & (tt < r.t_s + r.duration_s)] = True
    present = valid[None] & (g.el_rad > math.radians(sc.elevation_mask_deg))[..., None]
    present &= (cn0 >= _CN0_MIN_DBHZ) & ~lost
    prev = np.concatenate([st.present[cols][None], present[:-1]], axis=0)
    new_arc = present & ~prev

    # Slips (scheduled on tag time), half-cycle windows, lock resets.
    inc = np.zeros((e, s, k))
    lock_reset = np.zeros((e, s, k), np.bool_)
    half_from = st.half_from[cols].copy()
    half_until = st.half_until[cols].copy()
    for ev in sim.slips:
        hit = np.flatnonzero(np.abs(tt - ev.t_s) < half)
        c = col_of.get(ev.sat)
        if hit.size == 0 or c is None:
            continue
        e0 = int(hit[0])
        which = (
            np.ones(k, np.bool_)
            if not ev.signals
            else np.isin(code[c], [signal_code(x) for x in ev.signals])
        )
        inc[e0, c, which] += ev.cycles + (0.5 if ev.half_cycle else 0.0)
        if ev.half_cycle:
            half_from[c, which] = ev.t_s
            half_until[c, which] = ev.t_s + ev.half_flag_s
        if ev.lock_reset:
            lock_reset[e0, c, which] = True
    # Half-cycle resolved: the receiver takes the half cycle back when it lowers the flag.
    ends = (np.abs(tt[:, None, None] - half_until[None]) < half) & np.isfinite(half_until)[None]
    inc -= 0.5 * ends
    half_flag = (tt[:, None, None] >= half_from[None]) & (tt[:, None, None] < half_until[None])

    # Ranges without ambiguity.
    common = g.range_m + C_MPS * (g.rx_clock_s[:, None] - g.sat_clock_s) + g.tropo_m
    iono = first_order_delay_m(g.stec_tecu[..., None], f[None])
    iono_phase = iono
    if sc.second_order:
        i2 = second_order_delay_m(g.stec_tecu[..., None], f[None])
        iono = iono + i2
        iono_phase = iono_phase + 0.5 * i2
    sys_idx = sim.sats[cols].astype(np.intp) // 100
    rxb = sim.rx_bias_m[g.station][sys_idx]
    el_deg = np.degrees(el_pos)[..., None]
    mp_amp = sig.mp_code_m[cols][None] * (0.15 + 0.85 * np.exp(-el_deg / 15.0))
    mp = mp_amp * np.sin(
        2.0 * np.pi * g.t_rel_s[:, None, None] / sig.mp_period_s[cols][None]
        + sig.mp_phase_rad[cols][None]
    )
    scale = noise_scale(cn0, sig.cn0_zenith_dbhz[cols][None])
    pr = (
        common[..., None]
        + iono
        + sig.sat_bias_m[cols][None]
        + rxb[None]
        + mp
        + sig.code_sigma_m[cols][None] * scale * rng.standard_normal((e, s, k))
    )
    phi = (
        common[..., None]
        - iono_phase
        + 0.01 * mp
        + sig.phase_sigma_m[cols][None] * scale * rng.standard_normal((e, s, k))
    )
    # Ambiguities: a new arc starts near the code (receivers align phase to code at lock).
    cand = np.round((pr - phi) / lam[None]) + rng.integers(-40, 41, (e, s, k))
    cum = np.cumsum(inc, axis=0)
    arc = _ffill_index(new_arc)
    base = np.where(arc >= 0, _take0(cand, arc) - _take0(cum, arc), st.ambiguity[cols][None])
    amb = base + cum
    lock_evt = new_arc | (lock_reset & present)
    lk = _ffill_index(lock_evt)
    lock_start = np.where(lk >= 0, tt[np.maximum(lk, 0)], st.lock_start[cols][None])
    lock_time = np.maximum(tt[:, None, None] - lock_start, 0.0)
    phase = phi / lam[None] + amb
    rate = g.range_rate_mps[..., None] + rng.normal(0.0, 0.02, (e, s, k))

    lli = (lock_evt & ~new_arc).astype(np.uint8) | (half_flag.astype(np.uint8) << 1)
    slipped = (inc != 0.0) | new_arc
    nan = np.nan
    out_pr = np.where(present, pr, nan)
    out_ph = np.where(present, phase, nan)
    # Carry state.
    st.present[:] = False
    st.present[cols] = present[-1]
    st.ambiguity[cols] = amb[-1]
    st.lock_start[cols] = lock_start[-1]
    st.half_from[cols] = half_from
    st.half_until[cols] = half_until
    # Truth: iono-free code of slots 0/1 without noise and multipath (biases included).
    f0, f1 = f[:, 0], f[:, 1]
    alpha = f0**2 / (f0**2 - f1**2)
    beta = 1.0 - alpha
    b_if = alpha * (sig.sat_bias_m[cols][:, 0] + rxb[:, 0]) + beta * (
        sig.sat_bias_m[cols][:, 1] + rxb[:, 1]
    )
    in_stream = np.ones(e, np.bool_)
    for gap in sc.gaps:
        in_stream &= ~((tt >= gap.start_s) & (tt < gap.end_s))
    return SimBlock(
        geometry=g,
        sat=sim.sats[cols],
        code=code,
        freq_hz=f,
        sat_bias_m=sig.sat_bias_m[cols],
        rx_bias_m=rxb,
        in_stream=in_stream,
        present=present,
        pseudorange_m=out_pr,
        phase_cycles=out_ph,
        range_rate_mps=np.where(present, rate, nan),
        cn0_dbhz=np.where(present, cn0, nan),
        lock_time_s=np.where(present, lock_time, nan),
        half_cycle=half_flag & present,
        lli=np.where(present, lli, 0).astype(np.uint8),
        slipped=slipped & present,
        ambiguity_cycles=np.where(present, amb, nan),
        iono_m=iono,
        if_expected_m=common + b_if[None],
    )
