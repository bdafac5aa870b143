"""The simulation engine: whole blocks of epochs × satellites × signals at once.

Axes: ``E`` epochs of a block, ``S`` satellites (the constellation, or the block's visible subset
``sat_index``), ``K`` signal slots. Units: metres, seconds, cycles, TECU, dB-Hz.

Observation equations per cell (common practice; SCIENCE.md §2 for the ionosphere):

    P = ρ + c·(dt_r − dt_s) + T + I + b_s + b_r + m_P + ε_P
    Φ = ρ + c·(dt_r − dt_s) + T − I + λ·N + m_Φ + ε_Φ,   L = Φ / λ

with ρ the geometric range from the satellite position at transmission (Earth rotation applied,
:func:`geo.sagnac_rotate`), dt_s the broadcast clock (with its relativistic term), I = 40.3·STEC/f²,
N an integer per arc (plus half a cycle while a half-cycle slip is pending), biases from
:mod:`._signals`. Epoch time tags are receiver time; the true reception time is tag − dt_r.

State carried between blocks (per station): receiver clock walk, previous presence, ambiguities,
lock start times, half-cycle flags and the last 30 s of STEC for the truth ROT. Each block draws its
noise from ``default_rng([seed, station, block])``, so output depends only on the scenario.
"""

from __future__ import annotations

import math
from dataclasses import replace
from itertools import pairwise
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon.geo import enu_basis, geodetic_to_ecef, mapping_factor, pierce_point
from ionwarden.parsers import SECONDS_PER_WEEK

from ._atmosphere import Ionosphere, tropo_mapping, tropo_zenith_delay_m
from ._constellation import Constellation, build_constellation
from ._observe import BlockGeometry, SimBlock, StationState, observe
from ._orbits import block_states
from ._signals import MAX_SLOTS, SignalTable, build_signal_table

if TYPE_CHECKING:
    from collections.abc import Iterator

    import numpy.typing as npt

    from ._scenario import Scenario, Station

__all__ = ["SimBlock", "Simulator"]

C_MPS = 299_792_458.0
OMEGA_E_RADPS = 7.2921151467e-5
#: Epochs per block (5 min at 1 Hz): large enough to vectorise, small enough for a Pi's memory.
BLOCK_EPOCHS = 300
#: Signal-travel guess at which orbits are propagated; the exact time is reached by a linear step.
_TAU0_S = 0.075
_ROT_LAG_S = 30.0
_ROTI_WINDOW_S = 300.0
_CLOCK_STEER_S = 1e-3


def _week_tow(
    week0: int, tow_s: npt.NDArray[np.float64]
) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.float64]]:
    """Exact epoch tags: seconds of week kept small (float64 steps of 2⁻⁴⁴ s, not 0.2 µs)."""
    roll = np.floor(tow_s / SECONDS_PER_WEEK)
    return (week0 + roll).astype(np.int64), tow_s - roll * SECONDS_PER_WEEK


