"""Whole-epoch MSM decoding (``_msm_epoch``) against per-message ``decode_msm`` + concatenation.

The reference is the assembly the stream used before epochs were decoded in one go: every
message through ``decode_msm`` (itself checked field by field against pyrtcm in
test_msm_pyrtcm.py and test_msm_pyrtcm_sim.py), concatenated in arrival order, a repeated cell
kept from the later message. Both must agree bit for bit (NaN where NaN).
"""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.bench import demo_capture
from ionwarden.parsers import EPOCH_DTYPES, GpsTime, ObsEpoch, StreamDecoder, _msm_epoch
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._framer import Framer, RtcmFrame
from ionwarden.parsers._msm import MsmMessage
from ionwarden.parsers._msm_encode import encode_msm

_NAMES = (
    "sat", "sig", "pseudorange_m", "phase_cycles", "range_rate_mps", "cn0_dbhz",
    "lock_time_s", "lock_indicator", "half_cycle", "freq_hz",
)  # fmt: skip

_CAPTURES = {
    # capture → reference time near it (PROVENANCE.md dates)
    "pygnssutils_ntrip_encode_none.bin": GpsTime(2328, 76_000.0),
    "RTK134_202102051543.rtcm3": GpsTime(2143, 488_000.0),
    "pygnssutils_pygpsdata-rtcm3.log": GpsTime(2196, 204_000.0),
    "pyrtcm_pygpsdata-MIXED-RTCM3.log": GpsTime(2196, 204_000.0),
    "pyrtcm_pygpsdata-NTRIP-USCL00CHL0.log": GpsTime(2305, 318_000.0),
}


def _reference(msgs: list[MsmMessage]) -> dict[str, np.ndarray]:
    """The per-message assembly: concatenate, then keep the later of two equal cells."""
    arrays = {k: np.concatenate([getattr(m, k) for m in msgs]) for k in _NAMES}
    if len({m.system for m in msgs}) < len(msgs):
        n = arrays["sat"].shape[0]
        key = arrays["sat"].astype(np.int32) * 1024 + arrays["sig"]
        _, first_rev = np.unique(key[::-1], return_index=True)
        keep = np.sort(n - 1 - first_rev)
        arrays = {k: v[keep] for k, v in arrays.items()}
    return arrays


def _check_stream(data: bytes, ref: GpsTime) -> int:
    """Feed ``data``; compare every epoch with the reference assembly of its messages."""
    dec = StreamDecoder(reference_time=ref, emit_msm=True)
    out = dec.feed(data) + dec.feed(b"")
    msgs = [m for m in out if isinstance(m, MsmMessage)]
    epochs = [m for m in out if isinstance(m, ObsEpoch)]
    assert epochs
    used = 0
    duplicates = 0
    for ep in epochs:
        part = msgs[used : used + len(ep.sources)]
        used += len(ep.sources)
        assert ep.sources == tuple(m.msg_type for m in part)
        want = _reference(part)  # decode_msm, pyrtcm-checked (test_msm_pyrtcm.py)
        duplicates += sum(len(m) for m in part) - want["sat"].shape[0]
        for name in _NAMES:
            got = getattr(ep, name)
            assert got.dtype == EPOCH_DTYPES[name], name
            np.testing.assert_array_equal(got, want[name], err_msg=name)
        np.testing.assert_array_equal(ep.lli, np.zeros(len(ep), np.uint8))  # RTCM has no LLI
    assert used == len(msgs)
    assert dec.statistics().duplicate_cells == duplicates
    return len(epochs)


@pytest.mark.parametrize("name", sorted(_CAPTURES))
def test_epoch_decode_equals_per_message_decode_on_real_captures(real_data, name):
    """Whole-epoch decode equals decode_msm per message, concatenated, on every real capture (pyrtcm-checked decode_msm)."""
    data = (real_data / "rtcm" / name).read_bytes()
    assert _check_stream(data, _CAPTURES[name]) > 0


def test_epoch_decode_equals_per_message_decode_on_bundled_demo():
    """Whole-epoch decode equals decode_msm per message on the bundled MSM4 demo (pyrtcm-checked decode_msm)."""
    assert _check_stream(demo_capture(), GpsTime(2300, 0.0)) > 100


