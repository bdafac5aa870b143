"""``_msm_epoch._decode_one`` on its ``_OnePlan`` (issue 8) against the general ``_decode_group``.

The plan reads only the rows an epoch's layout has (no rows of NaN for the rate of MSM4/6-only
layouts), scales only the rows that need it and looks C/N0 up by a unified code (DF403 read
4 bits lower, 16 times its value). The oracle is the previous code path, ``_decode_group`` with
one epoch (itself checked against per-message ``decode_msm``, which is checked against pyrtcm):
equal bit for bit, with the same dtypes, shapes, strides and flags (``_assert_same``).

Data: the simulator's invented quiet-day stream at MSM4 and MSM7, epochs mixing both levels
(and MSM4 + MSM7 of one system, whose repeated cells are dropped), and the real captures in
../shared/data/real/rtcm (read in place; PROVENANCE.md).
"""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import GpsTime, ObsEpoch, StreamDecoder, _msm_epoch
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._framer import Frame, Framer, RtcmFrame
from ionwarden.parsers._msm import MSM_TYPES

from .conftest import REAL_DATA
from .test_decode_speed_epoch import _assert_same
from .test_msm_epoch import _CAPTURES  # capture → reference time near it (PROVENANCE.md dates)


def _sim_seconds(level: int, seconds: float = 20.0) -> tuple[list[list[RtcmFrame]], GpsTime]:
    """The MSM frames of each second of the invented quiet-day stream at MSM ``level``."""
    sc = build_scenario("quiet-day", duration_s=seconds)
    out = []
    for _, data in iter_stream(Simulator(sc), 0, msm_level=level):
        frames = Framer().feed(data)
        out.append([f for f in frames if isinstance(f, RtcmFrame) and f.msg_type in MSM_TYPES])
    return out, sc.start


def _mixed(dup: bool) -> tuple[list[Frame], GpsTime]:
    """Epochs whose messages alternate MSM4 and MSM7 (by position, so the last one keeps its
    DF393 = 0); with ``dup`` the first system also comes as MSM7 right after its MSM4."""
    low, t0 = _sim_seconds(4)
    high, _ = _sim_seconds(7)
    frames: list[Frame] = []
    for a, b in zip(low, high, strict=True):
        assert [f.msg_type % 10 for f in a] == [4] * len(a)
        picked = [a[i] if i % 2 == 0 else b[i] for i in range(len(a))]
        if dup:
            picked.insert(1, b[0])
        frames += picked
    return Framer().feed(b"".join(frame_rtcm(f.payload) for f in frames)), t0


def _level(level: int) -> tuple[list[Frame], GpsTime]:
    seconds, t0 = _sim_seconds(level)
    return [f for s in seconds for f in s], t0


def _real(name: str) -> tuple[list[Frame], GpsTime]:
    path = REAL_DATA / "rtcm" / name
    assert path.is_file(), f"missing real capture at {path}"  # (as the real_data fixture)
    framer = Framer()
    return framer.feed(path.read_bytes()) + framer.feed(b""), _CAPTURES[name]


_SOURCES = {
    "sim-msm4": lambda: _level(4),
    "sim-msm7": lambda: _level(7),
    "sim-mixed-4-7": lambda: _mixed(False),
    "sim-mixed-4-7-repeated-system": lambda: _mixed(True),
    **{f"real-{name}": (lambda name=name: _real(name)) for name in _CAPTURES},
}


def _one_by_one(frames: list[Frame], ref: GpsTime) -> list[ObsEpoch]:
    """Each frame fed alone: every epoch decoded on its own (``decode_epochs`` of one epoch)."""
    dec = StreamDecoder(reference_time=ref)
    out = [m for f in frames for m in dec.feed_frames([f])]
    out += dec.feed_frames([], end_of_stream=True)
    return [m for m in out if isinstance(m, ObsEpoch)]


@pytest.mark.parametrize("source", sorted(_SOURCES))
def test_plan_decode_equals_group_decode(monkeypatch, source):
    frames, ref = _SOURCES[source]()
    fast = _one_by_one(frames, ref)

    def general(lay, epoch):  # type: ignore[no-untyped-def]
        out = [None]
        _msm_epoch._decode_group(lay, [epoch], out, [0])
        return out[0]

    monkeypatch.setattr(_msm_epoch, "_decode_one", general)
    slow = _one_by_one(frames, ref)
    assert len(fast) == len(slow) > 0
    for a, b in zip(fast, slow, strict=True):
        _assert_same(a, b)
    if source.startswith("sim-mixed"):  # both C/N0 codes and lock tables in one layout
        assert any(lay.lock_offset is not None for lay in _msm_epoch._LAYOUTS.values())


def test_plan_rows_by_layout():
    """MSM4-only layouts read 4 scaled rows (no rate), MSM7 ones 6; their rate is NaN or read,
    a new writeable array either way."""
    for level, nf in ((4, 4), (7, 6)):
        frames, ref = _level(level)
        epochs = _one_by_one(frames[:8], ref)
        assert epochs
        plans = {
            lay.one.nf for lay in _msm_epoch._LAYOUTS.values() if lay.sources == epochs[-1].sources
        }
        assert plans == {nf}
        rate = epochs[-1].range_rate_mps
        assert rate.flags.writeable
        assert not np.shares_memory(rate, epochs[-2].range_rate_mps)
        assert bool(np.isnan(rate).all()) == (level == 4)


def test_cn0_by_code_equals_scaled_cast():
    """RTCM 10403.3 DF408 (uint10, 2^-4 dB-Hz) and DF403 (uint6, 1 dB-Hz), 0 = not computed: the
    table's float32 values are the float64 scaled values cast, bit for bit (NaN included)."""
    df408 = np.arange(1024)
    want = np.where(df408 == 0, np.nan, df408 * 2.0**-4).astype(np.float32)
    assert _msm_epoch._CN0_BY_CODE.tobytes() == want.tobytes()
    df403 = np.arange(64)
    want403 = np.where(df403 == 0, np.nan, df403 * 1.0).astype(np.float32)
    assert _msm_epoch._CN0_BY_CODE[df403 * 16].tobytes() == want403.tobytes()