class Simulator:
    """Generates :class:`SimBlock` s for every station of a scenario (deterministic)."""

    def __init__(self, scenario: Scenario) -> None:
        self.scenario = scenario
        t0 = scenario.start.total_s
        self.constellation: Constellation = build_constellation(
            scenario.systems, scenario.seed, t0 - 120.0, t0 + scenario.duration_s + 120.0
        )
        self.sats = self.constellation.sats
        self.signals: SignalTable = build_signal_table(self.constellation, scenario.seed)
        self.iono = Ionosphere(scenario, self.sats.shape[0])
        self._rx = [self._station_geometry(st) for st in scenario.stations]
        rng = np.random.default_rng([scenario.seed, 99])
        self.rx_bias_m = np.stack(
            [rng.normal(0.0, 1.0, (4, MAX_SLOTS)) for _ in scenario.stations]
        )  # (stations, system, K)
        self.slips = tuple(
            replace(ev, sat=self._resolve_sat(ev.sat, ev.t_s)) for ev in scenario.slips
        )
        self.losses = tuple(
            replace(ev, sat=self._resolve_sat(ev.sat, ev.t_s)) for ev in scenario.losses
        )

    def _resolve_sat(self, sat: int, t_s: float) -> int:
        """An event's satellite; -1 means the highest one seen by the first station at ``t_s``."""
        if sat != -1:
            return sat
        t = np.array([self.scenario.start.total_s + t_s])
        pos, _, _ = block_states(self.constellation, t)
        rx, basis, _ = self._rx[0]
        enu = (pos[0] - rx) @ basis.T
        el = np.arctan2(enu[:, 2], np.hypot(enu[:, 0], enu[:, 1]))
        return int(self.sats[int(np.argmax(el))])

    @staticmethod
    def _station_geometry(
        st: Station,
    ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], float]:
        lat = math.radians(st.lat_deg)
        lon = math.radians(st.lon_deg)
        xyz = geodetic_to_ecef(lat, lon, st.height_m)
        return xyz, enu_basis(lat, lon), tropo_zenith_delay_m(lat, st.height_m)

    def station_ecef(self, station: int) -> npt.NDArray[np.float64]:
        return self._rx[station][0]

    def block_ranges(self) -> list[tuple[int, int]]:
        """[start, stop) epoch indices of the blocks: ≤ BLOCK_EPOCHS, split at ephemeris changes."""
        sc = self.scenario
        n = sc.n_epochs
        t = sc.start.total_s + np.arange(n) / sc.rate_hz
        # Propagation happens near tag − τ0, so split on those times.
        cuts = set(range(0, n, BLOCK_EPOCHS))
        for b in self.constellation.boundaries():
            cuts.add(int(np.searchsorted(t - _TAU0_S, b, side="left")))
        edges = [*sorted(c for c in cuts if 0 <= c < n), n]
        return [(a, b) for a, b in pairwise(edges) if b > a]

    def run(self) -> Iterator[list[SimBlock]]:
        """Blocks in time order; each item holds one block per station for the same epochs."""
        states = [
            StationState(self.sats.shape[0], np.random.default_rng([self.scenario.seed, 5, i]))
            for i in range(len(self.scenario.stations))
        ]
        for b, (i0, i1) in enumerate(self.block_ranges()):
            idx = np.arange(i0, i1, dtype=np.int64)
            t_tag = self.scenario.start.total_s + idx / self.scenario.rate_hz
            pos0, vel0, clk0 = block_states(self.constellation, t_tag - _TAU0_S)
            yield [
                self._station_block(
                    s_idx=s,
                    st=states[s],
                    b_idx=b,
                    idx=idx,
                    t_tag=t_tag,
                    pos0=pos0,
                    vel0=vel0,
                    clk0=clk0,
                )
                for s in range(len(self.scenario.stations))
            ]

    def _roti(
        self, st: StationState, rot: npt.NDArray[np.float64], cols: npt.NDArray[np.intp]
    ) -> npt.NDArray[np.float64]:
        """Truth ROTI: standard deviation of the ROT samples of the last 5 min (SCIENCE.md §5),
        NaN until the window holds at least half its samples."""
        sc = self.scenario
        win = max(2, round(_ROTI_WINDOW_S * sc.rate_hz))
        e = rot.shape[0]
        full = np.full((e, self.sats.shape[0]), np.nan)
        full[:, cols] = rot
        hist = np.concatenate([st.rot_hist, full], axis=0)
        st.rot_hist = hist[-(win - 1) :] if win > 1 else hist[:0]
        ok = np.isfinite(hist)
        x = np.where(ok, hist, 0.0)
        zero = np.zeros((1, hist.shape[1]))
        c_n = np.concatenate([zero, np.cumsum(ok, axis=0)])
        c_s = np.concatenate([zero, np.cumsum(x, axis=0)])
        c_q = np.concatenate([zero, np.cumsum(x * x, axis=0)])
        end = np.arange(hist.shape[0] - e, hist.shape[0]) + 1
        start = np.maximum(end - win, 0)
        n = c_n[end] - c_n[start]
        mean = (c_s[end] - c_s[start]) / np.maximum(n, 1)
        var = (c_q[end] - c_q[start]) / np.maximum(n, 1) - mean * mean
        roti = np.sqrt(np.maximum(var, 0.0))
        roti = np.where((n >= win / 2) & np.isfinite(full), roti, np.nan)
        return np.asarray(roti[:, cols], dtype=np.float64)

    # --- one station, one block -------------------------------------------------------------
    def _clock(
        self, st: StationState, rng: np.random.Generator, t_rel: npt.NDArray[np.float64]
    ) -> npt.NDArray[np.float64]:
        sc = self.scenario
        e = t_rel.shape[0]
        dt = sc.interval_s
        drift = st.drift + np.cumsum(rng.normal(0.0, 2e-11 * math.sqrt(dt), e))
        jumps = np.zeros(e)
        for r in sc.restarts:  # a reboot restarts the oscillator steering from a random offset
            hit = np.flatnonzero(np.abs(t_rel - (r.t_s + r.duration_s)) < dt / 2)
            if hit.size:
                jumps[hit[0]] = rng.uniform(-4e-4, 4e-4)
        raw = st.clock_s + np.cumsum(drift * dt + rng.normal(0.0, 1e-10, e) + jumps)
        st.clock_s = float(raw[-1])
        st.drift = float(drift[-1])
        # 1 ms steering: the receiver keeps its clock within ±0.5 ms by whole-millisecond resets.
        return raw - _CLOCK_STEER_S * np.round(raw / _CLOCK_STEER_S)

    def _station_block(
        self,
        *,
        s_idx: int,
        st: StationState,
        b_idx: int,
        idx: npt.NDArray[np.int64],
        t_tag: npt.NDArray[np.float64],
        pos0: npt.NDArray[np.float64],
        vel0: npt.NDArray[np.float64],
        clk0: npt.NDArray[np.float64],
    ) -> SimBlock:
        sc = self.scenario
        rng = np.random.default_rng([sc.seed, s_idx, b_idx])
        rx, basis, zenith_trop = self._rx[s_idx]
        e = idx.shape[0]
        t_rel = idx / sc.rate_hz
        week, tow = _week_tow(sc.start.week, sc.start.tow_s + t_rel)
        dt_r = self._clock(st, rng, t_rel)
        # Transmission time: iterate τ with the satellite moved linearly from the propagation time.
        tau = np.full(pos0.shape[:2], _TAU0_S)
        for _ in range(3):
            shift = (-(dt_r[:, None] + tau - _TAU0_S))[..., None]
            sat = pos0 + vel0 * shift
            theta = OMEGA_E_RADPS * tau
            c, s = np.cos(theta), np.sin(theta)
            rot = np.stack(
                [c * sat[..., 0] + s * sat[..., 1], c * sat[..., 1] - s * sat[..., 0], sat[..., 2]],
                axis=-1,
            )
            los = rot - rx
            rho = np.sqrt(np.einsum("esk,esk->es", los, los))
            tau = rho / C_MPS
        enu = los @ basis.T
        az = np.arctan2(enu[..., 0], enu[..., 1]) % (2.0 * np.pi)
        el = np.arctan2(enu[..., 2], np.hypot(enu[..., 0], enu[..., 1]))
        mask_rad = math.radians(sc.elevation_mask_deg)
        vis_cols = np.flatnonzero((el > mask_rad - 0.02).any(axis=0))
        # ROT history needs STEC of every satellite above the horizon, so keep those too.
        cols = np.flatnonzero((el > 0.0).any(axis=0) | (st.stec_hist > -1).any(axis=0))
        cols = np.union1d(cols, vis_cols)
        el = el[:, cols]
        az = az[:, cols]
        rho = rho[:, cols]
        u = los[:, cols] / rho[..., None]
        rate = np.einsum("esk,esk->es", u, vel0[:, cols]) + C_MPS * st.drift
        sat_clk = clk0[:, cols]
        lat0 = math.atan2(basis[2, 2], math.hypot(basis[2, 0], basis[2, 1]))
        lon0 = math.atan2(basis[2, 1], basis[2, 0])
        el_pos = np.maximum(el, 0.0)
        ipp_lat, ipp_lon = pierce_point(lat0, lon0, az, el_pos, sc.shell_height_m)
        mf = mapping_factor(el_pos, sc.shell_height_m)
        t_true = (t_rel - dt_r)[:, None]
        vtec = self.iono.vtec_tecu(t_true, ipp_lat, ipp_lon)
        dstec, fade = self.iono.scintillation(t_true, self.sats.shape[0])
        stec = mf * vtec + dstec[:, cols]
        fade = fade[:, cols]
        above = el > 0.0
        stec = np.where(above, stec, np.nan)
        # Truth ROT over 30 s (SCIENCE.md §5), history carried from the previous block.
        lag = max(1, round(_ROT_LAG_S * sc.rate_hz))
        full = np.full((e, self.sats.shape[0]), np.nan)
        full[:, cols] = stec
        hist = np.concatenate([st.stec_hist, full], axis=0)
        prev = hist[-e - lag : -lag] if hist.shape[0] >= e + lag else None
        rot = np.full((e, cols.shape[0]), np.nan)
        if prev is not None:
            rot = (full - prev)[:, cols] / (lag * sc.interval_s / 60.0)
        else:
            avail = hist.shape[0] - e
            start = lag - avail
            if start < e:
                rot[start:] = (full[start:] - hist[: e - start])[:, cols] / (
                    lag * sc.interval_s / 60.0
                )
        st.stec_hist = hist[-lag:]
        roti = self._roti(st, rot, cols)
        trop = zenith_trop * tropo_mapping(el_pos)
        geom = BlockGeometry(
            station=s_idx,
            block=b_idx,
            epoch_index=idx,
            t_tag_s=t_tag,
            week=week,
            tow_s=tow,
            t_rel_s=t_rel - dt_r,
            rx_clock_s=dt_r,
            cols=cols,
            el_rad=el,
            az_rad=az,
            range_m=rho,
            range_rate_mps=rate,
            sat_clock_s=sat_clk,
            stec_tecu=stec,
            vtec_tecu=vtec,
            rot_tecu_per_min=rot,
            roti_tecu_per_min=roti,
            ipp_lat_rad=ipp_lat,
            ipp_lon_rad=ipp_lon,
            tropo_m=trop,
            fade_db=fade,
        )
        return observe(self, st, rng, geom)