def _epoch(t: GpsTime, sats: list[int]) -> ObsEpoch:
    """A small invented epoch: GPS 1C+2W, GLONASS 1C (channel +2), Galileo 1C, BeiDou 2I."""
    sig_of = {0: 34, 1: 34, 2: 34, 3: 2 * 32 + 8}
    sat = np.array(sats, np.int16)
    sig = np.array([sig_of[s // 100] for s in sats], np.uint16)
    freq = np.array(
        [
            {0: 1575.42e6, 1: 1602e6 + 2 * 0.5625e6, 2: 1575.42e6, 3: 1561.098e6}[s // 100]
            for s in sats
        ]
    )
    n = sat.size
    pr = 2.0e7 + 1e5 * np.arange(n) + t.tow_s
    return ObsEpoch(
        time=t,
        station_id=7,
        sat=sat,
        sig=sig,
        pseudorange_m=pr,
        phase_cycles=pr * freq / 299_792_458.0,
        range_rate_mps=np.linspace(-300.0, 300.0, n),
        cn0_dbhz=np.full(n, 45, np.float32),
        lock_time_s=np.full(n, 10, np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=np.arange(n) % 2 == 0,
        lli=np.zeros(n, np.uint8),
        freq_hz=freq,
    )


def _frames(data: bytes) -> list[RtcmFrame]:
    framer = Framer()
    return [f for f in framer.feed(data) + framer.feed(b"") if isinstance(f, RtcmFrame)]


def test_epoch_decode_layout_changes_mid_stream():
    """Satellites rising and setting (new masks every few epochs) decode as per message (pyrtcm-checked decode_msm)."""
    sets = [
        [3, 5, 103, 211, 305],
        [3, 5, 7, 103, 211, 305],
        [5, 7, 104, 211],
        [3, 5, 103, 211, 305],
    ]
    data = b"".join(
        b"".join(encode_msm(_epoch(GpsTime(2300, 100.0 + k), sets[(k // 3) % 4]), level=level))
        for k in range(24)
        for level in ((7,) if k % 2 else (4,))
    )
    assert _check_stream(data, GpsTime(2300, 0.0)) == 24


def test_epoch_decode_mixed_levels_in_one_epoch():
    """One epoch of GPS MSM4, GLONASS MSM7, Galileo MSM4, BeiDou MSM7 decodes as per message (pyrtcm-checked decode_msm)."""
    t = GpsTime(2300, 500.0)
    ep = _epoch(t, [3, 5, 103, 211, 305])
    by_level = {lvl: _frames(b"".join(encode_msm(ep, level=lvl))) for lvl in (4, 7)}
    picked = [by_level[4][0], by_level[7][1], by_level[4][2], by_level[7][3]]  # G R E C
    data = b"".join(frame_rtcm(f.payload) for f in picked)
    assert _check_stream(data, GpsTime(2300, 0.0)) == 1


def test_epoch_layout_cache_hit_equals_fresh_build(monkeypatch, real_data):
    """A cached epoch layout decodes as a freshly built one, and the cache is cleared when full."""
    data = (real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes()
    ref = GpsTime(2328, 76_000.0)

    def run() -> list[ObsEpoch]:
        dec = StreamDecoder(reference_time=ref)
        return [m for m in dec.feed(data) + dec.feed(b"") if isinstance(m, ObsEpoch)]

    monkeypatch.setattr(_msm_epoch, "_LAYOUTS", {})
    warm = run()  # builds then reuses layouts
    layouts = len(_msm_epoch._LAYOUTS)
    assert 0 < layouts < len(warm)
    monkeypatch.setattr(_msm_epoch, "_MAX_EPOCH_LAYOUTS", 1)
    monkeypatch.setattr(_msm_epoch, "_LAYOUTS", {})
    cold = run()  # clears the cache at each new layout
    assert len(_msm_epoch._LAYOUTS) == 1
    assert len(cold) == len(warm)
    for a, b in zip(warm, cold, strict=True):
        assert a.time == b.time
        assert a.sources == b.sources
        for name in _NAMES:
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)


def test_epoch_arrays_owned_except_shared_read_only_columns():
    """Measured columns are new arrays per epoch; layout columns are shared only read-only."""
    data = b"".join(
        b"".join(encode_msm(_epoch(GpsTime(2300, 10.0 + k), [3, 5, 211, 305]), level=7))
        for k in range(2)
    )
    dec = StreamDecoder(reference_time=GpsTime(2300, 0.0))
    a, b = [m for m in dec.feed(data) + dec.feed(b"") if isinstance(m, ObsEpoch)]
    for name in ("pseudorange_m", "phase_cycles", "range_rate_mps", "cn0_dbhz", "lock_time_s",
                 "lock_indicator", "half_cycle"):  # fmt: skip
        x, y = getattr(a, name), getattr(b, name)
        assert not np.shares_memory(x, y), name
        assert x.flags.writeable, name
    for name in ("sat", "sig", "freq_hz", "lli"):
        assert not getattr(a, name).flags.writeable, name
