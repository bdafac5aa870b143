"""Dual-frequency constants and satellite code biases, recomputed from the ICD frequencies."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.estimator import PairTable, band_delays_s, iono_coefficients
from ionwarden.daemon.estimator._pairs import satellite_bias_tecu
from ionwarden.parsers import KeplerEphemeris, carrier_frequency_hz, signal_code

C = 299_792_458.0

# SCIENCE.md §3 table; frequencies IS-GPS-200 §3.3.1.1 (L1, L2), IS-GPS-705 §3.3.1.1 (L5),
# Galileo OS SIS ICD §2.3 (E1, E5a, E5b), BDS B1I ICD §4.2 / B3I ICD (B1I, B3I, B2I),
# GLONASS ICD Ed. 5.1 §3.3.1.4 (k = 0: 1602, 1246 MHz).
TABLE = [
    (("G", 1), ("G", 2), 2.5457, -1.5457, 2.978, 9.520, 0.8619),
    (("G", 1), ("G", 5), 2.2606, -1.2606, 2.588, 7.764, 0.7514),
    (("E", 1), ("E", 5), 2.2606, -1.2606, 2.588, 7.764, 0.7514),
    (("E", 1), ("E", 7), 2.4220, -1.4220, 2.809, 8.758, 0.8140),
    (("C", 2), ("C", 6), 2.9437, -1.9437, 3.527, 11.754, 1.0247),
    (("C", 2), ("C", 7), 2.4872, -1.4872, 2.898, 8.993, 0.8470),
    (("R", 1), ("R", 2), 2.5312, -1.5312, 2.958, 9.751, 0.8421),
    (("G", 2), ("G", 5), 12.2553, -11.2553, 16.640, 42.089, 5.8610),
]


@pytest.mark.parametrize("row", TABLE, ids=lambda r: f"{r[0][0]}{r[0][1]}-{r[1][1]}")
def test_iono_coefficients_match_science_table(row):
    """iono_coefficients reproduces SCIENCE.md §3 (α, β, noise, K, λ_WL) from ICD frequencies."""
    (s1, b1), (s2, b2), alpha, beta, noise, k, lwl = row
    ch = 0 if s1 == "R" else None
    f1 = np.array([carrier_frequency_hz(s1, b1, ch)])
    f2 = np.array([carrier_frequency_hz(s2, b2, ch)])
    co = iono_coefficients(f1, f2)
    assert co.alpha[0] == pytest.approx(alpha, abs=1e-4)
    assert co.beta[0] == pytest.approx(beta, abs=1e-4)
    assert co.alpha[0] + co.beta[0] == pytest.approx(1.0, abs=1e-12)  # α + β = 1 (SCIENCE.md §3)
    assert co.noise_factor[0] == pytest.approx(noise, abs=1e-3)
    assert co.k_tecu_per_m[0] == pytest.approx(k, abs=1e-3)
    assert co.lambda_wl_m[0] == pytest.approx(lwl, abs=1e-4)


def test_iono_coefficients_tecu_in_l1_metres():
    """iono_coefficients gives 1 TECU = 0.1624 m on L1 and 0.1654 m on B1I (SCIENCE.md §2)."""
    co = iono_coefficients(np.array([1575.42e6, 1561.098e6]), np.array([1227.6e6, 1268.52e6]))
    assert co.l1_m_per_tecu[0] == pytest.approx(0.1624, abs=1e-4)
    assert co.l1_m_per_tecu[1] == pytest.approx(0.1654, abs=1e-4)
    # γ = (f1/f2)² = 1.6469 for GPS L1/L2 (IS-GPS-200 §20.3.3.3.3.2)
    assert co.gamma[0] == pytest.approx(1.6469, abs=1e-4)


def _eph(sat: int, tgd: tuple[float, float]) -> KeplerEphemeris:
    return KeplerEphemeris(
        sat=sat, week=2350, toe_s=0.0, toc_s=0.0, sqrt_a=5153.0, e=0.01, i0=0.9, omega0=0.0,
        omega=0.0, m0=0.0, delta_n=0.0, idot=0.0, omega_dot=0.0, cuc=0.0, cus=0.0, crc=0.0,
        crs=0.0, cic=0.0, cis=0.0, af0=0.0, af1=0.0, af2=0.0, iode=1, iodc=1, tgd_s=tgd,
        health=0, fit_interval_h=4.0, accuracy_m=2.0,
        time_system="BDT" if sat // 100 == 3 else "GPS",
    )  # fmt: skip


def test_band_delays_gps_tgd_gives_l1_metres_over_tecu():
    """band_delays_s/satellite_bias_tecu turn GPS T_GD into c·T_GD/0.1624 TECU on L1/L2 (IS-GPS-200 §20.3.3.3.3.2)."""
    tgd = 5e-9
    d = band_delays_s(_eph(7, (tgd, float("nan"))))
    gamma = (1575.42 / 1227.6) ** 2
    assert d[1] == pytest.approx(tgd)  # L1 P(Y): Δt_SV − T_GD
    assert d[2] == pytest.approx(gamma * tgd)  # L2 P(Y): Δt_SV − γ·T_GD
    co = iono_coefficients(np.array([1575.42e6]), np.array([1227.6e6]))
    b = satellite_bias_tecu(d[None, :], np.array([1]), np.array([2]), co.k_tecu_per_m)
    assert b[0] == pytest.approx(C * tgd / co.l1_m_per_tecu[0], rel=1e-9)
    # L5 is not covered by LNAV T_GD: unknown → 0 (IS-GPS-705 ISC needs CNAV).
    assert satellite_bias_tecu(d[None, :], np.array([1]), np.array([5]), co.k_tecu_per_m)[0] == 0.0


def test_band_delays_beidou_tgd_relative_to_b3i():
    """band_delays_s puts TGD1 on B1I, TGD2 on B2I and 0 on B3I (BDS-SIS-ICD-B1I §5.2.4.10)."""
    d = band_delays_s(_eph(323, (3e-9, -2e-9)))
    assert (d[2], d[7], d[6]) == (3e-9, -2e-9, 0.0)
    co = iono_coefficients(np.array([1561.098e6]), np.array([1268.52e6]))
    b = satellite_bias_tecu(d[None, :], np.array([2]), np.array([6]), co.k_tecu_per_m)
    assert b[0] == pytest.approx(-co.k_tecu_per_m[0] * C * 3e-9)  # K·c·(d_B3I − d_B1I)


def test_band_delays_galileo_bgd_differences():
    """band_delays_s gives d5a − d1 = (γ−1)·BGD(E1,E5a) and d7 − d1 = (γ−1)·BGD(E1,E5b) (Galileo OS SIS ICD §5.1.5)."""
    d = band_delays_s(_eph(211, (2e-9, 1e-9)))
    assert d[5] - d[1] == pytest.approx(((1575.42 / 1176.45) ** 2 - 1) * 2e-9)
    assert d[7] - d[1] == pytest.approx(((1575.42 / 1207.14) ** 2 - 1) * 1e-9)


def test_pair_table_expands_wildcards_in_order():
    """PairTable keeps config order and expands the 'x' attribute wildcard (RINEX 3.05 Table 4 attributes)."""
    table = PairTable.from_config({"G": ["1C-2W", "1C-2x"], "E": ["1C-5Q"]})
    g = table.labels[0]
    assert g[0] == "1C-2W"
    assert "1C-2L" in g
    assert g.count("1C-2W") == 1
    assert table.sig1[2, 0] == signal_code("1C")
    assert table.sig2[2, 0] == signal_code("5Q")
    with pytest.raises(ValueError, match="bad frequency pair"):
        PairTable.from_config({"G": ["1C2W"]})
