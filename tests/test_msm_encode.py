"""MSM4/MSM7 encoder: encode → StreamDecoder round trips within the field resolution (hypothesis)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers import EPOCH_DTYPES, GpsTime, ObsEpoch, frequencies_hz
from ionwarden.parsers._msm_encode import encode_msm
from ionwarden.parsers._msm_tables import MSM_SYSTEMS
from ionwarden.parsers._stream import StreamDecoder

C = 299_792_458.0
_LETTERS = "GRECJSI"


@st.composite
def epochs(draw) -> ObsEpoch:
    """Random multi-constellation epochs with physically shaped values."""
    week = draw(st.integers(2100, 2400))
    tow_ms = draw(st.integers(0, 604_799_999))
    time = GpsTime(week, tow_ms / 1000)
    rows = []
    channels = {}
    systems = draw(st.sets(st.sampled_from(sorted(MSM_SYSTEMS)), min_size=1, max_size=4))
    for block in sorted(systems):
        system = MSM_SYSTEMS[block]
        sig_codes = [int(c) for c in system.signals if c]
        sigs = draw(st.lists(st.sampled_from(sig_codes), min_size=1, max_size=3, unique=True))
        max_sats = max(1, 64 // len(sigs))
        bits = draw(
            st.lists(st.integers(1, 40), min_size=1, max_size=min(12, max_sats), unique=True)
        )
        for bit in bits:
            sat = system.sat_base + bit
            if system.letter == "R":
                channels[sat] = draw(st.integers(-7, 6))
            base = draw(st.floats(1.9e7, 3.8e7))
            rate = draw(st.floats(-900, 900))
            rows += [
                (
                    sat,
                    sig,
                    base + draw(st.floats(-50, 50)),
                    draw(st.floats(-500, 500)),
                    rate + draw(st.floats(-0.3, 0.3)),
                    draw(st.floats(20, 60)),
                    draw(st.floats(0, 900)),
                    draw(st.booleans()),
                )
                for sig in sigs
            ]
    sat = np.array([r[0] for r in rows], np.int16)
    sig = np.array([r[1] for r in rows], np.uint16)
    chan = np.array([channels.get(int(s), -128) for s in sat], np.int8)
    freq = frequencies_hz(sat, sig, chan)
    pr = np.array([r[2] for r in rows])
    return ObsEpoch(
        time=time,
        station_id=draw(st.integers(0, 4095)),
        sat=sat,
        sig=sig,
        pseudorange_m=pr,
        phase_cycles=(pr + np.array([r[3] for r in rows])) * freq / C,
        range_rate_mps=np.array([r[4] for r in rows]),
        cn0_dbhz=np.array([r[5] for r in rows], np.float32),
        lock_time_s=np.array([r[6] for r in rows], np.float32),
        lock_indicator=np.full(len(rows), -1, np.int16),
        half_cycle=np.array([r[7] for r in rows], np.bool_),
        lli=np.zeros(len(rows), np.uint8),
        freq_hz=freq,
    )


def _roundtrip(epoch: ObsEpoch, level: int) -> ObsEpoch:
    frames = encode_msm(epoch, level=level)
    decoder = StreamDecoder(reference_time=epoch.time + 3000.0)
    out = [m for m in decoder.feed(b"".join(frames)) + decoder.feed(b"") if isinstance(m, ObsEpoch)]
    assert len(out) == 1, decoder.statistics()
    return out[0]


def _aligned(a: ObsEpoch, b: ObsEpoch):
    ka = a.sat.astype(np.int64) * 1024 + a.sig
    kb = b.sat.astype(np.int64) * 1024 + b.sig
    ia, ib = np.argsort(ka), np.argsort(kb)
    assert (ka[ia] == kb[ib]).all()
    return ia, ib


@settings(max_examples=60, deadline=None)
@given(epochs())
def test_msm7_encode_decode_roundtrip(epoch):
    """encode_msm(level=7) then StreamDecoder returns each value within its MSM7 resolution (RTCM 10403.3 Tables 3.5-87/88)."""
    got = _roundtrip(epoch, 7)
    assert got.time == epoch.time
    assert got.station_id == epoch.station_id
    ia, ib = _aligned(epoch, got)
    # DF405: 2^-29 ms = 0.56 mm; DF406: 2^-31 ms; DF404: 1e-4 m/s; DF408: 2^-4 dB-Hz.
    np.testing.assert_allclose(got.pseudorange_m[ib], epoch.pseudorange_m[ia], rtol=0, atol=1e-3)
    np.testing.assert_allclose(got.phase_cycles[ib], epoch.phase_cycles[ia], rtol=0, atol=2e-3)
    np.testing.assert_allclose(got.range_rate_mps[ib], epoch.range_rate_mps[ia], rtol=0, atol=6e-5)
    np.testing.assert_allclose(got.cn0_dbhz[ib], epoch.cn0_dbhz[ia], rtol=0, atol=1 / 32 + 1e-6)
    np.testing.assert_allclose(got.freq_hz[ib], epoch.freq_hz[ia])  # GLONASS k via DF419
    assert (got.half_cycle[ib] == epoch.half_cycle[ia]).all()
    # DF407 (Table 3.5-75): the decoded minimum never exceeds the true lock time.
    assert (got.lock_time_s[ib] <= epoch.lock_time_s[ia] + 1e-6).all()
    assert (got.lock_time_s[ib] >= epoch.lock_time_s[ia] * 0.5 - 0.002).all()


@settings(max_examples=40, deadline=None)
@given(epochs())
def test_msm4_encode_decode_roundtrip(epoch):
    """encode_msm(level=4) then StreamDecoder returns each value within its MSM4 resolution (RTCM 10403.3 Tables 3.5-81/82)."""
    got = _roundtrip(epoch, 4)
    ia, ib = _aligned(epoch, got)
    # DF400: 2^-24 ms = 17.9 mm; DF401: 2^-29 ms; DF403: 1 dB-Hz; MSM4 has no rates.
    np.testing.assert_allclose(got.pseudorange_m[ib], epoch.pseudorange_m[ia], rtol=0, atol=0.01)
    glo = (epoch.sat[ia] // 100) == 1  # MSM4 carries no GLONASS channel: frequency unknown
    np.testing.assert_allclose(
        got.phase_cycles[ib][~glo], epoch.phase_cycles[ia][~glo], rtol=0, atol=2e-3
    )
    assert np.isnan(got.phase_cycles[ib][glo]).all()
    assert np.isnan(got.range_rate_mps).all()
    np.testing.assert_allclose(got.cn0_dbhz[ib], epoch.cn0_dbhz[ia], rtol=0, atol=0.5 + 1e-6)
    assert (got.lock_time_s[ib] <= epoch.lock_time_s[ia] + 1e-6).all()


def test_msm_encode_sets_multiple_message_bit_except_last():
    """encode_msm sets DF393 on every message but the last of the epoch (RTCM 10403.3 Table 3.5-78)."""
    sat = np.array([1, 101, 201, 301], np.int16)
    sig = np.array([34, 34, 34, 2 * 32 + 8], np.uint16)  # 1C, 1C, 1C, 2I
    n = sat.shape[0]
    arrays = {name: np.zeros(n, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(sat=sat, sig=sig, pseudorange_m=np.full(n, 2.2e7))
    epoch = ObsEpoch(time=GpsTime(2300, 1000.0), **arrays)
    frames = encode_msm(epoch, level=7)
    assert len(frames) == 4
    mmb = [(f[3 + 6] >> 1) & 1 for f in frames]  # message bit 54 = byte 6, second-lowest bit
    assert mmb == [1, 1, 1, 0]


def test_msm_encode_rejects_other_levels():
    """encode_msm raises ValueError for an MSM level other than 4 or 7."""
    with pytest.raises(ValueError):
        encode_msm(ObsEpoch.empty(GpsTime(2300, 0.0)), level=5)
