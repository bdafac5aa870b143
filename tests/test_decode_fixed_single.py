"""Per-epoch shortcuts of the station's decode path (issue 8), each against the path it replaces.

* ``decode_epochs`` of one epoch (the daemon's usual feed) decodes it with ``_decode_one`` on
  2-D (row, cell) arrays: bit for bit the epoch of the general ``_decode_group`` (k = 1, 3-D
  arrays and per-epoch views), same dtypes, shapes, strides, NaN positions.
* ``StreamDecoder._on_rtcm`` looks a repeated ephemeris / station message up in its cache itself:
  the same messages (values, order) and counters as decoding every payload afresh.
* ``_msm._Layout.glo_slots`` is ``sat_ids - 100`` as ``learn_glo_channels`` computed it.
* ``StationPipeline.handle`` (``handle_one`` inlined): the outputs and counters of calling
  ``handle_one`` message by message.

Data: the simulator's invented quiet-day stream (MSM4 and MSM7, our own scenario data), and the
real RTCM 3 recording /work/shared/data/real/rtcm/RTK134_202102051543.rtcm3 (read in place).
Every comparison is between two of our own paths (no reference value is computed here).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationPipeline
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import GpsTime, ObsEpoch, StreamDecoder, _msm, _msm_epoch, _stream
from ionwarden.parsers._framer import Frame, Framer

from .test_decode_speed_epoch import _assert_same
from .test_pipeline_settle import _assert_same_outputs

_REAL = Path("/work/shared/data/real/rtcm/RTK134_202102051543.rtcm3")


def _sim(level: int, seconds: float = 30.0) -> tuple[list[Frame], GpsTime | None]:
    """The simulator's invented quiet-day stream at MSM ``level``, framed."""
    sc = build_scenario("quiet-day", duration_s=seconds)
    framer = Framer()
    frames: list[Frame] = []
    for _, data in iter_stream(Simulator(sc), 0, msm_level=level):
        frames += framer.feed(data)
    return frames + framer.feed(b""), sc.start


def _real() -> tuple[list[Frame], GpsTime | None]:
    if not _REAL.exists():
        pytest.skip("real RTCM recording not available")
    framer = Framer()
    return framer.feed(_REAL.read_bytes()) + framer.feed(b""), None


_SOURCES = {"sim-msm4": lambda: _sim(4), "sim-msm7": lambda: _sim(7), "real-rtk134": _real}


def _frame_by_frame(frames: list[Frame], ref: GpsTime | None, **kw: object) -> list[object]:
    """Each frame fed alone (each feed closes at most one epoch), then the end of the stream."""
    dec = StreamDecoder(reference_time=ref, **kw)  # type: ignore[arg-type]
    out: list[object] = [m for f in frames for m in dec.feed_frames([f])]
    return out + dec.feed_frames([], end_of_stream=True)


@pytest.mark.parametrize("source", sorted(_SOURCES))
def test_single_epoch_decode_equals_group_decode(monkeypatch, source):
    """One epoch per feed: ``_decode_one`` gives ``_decode_group``'s epochs bit for bit."""
    frames, ref = _SOURCES[source]()
    fast = [m for m in _frame_by_frame(frames, ref) if isinstance(m, ObsEpoch)]

    def general(lay, epoch):  # type: ignore[no-untyped-def]
        out = [None]
        _msm_epoch._decode_group(lay, [epoch], out, [0])
        return out[0]

    monkeypatch.setattr(_msm_epoch, "_decode_one", general)
    slow = [m for m in _frame_by_frame(frames, ref) if isinstance(m, ObsEpoch)]
    assert len(fast) == len(slow) > 10
    for a, b in zip(fast, slow, strict=True):
        _assert_same(a, b)


@pytest.mark.parametrize("source", sorted(_SOURCES))
def test_repeated_messages_equal_fresh_decodes(monkeypatch, source):
    """Messages served from the cache in ``_on_rtcm`` equal decoding each payload afresh (the
    cache emptied before every frame), in the same order, with the same statistics."""
    frames, ref = _SOURCES[source]()
    dec = StreamDecoder(reference_time=ref)
    cached = [m for f in frames for m in dec.feed_frames([f])]
    cached += dec.feed_frames([], end_of_stream=True)
    assert dec.statistics().decoded_by_type  # something was decoded

    fresh_dec = StreamDecoder(reference_time=ref)
    fresh: list[object] = []
    for f in frames:
        _stream._release_cache(fresh_dec._misc_cache)
        fresh_dec._eph_refs.clear()
        fresh += fresh_dec.feed_frames([f])
    fresh += fresh_dec.feed_frames([], end_of_stream=True)

    assert [type(m) for m in cached] == [type(m) for m in fresh]
    for a, b in zip(cached, fresh, strict=True):
        if isinstance(a, ObsEpoch):
            _assert_same(a, b)  # type: ignore[arg-type]
        elif dataclasses.is_dataclass(a) and any(
            isinstance(getattr(a, f.name), np.ndarray) for f in dataclasses.fields(a)
        ):
            for f in dataclasses.fields(a):
                x, y = getattr(a, f.name), getattr(b, f.name)
                assert np.array_equal(x, y, equal_nan=True) if isinstance(x, np.ndarray) else x == y
        else:
            assert a == b
    s1, s2 = dec.statistics(), fresh_dec.statistics()
    assert s1 == s2


def test_layout_glo_slots_are_sat_ids_minus_100():
    """The per-layout slot column is what ``learn_glo_channels`` computed per message."""
    frames, ref = _sim(7, 10.0)
    _frame_by_frame(frames, ref)
    layouts = list(_msm._LAYOUTS.values())
    assert any(lay.glo_fdma for lay in layouts)
    for lay in layouts:
        expected = lay.sat_ids.astype(np.intp) - 100
        assert lay.glo_slots.dtype == expected.dtype
        assert np.array_equal(lay.glo_slots, expected)
        assert not lay.glo_slots.flags.writeable


def test_pipeline_handle_equals_handle_one_per_message():
    """``handle`` of a chunk's messages: the outputs and counters of ``handle_one`` in turn."""
    sc = build_scenario("quiet-day", duration_s=20.0)
    chunks = [data for _, data in iter_stream(Simulator(sc), 0)]
    a = StationPipeline("HARC", reference_time=sc.start)
    b = StationPipeline("HARC", reference_time=sc.start)
    out_a: list[object] = []
    out_b: list[object] = []
    for chunk in chunks:
        out_a += a.handle([*a.decoder.feed(chunk), "no route"])
        for msg in [*b.decoder.feed(chunk), "no route"]:
            res = b.handle_one(msg)
            if res is not None:
                out_b.append(res)
    assert len(out_a) > 10
    _assert_same_outputs(out_a, out_b)
    assert a.counters == b.counters
    assert a.counters["ignored"] >= len(chunks)  # messages without a route: counted only
