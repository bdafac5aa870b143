"""MSM constant tables and invalid-value handling (RTCM 10403.3 §3.5.12)."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.parsers import GpsTime, ObsEpoch, signal_name
from ionwarden.parsers._errors import ParseError
from ionwarden.parsers._msm import decode_msm, is_msm
from ionwarden.parsers._msm_encode import encode_msm
from ionwarden.parsers._msm_tables import LOCK_TIME_DF402_S, LOCK_TIME_DF407_S, MSM_SYSTEMS


@pytest.mark.parametrize(
    ("indicator", "seconds"),
    # RTCM 10403.3 Table 3.5-74 (DF402): 0 → 0, 1 → 32 ms, i → 2^(i+4) ms, 15 → 524 288 ms.
    [(0, 0.0), (1, 0.032), (2, 0.064), (8, 4.096), (15, 524.288)],
)
def test_msm_lock_time_df402_table(indicator, seconds):
    """LOCK_TIME_DF402_S gives the minimum lock time of RTCM 10403.3 Table 3.5-74."""
    assert LOCK_TIME_DF402_S[indicator] == pytest.approx(seconds, rel=1e-7)


@pytest.mark.parametrize(
    ("indicator", "ms"),
    # RTCM 10403.3 Table 3.5-75 (DF407): 0–63 → i ms; 64–95 → 2i − 64; 96–127 → 4i − 256;
    # 128–159 → 8i − 768; 480–511 → 16384i − 7 340 032; 704 → 67 108 864 ms.
    [
        (0, 0),
        (63, 63),
        (64, 64),
        (95, 126),
        (96, 128),
        (127, 252),
        (128, 256),
        (500, 16384 * 500 - 7_340_032),
        (704, 67_108_864),
    ],
)
def test_msm_lock_time_df407_table(indicator, ms):
    """LOCK_TIME_DF407_S gives the minimum lock time of RTCM 10403.3 Table 3.5-75."""
    assert LOCK_TIME_DF407_S[indicator] == pytest.approx(ms / 1000, rel=1e-7)


def test_msm_lock_time_df407_reserved_is_nan():
    """LOCK_TIME_DF407_S is NaN for the reserved indicators 705–1023 (RTCM 10403.3 Table 3.5-75)."""
    assert np.isnan(LOCK_TIME_DF407_S[705:]).all()
    assert (np.diff(LOCK_TIME_DF407_S[:705]) > 0).all()


@pytest.mark.parametrize(
    ("block", "sig_id", "rinex"),
    [
        (107, 2, "1C"), (107, 10, "2W"), (107, 16, "2L"), (107, 23, "5Q"),  # Table 3.5-91 GPS
        (108, 2, "1C"), (108, 9, "2P"),  # Table 3.5-96 GLONASS
        (109, 2, "1C"), (109, 15, "7Q"), (109, 23, "5Q"), (109, 20, "8X"),  # Table 3.5-99 Galileo
        (111, 2, "1C"), (111, 16, "2L"),  # Table 3.5-105 QZSS
        (112, 2, "2I"), (112, 8, "6I"), (112, 14, "7I"), (112, 25, "7D"),  # Table 3.5-108 BeiDou
        (110, 2, "1C"), (113, 22, "5A"),  # SBAS; NavIC (from memory)
    ],
)  # fmt: skip
def test_msm_signal_tables(block, sig_id, rinex):
    """MSM signal ids map to the RINEX codes of the RTCM 10403.3 signal tables (as pyrtcm's rtcmtables)."""
    assert signal_name(int(MSM_SYSTEMS[block].signals[sig_id])) == rinex


def test_msm_is_msm_covers_msm4_to_7_only():
    """is_msm accepts MSM4–7 of every system and rejects MSM1–3 and other messages (RTCM 10403.3 Table 3.5-1)."""
    assert all(is_msm(b * 10 + k) for b in range(107, 114) for k in (4, 5, 6, 7))
    assert not any(is_msm(t) for t in (1071, 1072, 1073, 1019, 1230, 4072, 1078))


def test_msm_invalid_values_become_nan():
    """decode_msm turns the 'invalid' codes (most negative fine value, CN0 0) into NaN (RTCM 10403.3 DF400–DF408)."""
    n = 3
    epoch = ObsEpoch(
        time=GpsTime(2300, 50.0),
        sat=np.array([4, 4, 9], np.int16),
        sig=np.array([34, 2 * 32 + 22, 34], np.uint16),  # 1C, 2W, 1C
        pseudorange_m=np.array([2.2e7, np.nan, 2.4e7]),
        phase_cycles=np.array(
            [np.nan, 2.2e7 * 1227.6e6 / 299_792_458.0, 2.4e7 * 1575.42e6 / 299_792_458.0]
        ),
        range_rate_mps=np.array([np.nan, np.nan, 12.0]),
        cn0_dbhz=np.array([np.nan, 40.0, 45.0], np.float32),
        lock_time_s=np.zeros(n, np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=np.zeros(n, np.bool_),
        lli=np.zeros(n, np.uint8),
        freq_hz=np.array([1575.42e6, 1227.6e6, 1575.42e6]),
    )
    (frame,) = encode_msm(epoch, level=7)
    msg = decode_msm(frame[3:-3])
    assert np.isnan(msg.phase_cycles[0])
    assert np.isnan(msg.pseudorange_m[1])
    assert np.isnan(msg.range_rate_mps[:2]).all()
    assert np.isnan(msg.cn0_dbhz[0])
    assert msg.pseudorange_m[2] == pytest.approx(2.4e7, abs=1e-3)


def test_msm_truncated_payload_raises_parse_error():
    """decode_msm raises ParseError naming the message when the payload is shorter than its masks need."""
    n = 2
    epoch = ObsEpoch(
        time=GpsTime(2300, 1.0),
        sat=np.array([4, 9], np.int16),
        sig=np.array([34, 34], np.uint16),
        pseudorange_m=np.array([2.2e7, 2.4e7]),
        phase_cycles=np.full(n, np.nan),
        range_rate_mps=np.full(n, np.nan),
        cn0_dbhz=np.full(n, 40.0, np.float32),
        lock_time_s=np.zeros(n, np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=np.zeros(n, np.bool_),
        lli=np.zeros(n, np.uint8),
        freq_hz=np.full(n, 1575.42e6),
    )
    (frame,) = encode_msm(epoch, level=7)
    with pytest.raises(ParseError, match="1077"):
        decode_msm(frame[3:35])
    with pytest.raises(ParseError):
        decode_msm(frame[3:20])  # shorter than the 169-bit header
    assert encode_msm(ObsEpoch.empty(GpsTime(2300, 1.0))) == []
