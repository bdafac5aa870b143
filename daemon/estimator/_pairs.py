"""Frequency pairs: preference tables, dual-frequency coefficients and satellite code biases.

Axes and symbols: ``m`` satellites; f1, f2 carrier frequencies (Hz) of band 1 and band 2 of the pair
in use; γ = (f1/f2)²; K (TECU per metre of geometry-free combination); α, β iono-free coefficients;
λ_WL wide-lane wavelength. Formulas: SCIENCE.md §2–§3 (standard first-order ionosphere relations).

A pair preference list per system comes from config (``[estimator.pairs]``) as "1C-2W" strings; a
lower-case attribute ``x`` ("1x-5x") is a wildcard that expands to every tracking mode of the band in
the order of :data:`ATTRIBUTE_ORDER`. The table is padded with signal code 0 (band 0 does not exist,
so the padding never matches a cell).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import SYSTEMS, signal_code

if TYPE_CHECKING:
    from collections.abc import Mapping, Sequence

    from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris

__all__ = [
    "ATTRIBUTE_ORDER",
    "C_MPS",
    "TECU_EL_PER_M2",
    "IonoCoefficients",
    "PairTable",
    "band_delays_s",
    "iono_coefficients",
    "satellite_bias_tecu",
]

F64 = npt.NDArray[np.float64]
#: Speed of light (IS-GPS-200 §20.3.4.3).
C_MPS = 299_792_458.0
#: 1 TECU = 10¹⁶ electrons/m²; first-order group delay I = 40.3·STEC/f² (SCIENCE.md §2).
TECU_EL_PER_M2 = 1e16
IONO_K_M3_PER_S2 = 40.3
#: Tracking-mode preference when a pair uses the wildcard attribute "x" (RINEX 3.05 Table 4–10
#: attribute letters; pilot/combined first, then data, then codeless).
ATTRIBUTE_ORDER = "CXQBPLSIDZWAYMEN"
#: Satellite-id system index → RINEX system letter (same order as ``SYSTEMS``).
N_SYSTEMS = len(SYSTEMS)


def _expand(spec: str) -> list[tuple[int, int, str]]:
    """Expand one "1C-2W" / "1x-5x" pair spec into exact (sig1, sig2, label) tuples."""
    try:
        left, right = spec.split("-")
    except ValueError as exc:
        raise ValueError(f"bad frequency pair {spec!r} (want e.g. '1C-2W')") from exc
    sides: list[list[str]] = []
    for side in (left, right):
        if len(side) != 2 or not side[0].isdigit():
            raise ValueError(f"bad frequency pair {spec!r} (want e.g. '1C-2W')")
        if side[1] == "x":
            sides.append([side[0] + a for a in ATTRIBUTE_ORDER])
        else:
            signal_code(side)  # validates
            sides.append([side])
    if left[0] == right[0]:
        raise ValueError(f"frequency pair {spec!r} uses one band twice")
    return [(signal_code(a), signal_code(b), f"{a}-{b}") for a in sides[0] for b in sides[1]]


@dataclass(frozen=True, slots=True)
class PairTable:
    """Ranked exact pairs per system: ``sig1[s, r]``, ``sig2[s, r]`` for system index s, rank r.

    ``labels[s][r]`` is "1C-2W"; ``label_of_code`` maps ``s * width + r`` to a label (flat, for
    vectorised gathers); padding entries carry signal code 0 and label "".
    """

    sig1: npt.NDArray[np.intp]
    sig2: npt.NDArray[np.intp]
    labels: tuple[tuple[str, ...], ...]
    label_of_code: npt.NDArray[np.object_]

    @property
    def width(self) -> int:
        return int(self.sig1.shape[1])

    @classmethod
    def from_config(cls, pairs: Mapping[str, Sequence[str]]) -> PairTable:
        per_sys: list[list[tuple[int, int, str]]] = [[] for _ in SYSTEMS]
        for letter, specs in pairs.items():
            if letter not in SYSTEMS:
                raise ValueError(f"unknown system {letter!r} in frequency pairs")
            seen: set[tuple[int, int]] = set()
            for spec in specs:
                for s1, s2, label in _expand(spec):
                    if (s1, s2) not in seen:
                        seen.add((s1, s2))
                        per_sys[SYSTEMS.index(letter)].append((s1, s2, label))
        width = max(1, *(len(p) for p in per_sys))
        sig1 = np.zeros((N_SYSTEMS, width), np.intp)
        sig2 = np.zeros((N_SYSTEMS, width), np.intp)
        flat = np.full(N_SYSTEMS * width, "", dtype=object)
        for s, plist in enumerate(per_sys):
            for r, (s1, s2, label) in enumerate(plist):
                sig1[s, r], sig2[s, r] = s1, s2
                flat[s * width + r] = label
        sig1.setflags(write=False)
        sig2.setflags(write=False)
        labels = tuple(tuple(label for _, _, label in p) for p in per_sys)
        return cls(sig1=sig1, sig2=sig2, labels=labels, label_of_code=flat)


@dataclass(frozen=True, slots=True)
class IonoCoefficients:
    """Dual-frequency coefficients per satellite (arrays of length m), SCIENCE.md §3."""

    gamma: F64  # (f1/f2)²
    k_tecu_per_m: F64  # K = f1²f2² / (40.3·(f1² − f2²)) / 10¹⁶
    alpha: F64  # f1²/(f1² − f2²)
    beta: F64  # −f2²/(f1² − f2²)
    noise_factor: F64  # √(α² + β²)
    lambda_wl_m: F64  # c/(f1 − f2)
    l1_m_per_tecu: F64  # 40.3·10¹⁶/f1²: metres of band-1 group delay per TECU


def iono_coefficients(f1_hz: F64, f2_hz: F64) -> IonoCoefficients:
    """The SCIENCE.md §3 coefficients for each (f1, f2), vectorised."""
    f1s = f1_hz * f1_hz
    f2s = f2_hz * f2_hz
    d = f1s - f2s
    alpha = f1s / d
    beta = -f2s / d
    return IonoCoefficients(
        gamma=f1s / f2s,
        k_tecu_per_m=f1s * f2s / (IONO_K_M3_PER_S2 * d) / TECU_EL_PER_M2,
        alpha=alpha,
        beta=beta,
        noise_factor=np.hypot(alpha, beta),
        lambda_wl_m=C_MPS / (f1_hz - f2_hz),
        l1_m_per_tecu=IONO_K_M3_PER_S2 * TECU_EL_PER_M2 / f1s,
    )


def band_delays_s(eph: KeplerEphemeris | GlonassEphemeris) -> npt.NDArray[np.float64]:
    """Satellite group delay per RINEX band digit (s, NaN = unknown) from the broadcast message.

    The delay ``d_b`` is what the satellite adds to a code on band b relative to the broadcast clock
    (so a pseudorange contains ``+c·d_b``):

    * GPS/QZSS (IS-GPS-200 §20.3.3.3.3.2): the L1 P(Y) user applies Δt_SV − T_GD and the L2 P(Y)
      user Δt_SV − γ·T_GD, γ = (1575.42/1227.6)², so d₁ = T_GD, d₂ = γ·T_GD (T_GD = (t_L1 − t_L2)/
      (1 − γ) as in the clause). L5 needs the CNAV ISC, not in LNAV: unknown.
    * Galileo (OS SIS ICD §5.1.5): BGD(E1,E5x) = (TR1 − TR5x)/(1 − (f1/f5x)²) is the same form, so
      d₁ = BGD and d₅ₐ = γ(E1,E5a)·BGD(E1,E5a), d₇ = γ(E1,E5b)·BGD(E1,E5b) relative to each
      navigation message's own clock; when both are broadcast (I/NAV) the band-1 delay of
      BGD(E1,E5b) is used for band 1 and both band-2 delays are kept, which gives the right
      *differences* d₂ − d₁ for either pair.
    * BeiDou (BDS-SIS-ICD-B1I §5.2.4.10): the clock refers to B3I; the B1I user applies Δt_SV − TGD1
      and the B2I user Δt_SV − TGD2, so d₂(B1I) = TGD1, d₇(B2I) = TGD2, d₆(B3I) = 0.
    * GLONASS FDMA (GLONASS ICD Ed. 5.1 Table 4.5, RTCM 10403.3 DF125): Δτ_n = t_f2 − t_f1 is the
      satellite's L2 minus L1 equipment delay, and τ_n is the clock of the L1 signal, so d₁ = 0,
      d₂ = Δτ_n, and the satellite part of K·(P2 − P1) is K·c·Δτ_n (sign from the clause's
      definition, from memory: confirm against the ICD text). Δτ_n = 0 means "not known" (what
      many receivers send, and RINEX 3 has no such field): unknown, so the satellite keeps its
      combined satellite + receiver group. The L3 CDMA delay is not broadcast in 1020: unknown.
      Its LSB (2⁻³⁰ s ≈ 0.93 ns) is 2.7 TECU on L1/L2: a coarse but unbiased satellite part.
    """
    out = np.full(10, np.nan)
    if not hasattr(eph, "tgd_s"):
        dtau = float(getattr(eph, "dtau_s", 0.0))
        if dtau != 0.0 and math.isfinite(dtau):
            out[1] = 0.0
            out[2] = dtau
        return out
    sys_letter = SYSTEMS[eph.sat // 100]
    t1, t2 = eph.tgd_s
    if sys_letter in "GJ":
        gamma = (1575.42 / 1227.60) ** 2
        out[1] = t1
        out[2] = gamma * t1
    elif sys_letter == "E":
        g_a = (1575.42 / 1176.45) ** 2
        g_b = (1575.42 / 1207.14) ** 2
        # Differences are what matter: d5 − d1 = (γa − 1)·BGDa, d7 − d1 = (γb − 1)·BGDb.
        base = t2 if math.isfinite(t2) else t1
        out[1] = base
        if math.isfinite(t1):
            out[5] = base + (g_a - 1.0) * t1
        if math.isfinite(t2):
            out[7] = base + (g_b - 1.0) * t2
    elif sys_letter == "C":
        out[2] = t1
        out[7] = t2
        out[6] = 0.0
    return out


def satellite_bias_tecu(
    delays_s: F64, band1: npt.NDArray[np.intp], band2: npt.NDArray[np.intp], k_tecu_per_m: F64
) -> F64:
    """The satellite part of K·(P2 − P1) in TECU: K·c·(d₂ − d₁), 0 where a delay is unknown.

    ``delays_s`` is (m, 10), one row per satellite (from :func:`band_delays_s`). For GPS L1/L2 this
    is K·c·(γ − 1)·T_GD = c·T_GD·f1²/(40.3·10¹⁶), i.e. c·T_GD divided by the L1 metres per TECU.
    """
    rows = np.arange(delays_s.shape[0])
    diff = delays_s[rows, band2] - delays_s[rows, band1]
    out = k_tecu_per_m * C_MPS * diff
    return np.where(np.isfinite(out), out, 0.0)
