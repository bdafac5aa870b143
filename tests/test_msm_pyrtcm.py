"""MSM4–7 decoder cross-checked field by field against pyrtcm on every real RTCM capture."""

from __future__ import annotations

import math

import numpy as np
import pytest
from pyrtcm import RTCMReader

from ionwarden.parsers import signal_name
from ionwarden.parsers._framer import Framer, RtcmFrame
from ionwarden.parsers._msm import MsmMessage, decode_msm, is_msm
from ionwarden.parsers._msm_tables import LOCK_TIME_DF402_S, LOCK_TIME_DF407_S

RTCM_FILES = [
    "RTK134_202102051543.rtcm3",
    "pygnssutils_ntrip_encode_none.bin",
    "pygnssutils_pygpsdata-rtcm3.log",
    "pyrtcm_pygpsdata-NTRIP-USCL00CHL0.log",
    "pyrtcm_pygpsdata-NTRIP.log",
    "pyrtcm_pygpsdata-MIXED-RTCM3.log",
    "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log",
]
#: Frames to skip between checks per file (1 = every MSM frame; the whole set takes a few seconds).
SAMPLE_STEP: dict[str, int] = {}

# pyrtcm labels satellites by PRN: QZSS 193…, SBAS 120… (pyrtcm rtcmtables PRN maps).
_PRN_OFFSET = {"G": 0, "R": 0, "E": 0, "C": 0, "I": 0, "J": 192, "S": 100}
_SYS_INDEX = {"G": 0, "R": 1, "E": 2, "C": 3, "J": 4, "S": 5, "I": 6}


def _msm_frames(path) -> list[RtcmFrame]:
    framer = Framer()
    frames = framer.feed(path.read_bytes()) + framer.feed(b"")
    return [f for f in frames if isinstance(f, RtcmFrame) and is_msm(f.msg_type)]


def _eq_nan(ours: float, ref: float, invalid: float | None, tol: float = 0.0) -> bool:
    if invalid is not None and ref == invalid:
        return math.isnan(ours)
    return abs(ours - ref) <= tol


def _check_against_pyrtcm(ours: MsmMessage, payload: bytes) -> None:
    ref = RTCMReader.parse(payload_frame(payload))
    assert int(ref.identity) == ours.msg_type
    assert ours.station_id == ref.DF003
    if ours.system == "R":
        assert (ours.glonass_day, ours.epoch_ms) == (ref.DF416, ref.DF034)
    else:
        epoch_field = {"G": "DF004", "E": "DF248", "C": "DF427", "J": "DF428", "S": "DF004"}
        assert getattr(ref, epoch_field.get(ours.system, "DF546")) == ours.epoch_ms
    assert int(ours.multiple_message) == ref.DF393
    assert ours.iods == ref.DF409
    assert ours.clock_steering == ref.DF411
    assert ours.external_clock == ref.DF412
    assert int(ours.smoothing) == ref.DF417
    assert ours.smoothing_interval == ref.DF418
    assert ref.NSat == len(ours.sat_ids)
    assert ref.NCell == len(ours)
    level = ours.msm_level
    for i in range(1, ref.NSat + 1):
        k = i - 1
        prn = int(getattr(ref, f"PRN_{i:02d}"))
        assert ours.sat_ids[k] == _SYS_INDEX[ours.system] * 100 + prn - _PRN_OFFSET[ours.system]
        df397 = getattr(ref, f"DF397_{i:02d}")
        df398 = getattr(ref, f"DF398_{i:02d}")
        if df397 == 255:  # RTCM 10403.3 DF397: 255 = invalid
            assert math.isnan(ours.rough_range_ms[k])
        else:
            assert ours.rough_range_ms[k] == df397 + df398
        if level in (5, 7):
            ext_name = "DF419" if ours.system == "R" else "ExtSatInfo"
            assert getattr(ref, f"{ext_name}_{i:02d}") == ours.sat_ext_info[k]
            assert _eq_nan(ours.rough_rate_mps[k], getattr(ref, f"DF399_{i:02d}"), -8192)
    fine_pr, fine_ph, lock, cn0 = (
        ("DF400", "DF401", "DF402", "DF403")
        if level in (4, 5)
        else ("DF405", "DF406", "DF407", "DF408")
    )
    pr_invalid = -(2**14) * 2**-24 if level in (4, 5) else -(2**19) * 2**-29
    ph_invalid = -(2**21) * 2**-29 if level in (4, 5) else -(2**23) * 2**-31
    lock_table = LOCK_TIME_DF402_S if level in (4, 5) else LOCK_TIME_DF407_S
    for i in range(1, ref.NCell + 1):
        k = i - 1
        cell_prn = int(getattr(ref, f"CELLPRN_{i:02d}"))
        assert ours.sat[k] == _SYS_INDEX[ours.system] * 100 + cell_prn - _PRN_OFFSET[ours.system]
        assert signal_name(int(ours.sig[k])) == getattr(ref, f"CELLSIG_{i:02d}")
        assert _eq_nan(ours.fine_pseudorange_ms[k], getattr(ref, f"{fine_pr}_{i:02d}"), pr_invalid)
        assert _eq_nan(ours.fine_phase_ms[k], getattr(ref, f"{fine_ph}_{i:02d}"), ph_invalid)
        lock_raw = getattr(ref, f"{lock}_{i:02d}")
        assert ours.lock_indicator[k] == lock_raw
        assert ours.lock_time_s[k] == lock_table[lock_raw] or math.isnan(lock_table[lock_raw])
        assert ours.half_cycle[k] == bool(getattr(ref, f"DF420_{i:02d}"))
        # DF403/DF408 = 0 means "not computed" (RTCM 10403.3); ours is NaN then.
        assert _eq_nan(float(ours.cn0_dbhz[k]), getattr(ref, f"{cn0}_{i:02d}"), 0)
        if level in (5, 7):
            # pyrtcm multiplies by 0.0001 in float; we do the same, so allow 1 ulp-ish.
            assert _eq_nan(ours.fine_rate_mps[k], getattr(ref, f"DF404_{i:02d}"), -1.6384, 1e-12)
    # Derived values: pseudorange = c/1000 · (rough + fine) (RTCM 10403.3 §3.5.12.3).
    c_ms = 299_792.458
    rough = ours.rough_range_ms[np.searchsorted(ours.sat_ids, ours.sat)]
    np.testing.assert_allclose(
        ours.pseudorange_m, (rough + ours.fine_pseudorange_ms) * c_ms, rtol=1e-15, atol=1e-9
    )


