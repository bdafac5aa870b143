"""Per-satellite signal table and the invented hardware: biases, multipath and noise parameters.

Axes: ``S`` satellites (``Constellation.sats`` order), ``K`` signal slots (the system's plan in
``_plan.SIGNAL_PLAN``; unused slots are invalid). Everything is drawn once from the scenario seed.

Code biases (truth, metres, added to the pseudorange):
* GPS: the broadcast T_GD defines the P(Y) biases, b(1C) = c·T_GD and b(2W) = γ·c·T_GD with
  γ = (f1/f2)² (IS-GPS-200 §20.3.3.3.3.2: the L1 user applies Δt_SV − T_GD and the L2 user
  Δt_SV − γ·T_GD, so the iono-free P1/P2 combination has no satellite bias); other GPS signals get
  a random inter-signal bias on top of their γ-scaled T_GD.
* Galileo: b(1C) = c·BGD(E1,E5a), b(5Q) = (f_E1/f_E5a)²·c·BGD(E1,E5a) (Galileo OS SIS ICD §5.1.5,
  F/NAV clock); E5b and E6 random.
* BeiDou: clocks refer to B3I, b(6I) = 0, b(2I) = c·TGD1, b(7I) = c·TGD2 (BDS-SIS-ICD-B1I §5.2.4.10);
  B2a random.
* GLONASS: b(1C) random, b(2C) = b(1C) + c·Δτ_n where the ephemeris broadcasts Δτ_n ≠ 0 (GLONASS
  ICD Ed. 5.1 Table 4.5: Δτ_n = t_f2 − t_f1, the L2 minus L1 equipment delay), random where it
  broadcasts 0 ("not known").
Receiver biases: random per system × signal slot (a few ns).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.parsers import (
    GLO_NO_CHANNEL,
    GlonassEphemeris,
    KeplerEphemeris,
    frequencies_hz,
    signal_code,
)

from ._plan import SIGNAL_PLAN, transmits

if TYPE_CHECKING:
    import numpy.typing as npt

    from ._constellation import Constellation

__all__ = ["MAX_SLOTS", "SignalTable", "build_signal_table"]

MAX_SLOTS = 4
_C_MPS = 299_792_458.0


@dataclass(frozen=True, slots=True, kw_only=True)
class SignalTable:
    """(S, K) arrays describing every satellite × signal slot of the constellation."""

    code: npt.NDArray[np.uint16]
    valid: npt.NDArray[np.bool_]
    freq_hz: npt.NDArray[np.float64]
    cn0_zenith_dbhz: npt.NDArray[np.float64]
    code_sigma_m: npt.NDArray[np.float64]
    phase_sigma_m: npt.NDArray[np.float64]
    sat_bias_m: npt.NDArray[np.float64]
    mp_code_m: npt.NDArray[np.float64]  # multipath amplitude at zenith-ish (scaled by elevation)
    mp_period_s: npt.NDArray[np.float64]
    mp_phase_rad: npt.NDArray[np.float64]
    band: npt.NDArray[np.int16]

    @property
    def wavelength_m(self) -> npt.NDArray[np.float64]:
        return _C_MPS / self.freq_hz


def _first_eph(const: Constellation, system: str) -> dict[int, KeplerEphemeris]:
    series = const.series.get(system)
    if series is None:
        return {}
    return {e.sat: e for e in series.ephemerides[0] if isinstance(e, KeplerEphemeris)}


def _glonass_dtau(const: Constellation) -> dict[int, float]:
    series = const.series.get("R")
    if series is None:
        return {}
    return {e.sat: e.dtau_s for e in series.ephemerides[0] if isinstance(e, GlonassEphemeris)}


def build_signal_table(const: Constellation, seed: int) -> SignalTable:
    rng = np.random.default_rng([seed, 4242])
    s_n = const.sats.shape[0]
    shape = (s_n, MAX_SLOTS)
    code = np.zeros(shape, np.uint16)
    valid = np.zeros(shape, np.bool_)
    cn0 = np.zeros(shape)
    csig = np.ones(shape)
    psig = np.ones(shape)
    for i, sat in enumerate(const.sats.tolist()):
        system = "GREC"[[0, 1, 2, 3].index(sat // 100)]
        for k, spec in enumerate(SIGNAL_PLAN[system]):
            code[i, k] = signal_code(spec.code)
            valid[i, k] = transmits(system, sat % 100, spec.code)
            cn0[i, k] = spec.cn0_zenith_dbhz
            csig[i, k] = spec.code_sigma_m
            psig[i, k] = spec.phase_sigma_m
    chan = np.where(const.sats // 100 == 1, const.glo_channel, GLO_NO_CHANNEL).astype(np.int8)
    freq = frequencies_hz(
        np.repeat(const.sats, MAX_SLOTS),
        code.reshape(-1),
        np.repeat(chan, MAX_SLOTS),
    ).reshape(shape)
    freq = np.where(valid, freq, np.nan)
    band = (code // 32).astype(np.int16)
    # Satellite code biases (see module docstring), metres.
    bias = rng.normal(0.0, 0.3, shape)
    ephs = {**_first_eph(const, "G"), **_first_eph(const, "E"), **_first_eph(const, "C")}
    dtau = _glonass_dtau(const)
    for i, sat in enumerate(const.sats.tolist()):
        eph = ephs.get(sat)
        system = sat // 100
        if system == 1 and dtau.get(sat, 0.0) != 0.0:  # GLONASS L1 (slot 0) / L2 (slot 1)
            bias[i, 1] = bias[i, 0] + _C_MPS * dtau[sat]
        if eph is None:
            continue
        f = freq[i]
        if system in (0, 2):  # GPS T_GD / Galileo BGD(E1,E5a) on slots 0 and 1
            t = _C_MPS * eph.tgd_s[0]
            gamma = (f[0] / f) ** 2
            bias[i, 0] = t
            bias[i, 1] = gamma[1] * t
            bias[i, 2:] = gamma[2:] * t + rng.normal(0.0, 0.3, MAX_SLOTS - 2)
        elif system == 3:  # BeiDou: slot 0 B1I (TGD1), 1 B3I (reference), 2 B2I (TGD2)
            bias[i, 0] = _C_MPS * eph.tgd_s[0]
            bias[i, 1] = 0.0
            bias[i, 2] = _C_MPS * eph.tgd_s[1]
    bias = np.where(valid, bias, 0.0)
    return SignalTable(
        code=code,
        valid=valid,
        freq_hz=freq,
        cn0_zenith_dbhz=cn0,
        code_sigma_m=csig,
        phase_sigma_m=psig,
        sat_bias_m=bias,
        mp_code_m=rng.uniform(0.2, 0.8, shape),
        mp_period_s=rng.uniform(180.0, 900.0, shape),
        mp_phase_rad=rng.uniform(0.0, 2.0 * np.pi, shape),
        band=band,
    )
