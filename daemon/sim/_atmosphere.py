"""Invented ionosphere (thin shell) and a standard troposphere, vectorised over epochs × satellites.

Axes: ``E`` epochs, ``S`` satellites; inputs are ``(E, S)`` arrays (or broadcastable), angles in
radians, times in seconds from the scenario start. Outputs are TECU (vertical or slant) and metres.

* Background VTEC: ``B + D · max(0, cos(2π(LT − 14 h)/24 h))^1.5`` with a gentle poleward decrease
  (about 1.2 TECU per degree of latitude at 20 TECU, i.e. a few mm/km on L1: common practice for a
  quiet mid-latitude day, SCIENCE.md §8). LT is the local solar time at the pierce point.
* Storm: a travelling tanh front (see :class:`StormFront`).
* Scintillation: per affected satellite, a sum of sinusoids with periods 8…90 s in STEC, plus C/N0
  fading. Stateless in time, so blocks of epochs join seamlessly.
* Slant TEC = mapping factor · VTEC (thin shell, SCIENCE.md §6) + scintillation term.
* First-order delay ``40.3 · STEC / f²`` (SCIENCE.md §2); optional second-order term from a constant
  geomagnetic field (from memory: ``7527 · c · B cosθ · STEC / f³``, order of cm at most; off by
  default).
* Troposphere: Saastamoinen zenith delays with a standard atmosphere at the station height and the
  mapping ``1.001 / √(0.002001 + sin² el)`` (common practice, from memory).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import numpy.typing as npt

    from ._scenario import Scenario

__all__ = [
    "IONO_K_M3",
    "Ionosphere",
    "first_order_delay_m",
    "second_order_delay_m",
    "tropo_mapping",
    "tropo_zenith_delay_m",
]


#: 40.3 m³/s² · 10¹⁶ electrons/m² per TECU (SCIENCE.md §2): delay (m) = IONO_K_M3 · TECU / f².
IONO_K_M3 = 40.3e16
_R_EARTH_KM = 6371.0
_N_SCINT_TONES = 6
_SCINT_RAMP_S = 60.0
#: Constant geomagnetic field magnitude × cos θ for the optional second-order term (from memory).
_B_COS_THETA_T = 3.0e-5
_C_MPS = 299_792_458.0


def first_order_delay_m(
    stec_tecu: npt.NDArray[np.float64], f_hz: npt.NDArray[np.float64] | float
) -> npt.NDArray[np.float64]:
    """Group delay (m) on frequency ``f_hz``: 40.3 · STEC / f² (SCIENCE.md §2)."""
    return IONO_K_M3 * stec_tecu / np.square(f_hz)


def second_order_delay_m(
    stec_tecu: npt.NDArray[np.float64], f_hz: npt.NDArray[np.float64] | float
) -> npt.NDArray[np.float64]:
    """Second-order group delay (m), from memory: 7527 · c · B cosθ · STEC / f³ (phase: −½ of it)."""
    return 7527.0 * _C_MPS * _B_COS_THETA_T * stec_tecu * 1e16 / np.power(f_hz, 3)


def tropo_zenith_delay_m(lat_rad: float, height_m: float) -> float:
    """Saastamoinen hydrostatic + wet zenith delay (m), standard atmosphere, 50 % humidity."""
    h = max(height_m, 0.0)
    pressure_hpa = 1013.25 * (1.0 - 2.2557e-5 * h) ** 5.2568
    temp_k = 15.0 - 6.5e-3 * h + 273.15
    e_hpa: float = 0.5 * 6.108 * math.exp((17.15 * temp_k - 4684.0) / (temp_k - 38.45))
    zhd = 0.0022768 * pressure_hpa / (1.0 - 0.00266 * math.cos(2.0 * lat_rad) - 0.00028e-3 * h)
    zwd = 0.002277 * (1255.0 / temp_k + 0.05) * e_hpa
    return float(zhd + zwd)


def tropo_mapping(el_rad: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """Elevation mapping of the zenith delay (common practice, from memory)."""
    s = np.sin(el_rad)
    return 1.001 / np.sqrt(0.002001 + s * s)


class Ionosphere:
    """The scenario's ionosphere: VTEC at pierce points, slant TEC and C/N0 fading."""

    def __init__(self, scenario: Scenario, n_sats: int) -> None:
        self._sc = scenario
        rng = np.random.default_rng([scenario.seed, 7331])
        shape = (len(scenario.scintillation), n_sats, _N_SCINT_TONES)
        self._freq = rng.uniform(1.0 / 90.0, 1.0 / 8.0, shape)
        self._phase = rng.uniform(0.0, 2.0 * np.pi, shape)
        affected = [rng.random(n_sats) < w.fraction for w in scenario.scintillation]
        self._affected = np.array(affected, dtype=np.float64).reshape(-1, n_sats)
        self._start_utc_h = (scenario.start.tow_s % 86_400.0) / 3600.0

    def vtec_tecu(
        self,
        t_s: npt.NDArray[np.float64],
        lat_rad: npt.NDArray[np.float64],
        lon_rad: npt.NDArray[np.float64],
    ) -> npt.NDArray[np.float64]:
        """Vertical TEC (TECU) at shell points; ``t_s`` is ``(E, 1)`` seconds from the start."""
        sc = self._sc
        # GPS tow → UTC hours ignores the 18 s of GPS − UTC: irrelevant for a diurnal shape.
        lt_h = self._start_utc_h + t_s / 3600.0 + np.degrees(lon_rad) / 15.0
        day = np.maximum(0.0, np.cos(2.0 * np.pi * (lt_h - 14.0) / 24.0)) ** 1.5
        lat_deg = np.degrees(lat_rad)
        vtec = (sc.background_vtec_tecu + sc.diurnal_vtec_tecu * day) * (
            1.0 - 0.06 * (lat_deg - 45.0) / (1.0 + np.abs(lat_deg - 45.0) / 30.0)
        )
        if sc.storm is not None:
            vtec = vtec + self._storm_tecu(t_s, lat_rad, lon_rad)
        return np.asarray(np.maximum(vtec, 0.5), dtype=np.float64)

    def _storm_tecu(
        self,
        t_s: npt.NDArray[np.float64],
        lat_rad: npt.NDArray[np.float64],
        lon_rad: npt.NDArray[np.float64],
    ) -> npt.NDArray[np.float64]:
        st = self._sc.storm
        assert st is not None
        lat0 = math.radians(st.origin_lat_deg)
        lon0 = math.radians(st.origin_lon_deg)
        hd = math.radians(st.heading_deg)
        north_km = _R_EARTH_KM * (lat_rad - lat0)
        east_km = _R_EARTH_KM * math.cos(lat0) * (lon_rad - lon0)
        along_km = north_km * math.cos(hd) + east_km * math.sin(hd)
        front_km = st.speed_mps * (t_s - st.t_cross_s) / 1000.0
        step = 0.5 * (1.0 + np.tanh((front_km - along_km) / st.width_km))
        env = np.clip((t_s - st.onset_s) / st.ramp_s, 0.0, 1.0) * np.clip(
            (st.end_s - t_s) / st.ramp_s, 0.0, 1.0
        )
        env = env * env * (3.0 - 2.0 * env)  # smoothstep: no kink in ROT at onset
        return np.asarray(st.amplitude_tecu * step * env, dtype=np.float64)

    def scintillation(
        self, t_s: npt.NDArray[np.float64], n_sats: int
    ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
        """(STEC fluctuation in TECU, C/N0 fade in dB ≥ 0), each ``(E, S)``."""
        e = t_s.shape[0]
        dstec = np.zeros((e, n_sats))
        fade = np.zeros((e, n_sats))
        t = t_s.reshape(e, 1, 1)
        for w, win in enumerate(self._sc.scintillation):
            inside = (t_s[:, 0] >= win.start_s - _SCINT_RAMP_S) & (
                t_s[:, 0] <= win.end_s + _SCINT_RAMP_S
            )
            if not inside.any():
                continue
            env = np.clip((t_s - win.start_s) / _SCINT_RAMP_S + 1.0, 0.0, 1.0) * np.clip(
                (win.end_s - t_s) / _SCINT_RAMP_S + 1.0, 0.0, 1.0
            )
            tones = np.sin(2.0 * np.pi * self._freq[w] * t + self._phase[w]).sum(axis=2)
            tones *= math.sqrt(2.0 / _N_SCINT_TONES)  # unit rms
            amp = env * self._affected[w]
            dstec += win.rms_tecu * amp * tones
            fade += win.fade_db * amp * np.abs(tones) / 2.0
        return dstec, fade