def payload_frame(payload: bytes) -> bytes:
    from ionwarden.parsers._crc import frame_rtcm

    return frame_rtcm(payload)


@pytest.mark.parametrize("name", RTCM_FILES)
def test_msm_decode_matches_pyrtcm(real_data, name):
    """decode_msm gives pyrtcm's value for every MSM field when fed each real capture."""
    frames = _msm_frames(real_data / "rtcm" / name)
    assert frames, f"no MSM4-7 frames in {name}"  # PROVENANCE.md lists MSM5/6/7 in each file
    for frame in frames[:: SAMPLE_STEP.get(name, 1)]:
        _check_against_pyrtcm(decode_msm(frame.payload), frame.payload)


def test_msm_glonass_frequency_from_msm7_channel(real_data):
    """decode_msm sets the GLONASS carrier from DF419 when the message is MSM7."""
    frames = _msm_frames(real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin")
    msg = decode_msm(next(f for f in frames if f.msg_type == 1087).payload)
    # pyrtcm decode of this frame: R02 DF419 = 3 → channel −4; L1 = 1602 + k·0.5625 MHz (GLONASS ICD).
    assert msg.sat_ext_info[0] == 3
    assert msg.glo_channel[0] == -4
    assert msg.freq_hz[0] == pytest.approx(1602e6 - 4 * 0.5625e6)
    assert not np.isnan(msg.phase_cycles).any()


def test_msm_glonass_msm5_without_channel_has_nan_frequency(real_data):
    """decode_msm leaves GLONASS frequency NaN when neither DF419 nor a channel table knows it."""
    frames = _msm_frames(real_data / "rtcm" / "RTK134_202102051543.rtcm3")
    payload = next(f for f in frames if f.msg_type == 1085).payload
    msg = decode_msm(payload)
    unknown = msg.sat_ext_info > 13  # DF419 14/15 = channel unknown (RTCM 10403.3)
    if unknown.any():
        cells = np.isin(msg.sat, msg.sat_ids[unknown])
        assert np.isnan(msg.freq_hz[cells]).all()
    table = np.full(65, 2, np.int8)
    msg2 = decode_msm(payload, table)
    assert not np.isnan(msg2.freq_hz).any()
