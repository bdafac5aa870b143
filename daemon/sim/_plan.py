"""Which signals each simulated satellite transmits, and their C/N0 and noise levels.

Signal codes are RINEX 3.04 observation codes (RINEX 3.04 Table 4). Carrier frequencies come from
``ionwarden.parsers.carrier_frequency_hz`` (IS-GPS-200 §3.3.1.1, IS-GPS-705 §3.3.1.1, Galileo OS SIS
ICD §2.3, BDS ICDs B1I/B3I/B2a, GLONASS ICD §3.3.1.4). Zenith C/N0 and noise scales are typical of a
geodetic receiver with a good antenna (common practice, invented values).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["SIGNAL_PLAN", "SignalSpec", "transmits"]


@dataclass(frozen=True, slots=True, kw_only=True)
class SignalSpec:
    """One signal: code, zenith C/N0 (dB-Hz), code and phase noise σ (m) at that C/N0."""

    code: str
    cn0_zenith_dbhz: float
    code_sigma_m: float
    phase_sigma_m: float

    @property
    def band(self) -> int:
        return int(self.code[0])


# Order matters: index 0 is the "L1" signal of the system (its first-order delay is the truth
# column ``iono_l1_m``), indices 0 and 1 form the iono-free pair of ``if_expected_m``.
SIGNAL_PLAN: dict[str, tuple[SignalSpec, ...]] = {
    "G": (
        SignalSpec(code="1C", cn0_zenith_dbhz=49.0, code_sigma_m=0.30, phase_sigma_m=0.0015),
        # L2 P(Y) semi-codeless tracking: lower C/N0 and noisier code (common practice).
        SignalSpec(code="2W", cn0_zenith_dbhz=42.0, code_sigma_m=0.45, phase_sigma_m=0.0025),
        SignalSpec(code="2L", cn0_zenith_dbhz=47.0, code_sigma_m=0.30, phase_sigma_m=0.0015),
        SignalSpec(code="5Q", cn0_zenith_dbhz=52.0, code_sigma_m=0.15, phase_sigma_m=0.0012),
    ),
    "R": (
        SignalSpec(code="1C", cn0_zenith_dbhz=48.0, code_sigma_m=0.45, phase_sigma_m=0.0018),
        SignalSpec(code="2C", cn0_zenith_dbhz=45.0, code_sigma_m=0.50, phase_sigma_m=0.0020),
    ),
    "E": (
        SignalSpec(code="1C", cn0_zenith_dbhz=48.0, code_sigma_m=0.25, phase_sigma_m=0.0015),
        SignalSpec(code="5Q", cn0_zenith_dbhz=51.0, code_sigma_m=0.12, phase_sigma_m=0.0012),
        SignalSpec(code="7Q", cn0_zenith_dbhz=50.0, code_sigma_m=0.12, phase_sigma_m=0.0012),
        SignalSpec(code="6C", cn0_zenith_dbhz=48.0, code_sigma_m=0.15, phase_sigma_m=0.0013),
    ),
    "C": (
        SignalSpec(code="2I", cn0_zenith_dbhz=46.0, code_sigma_m=0.35, phase_sigma_m=0.0016),
        SignalSpec(code="6I", cn0_zenith_dbhz=48.0, code_sigma_m=0.20, phase_sigma_m=0.0014),
        SignalSpec(code="7I", cn0_zenith_dbhz=47.0, code_sigma_m=0.30, phase_sigma_m=0.0015),
        SignalSpec(code="5P", cn0_zenith_dbhz=51.0, code_sigma_m=0.12, phase_sigma_m=0.0012),
    ),
}


def transmits(system: str, prn: int, code: str) -> bool:
    """Whether a simulated satellite carries a signal (invented fleet mix, common practice).

    GPS: L2C on all but PRNs ≡ 0 mod 7 (older blocks); L5 on PRNs with prn % 3 != 0.
    BeiDou: B2I (7I) only on BDS-2 (PRN ≤ 18), B2a (5P) only on BDS-3 (PRN ≥ 19).
    """
    if system == "G":
        if code == "2L":
            return prn % 7 != 0
        if code == "5Q":
            return prn % 3 != 0
    if system == "C":
        if code == "7I":
            return prn <= 18
        if code == "5P":
            return prn >= 19
    return True
