"""A small invented-scenario generator for the estimator tests (our own synthetic data).

Satellites on straight-line sky tracks over an invented station; a smooth VTEC field with a gentle
gradient plus optional travelling waves; first-order ionosphere (SCIENCE.md §2) on code and phase;
white code/phase noise growing at low elevation; optional cycle slips. Geometry is handed to the
estimator directly (elevation/azimuth), so these tests do not depend on orbit code.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ionwarden.daemon.geo import geodetic_to_ecef, mapping_factor, pierce_point
from ionwarden.parsers import EPOCH_DTYPES, GpsTime, ObsEpoch, signal_code

C = 299_792_458.0
F = {"1C": 1575.42e6, "2W": 1227.60e6, "5Q": 1176.45e6}
LAT, LON = np.radians(47.0), np.radians(8.0)  # invented site
RX_ECEF = geodetic_to_ecef(LAT, LON, 500.0)
T0 = GpsTime(2350, 100_000.0)


@dataclass
class Scenario:
    n_sats: int = 10
    duration_s: float = 1800.0
    interval_s: float = 1.0
    code_sigma_m: float = 0.3
    phase_sigma_m: float = 0.002
    vtec0: float = 20.0
    grad_tecu_per_km: tuple[float, float] = (0.002, -0.001)  # east, north
    wave_amp_tecu: float = 0.0
    wave_period_s: float = 600.0
    rcv_bias_tecu: float = 0.0
    sat_bias_tecu: float = 0.0
    signals: tuple[str, ...] = ("1C", "2W", "5Q")
    seed: int = 1
    #: (sat index, time index, cycles on band 1, cycles on band 2)
    slips: list[tuple[int, int, int, int]] = field(default_factory=list)
    #: (sat index, signal, first time index, last time index) with the signal missing.
    outages: list[tuple[int, str, int, int]] = field(default_factory=list)


@dataclass
class Truth:
    t: np.ndarray  # (T,)
    sats: np.ndarray  # (N,) satellite ids
    el: np.ndarray  # (T, N) rad
    az: np.ndarray
    stec: np.ndarray  # (T, N) TECU
    vtec: np.ndarray
    rho: np.ndarray  # geometric range + clocks (no iono), m
    epochs: list[ObsEpoch]


def generate(sc: Scenario) -> Truth:
    rng = np.random.default_rng(sc.seed)
    n_t = round(sc.duration_s / sc.interval_s)
    t = np.arange(n_t) * sc.interval_s
    n = sc.n_sats
    sats = np.arange(1, n + 1)
    az0 = rng.uniform(0, 2 * np.pi, n)
    el_peak = rng.uniform(np.radians(35), np.radians(85), n)
    t_peak = rng.uniform(-0.5, 1.5, n) * sc.duration_s
    width = rng.uniform(3000, 6000, n)
    el = el_peak[None, :] - (np.pi / 2) * ((t[:, None] - t_peak[None, :]) / width[None, :]) ** 2
    el = np.clip(el, np.radians(12), None)
    az = (az0[None, :] + 0.2 * (t[:, None] - t_peak[None, :]) / width[None, :]) % (2 * np.pi)
    lat_p, lon_p = pierce_point(LAT, LON, az, el, 350e3)
    x_km = 6721.0 * (lon_p - LON) * np.cos(LAT)
    y_km = 6721.0 * (lat_p - LAT)
    vtec = sc.vtec0 + sc.grad_tecu_per_km[0] * x_km + sc.grad_tecu_per_km[1] * y_km
    if sc.wave_amp_tecu:
        phase0 = rng.uniform(0, 2 * np.pi, n)
        vtec = vtec + sc.wave_amp_tecu * np.sin(2 * np.pi * t[:, None] / sc.wave_period_s + phase0)
    stec = vtec * mapping_factor(el, 350e3)
    rho = 2.0e7 + 5.0e6 * np.cos(el) + 200.0 * np.sin(t[:, None] / 700.0)
    n_amb = rng.integers(-1000, 1000, (len(sc.signals), n)).astype(np.float64)
    slip_cycles = np.zeros((len(sc.signals), n_t, n))
    for si, ti, c1, c2 in sc.slips:
        slip_cycles[0, ti:, si] += c1
        slip_cycles[1, ti:, si] += c2
    noise_scale = 1.0 + 2.0 * np.exp(-np.degrees(el) / 15.0)
    epochs: list[ObsEpoch] = []
    sigs = [signal_code(s) for s in sc.signals]
    per_sig = []
    for k, name in enumerate(sc.signals):
        f = F[name]
        lam = C / f
        i_m = 40.3e16 * (stec + sc.rcv_bias_tecu + sc.sat_bias_tecu) / f**2
        i_ph = 40.3e16 * stec / f**2
        p = rho + i_m + rng.normal(0, sc.code_sigma_m, (n_t, n)) * noise_scale
        phase_m = rho - i_ph + rng.normal(0, sc.phase_sigma_m, (n_t, n)) * noise_scale
        cyc = phase_m / lam + n_amb[k] + slip_cycles[k]
        per_sig.append((p, cyc, f))
    present = np.ones((len(sc.signals), n_t, n), bool)
    for si, name, a, b in sc.outages:
        present[sc.signals.index(name), a : b + 1, si] = False
    for ti in range(n_t):
        mask = present[:, ti, :]  # (n_sig, n)
        cell_sat = np.concatenate([sats[mask[k]] for k in range(len(sigs))])
        cell_sig = np.concatenate([np.full(mask[k].sum(), sigs[k]) for k in range(len(sigs))])
        pr = np.concatenate([per_sig[k][0][ti][mask[k]] for k in range(len(sigs))])
        ph = np.concatenate([per_sig[k][1][ti][mask[k]] for k in range(len(sigs))])
        fr = np.concatenate([np.full(mask[k].sum(), per_sig[k][2]) for k in range(len(sigs))])
        m = cell_sat.shape[0]
        arrays = {
            "sat": cell_sat.astype(np.int16),
            "sig": cell_sig.astype(np.uint16),
            "pseudorange_m": pr,
            "phase_cycles": ph,
            "range_rate_mps": np.full(m, np.nan),
            "cn0_dbhz": np.full(m, 45.0, np.float32),
            "lock_time_s": np.full(m, np.nan, np.float32),
            "lock_indicator": np.full(m, -1, np.int16),
            "half_cycle": np.zeros(m, np.bool_),
            "lli": np.zeros(m, np.uint8),
            "freq_hz": fr,
        }
        for name, dt in EPOCH_DTYPES.items():
            assert arrays[name].dtype == dt, name
        epochs.append(ObsEpoch(time=T0 + float(t[ti]), **arrays))  # type: ignore[arg-type]
    return Truth(t=t, sats=sats, el=el, az=az, stec=stec, vtec=vtec, rho=rho, epochs=epochs)


def run(truth: Truth, est, *, with_geometry: bool = True):
    """Feed every epoch (with the true geometry as GSV) and return the snapshots."""
    if with_geometry:
        est.set_receiver_position(RX_ECEF, "config")
    out = []
    for ti, ep in enumerate(truth.epochs):
        if with_geometry:
            est.set_gsv(ep.time, truth.sats, np.degrees(truth.el[ti]), np.degrees(truth.az[ti]))
        out.append(est.update(ep))
    return out


def stack(snaps, truth: Truth, name: str) -> np.ndarray:
    """(T, N) array of a per-satellite field, aligned with the truth's satellites."""
    out = np.full((len(snaps), truth.sats.shape[0]), np.nan)
    for ti, s in enumerate(snaps):
        pos = np.searchsorted(truth.sats, s.satellites.sat)
        out[ti, pos] = getattr(s.satellites, name)
    return out
