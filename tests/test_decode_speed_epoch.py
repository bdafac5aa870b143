"""Shortcuts of the whole-epoch MSM decode (``_msm_epoch``), each against the path it replaces.

* Several epochs of one layout decoded together use the layout's arrays repeated per epoch
  (``_tiles``) in batches of at most ``_MAX_BATCH_ELEMENTS``: bit for bit the epochs of decoding
  each epoch alone (k = 1 uses the layout's own arrays), whatever the batch size, also with the
  tile cache bounded to one entry. The k = 1 decode is itself checked against ``decode_msm`` per
  message (tests/test_msm_epoch.py, pyrtcm-checked in tests/test_msm_pyrtcm.py).
* ``ObsEpoch`` values built field by field through the slot descriptors equal the dataclass
  constructor's (same type, the very same field objects).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import GpsTime, ObsEpoch, StreamDecoder, _msm_epoch
from ionwarden.parsers._framer import Frame, Framer

from .test_msm_epoch import _epoch


def _sim_frames() -> tuple[list[Frame], GpsTime]:
    """The simulator's invented quiet-day stream (MSM4 G/R/E/C with GLONASS FDMA, ephemerides,
    1005, NMEA), framed."""
    sc = build_scenario("quiet-day", duration_s=40.0)
    framer = Framer()
    frames: list[Frame] = []
    for _, data in iter_stream(Simulator(sc), 0):
        frames += framer.feed(data)
    return frames + framer.feed(b""), sc.start


def _msm7_frames() -> tuple[list[Frame], GpsTime]:
    """Invented MSM7 epochs (GPS, GLONASS, Galileo, BeiDou), with a satellite set change."""
    from ionwarden.parsers._msm_encode import encode_msm

    t0 = GpsTime(2300, 10.0)
    data = b"".join(
        b"".join(encode_msm(_epoch(t0 + k, sats), level=7))
        for k, sats in enumerate([[3, 5, 211, 305]] * 9 + [[3, 7, 108, 211, 305, 330]] * 11)
    )
    framer = Framer()
    return framer.feed(data) + framer.feed(b""), t0


def _decode(frames: list[Frame], ref: GpsTime, *, one_by_one: bool) -> list[ObsEpoch]:
    dec = StreamDecoder(reference_time=ref)
    if one_by_one:  # each feed closes at most one epoch: every epoch decoded alone (k = 1)
        out = [m for f in frames for m in dec.feed_frames([f])]
        out += dec.feed_frames([], end_of_stream=True)
    else:
        out = dec.feed_frames(frames, end_of_stream=True)
    return [m for m in out if isinstance(m, ObsEpoch)]


def _assert_same(a: ObsEpoch, b: ObsEpoch) -> None:
    """Same values bit for bit (NaN where NaN), dtypes, shapes and strides, field by field."""
    assert type(a) is type(b)
    for f in dataclasses.fields(ObsEpoch):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, np.ndarray):
            assert (x.dtype, x.shape, x.strides) == (y.dtype, y.shape, y.strides), f.name
            assert x.flags.writeable == y.flags.writeable, f.name
            assert x.tobytes() == y.tobytes(), f.name
        else:
            assert x == y, f.name


@pytest.mark.parametrize("source", [_sim_frames, _msm7_frames])
@pytest.mark.parametrize("batch_elements", [None, 1, 2_500])
def test_epoch_batches_equal_one_epoch_decodes(monkeypatch, source, batch_elements):
    """Epochs decoded in batches (repeated layout arrays) equal those decoded one by one (k = 1)."""
    frames, ref = source()
    if batch_elements is not None:  # 1: one epoch per batch; 2 500: several, a partial last one
        monkeypatch.setattr(_msm_epoch, "_MAX_BATCH_ELEMENTS", batch_elements)
    alone = _decode(frames, ref, one_by_one=True)
    together = _decode(frames, ref, one_by_one=False)
    assert len(alone) == len(together) > 10
    for a, b in zip(alone, together, strict=True):
        _assert_same(a, b)


def test_epoch_tile_cache_is_bounded(monkeypatch):
    """A tile cache of one entry still gives the one-by-one epochs, and never holds more."""
    frames, ref = _sim_frames()
    alone = _decode(frames, ref, one_by_one=True)
    monkeypatch.setattr(_msm_epoch, "_TILES", {})
    monkeypatch.setattr(_msm_epoch, "_MAX_TILES", 1)
    monkeypatch.setattr(_msm_epoch, "_MAX_BATCH_ELEMENTS", 3_000)  # batches of 2 and of 1
    for _ in range(2):  # second pass: hits and evictions
        for a, b in zip(alone, _decode(frames, ref, one_by_one=False), strict=True):
            _assert_same(a, b)
        assert len(_msm_epoch._TILES) <= 1


def test_epoch_built_by_slots_equals_constructor():
    """The decoder's ObsEpoch equals ObsEpoch(..., _validate=False) of the same field objects."""
    frames, ref = _msm7_frames()
    for ep in _decode(frames, ref, one_by_one=False):
        values = {f.name: getattr(ep, f.name) for f in dataclasses.fields(ObsEpoch)}
        assert values["_validate"] is False
        built = ObsEpoch(**values)
        assert type(built) is type(ep)
        for name, value in values.items():
            assert getattr(built, name) is value, name


def test_epoch_batches_of_empty_messages():
    """Epochs of MSM messages without satellites (no cells) decode in batches as one by one."""
    from ionwarden.parsers._crc import frame_rtcm

    bits = 22 * 8  # header (RTCM 10403.3 Table 3.5-78, 169 bits) in 22 bytes, empty masks
    data = b""
    for k in range(5):
        head = 1077 << (bits - 12)  # GPS MSM7, station 0
        head |= (10_000 + 1000 * k) << (bits - 54)  # DF004 epoch time (ms), DF393 = 0
        head |= 1 << (bits - 169)  # one signal in DF395, no satellite in DF394
        data += frame_rtcm(head.to_bytes(22, "big"))
    framer = Framer()
    frames = framer.feed(data) + framer.feed(b"")
    ref = GpsTime(2300, 0.0)
    alone = _decode(frames, ref, one_by_one=True)
    together = _decode(frames, ref, one_by_one=False)
    assert len(alone) == len(together) == 5
    for a, b in zip(alone, together, strict=True):
        assert len(a) == 0
        _assert_same(a, b)
