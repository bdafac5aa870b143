"""Shortcuts of the live decode path, each against the general path it replaces (bit for bit).

* ``StreamDecoder(emit_nmea_other=False)``: the sentences that would come out as ``NmeaOther`` are
  checked and counted but not returned; everything else, and every counter, is unchanged.
* ``decode_wanted``: ``decode_sentence`` with ``None`` in place of ``NmeaOther``.
* ``_msm_epoch`` GLONASS FDMA frequencies cached per layout by the channels: equal to computing
  them each epoch (``frequencies_hz``, GLONASS ICD Ed. 5.1 §3.3.1.4), also after a change.
* ``_framer``: frames built through the slot descriptors equal the dataclass constructor's; the
  CRC rows of a run cached by frame lengths give the CRC-24Q of every frame (``crc24q_fast``).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import ObsEpoch, ParseError, _msm_epoch, _nmea_fast
from ionwarden.parsers._framer import (
    _RUN_ROWS,
    Framer,
    NmeaFrame,
    RtcmFrame,
    _crc_run,
    _nmea_frame,
    _rtcm_frame,
    crc24q_fast,
)
from ionwarden.parsers._msm import parse_msm_head
from ionwarden.parsers._nmea import NmeaOther, decode_sentence, decode_wanted
from ionwarden.parsers._signals import frequencies_hz
from ionwarden.parsers._stream import StreamDecoder

from .conftest import REAL_DATA
from .test_nmea import NMEA_FILES, candidates
from .test_stream_nmea import _sentence

_WANTED = (None, frozenset(), frozenset({"GGA", "GST"}), frozenset({"GGA", "GST", "GSV"}))


def _sim_bytes(seconds: float) -> tuple[list[bytes], object]:
    """The simulator's invented quiet-day stream (MSM4 G/R/E/C, ephemerides, 1005, NMEA), one
    chunk per second."""
    sc = build_scenario("quiet-day", duration_s=seconds)
    return [d for _, d in iter_stream(Simulator(sc), 0)], sc.start


_GGA = _sentence(b"GPGGA,092725.00,4717.11399,N,00833.91590,E,1,08,1.01,499.6,M,48.0,M,,")
#: Rejected sentences (AIS "!", no address, bad address) around good ones: errors must stay.
_REJECTS = (
    _GGA
    + _sentence(b"AIVDM,1,1,,A,13u?etPv2;0n:dDPwUM1U1Cb069D,0", start=b"!")
    + _sentence(b"")
    + _sentence(b"GP-GA,1")
    + _sentence(b"PUBX,00,1")
    + _GGA
)


def _same_value(x: object, y: object) -> bool:
    if isinstance(x, np.ndarray) and isinstance(y, np.ndarray):
        return x.dtype == y.dtype and np.array_equal(x, y, equal_nan=x.dtype.kind in "fc")
    return bool(x == y) or (x != x and y != y)  # NaN fields equal NaN


def _same(a: object, b: object) -> bool:
    """Same type and, field by field, equal values (arrays: dtype and values, NaN where NaN)."""
    if type(a) is not type(b):
        return False
    if not dataclasses.is_dataclass(a):
        return a == b
    return all(_same_value(getattr(a, f.name), getattr(b, f.name)) for f in dataclasses.fields(a))


def _decode(chunks: list[bytes], ref: object, wanted: frozenset[str] | None, *, emit: bool):
    dec = StreamDecoder(ref, emit_nmea_other=emit)  # type: ignore[arg-type]
    dec.nmea_wanted = wanted
    out = []
    for chunk in [*chunks, b""]:
        out += dec.feed(chunk)
    return out, dec.statistics()


def _check_skip_equals_general(chunks: list[bytes], ref: object) -> None:
    for wanted in _WANTED:
        full, s_full = _decode(chunks, ref, wanted, emit=True)
        lean, s_lean = _decode(chunks, ref, wanted, emit=False)
        others = [m for m in full if isinstance(m, NmeaOther)]
        kept = [m for m in full if not isinstance(m, NmeaOther)]
        assert len(lean) == len(kept)
        assert all(_same(a, b) for a, b in zip(lean, kept, strict=True))
        assert s_full.nmea_skipped == 0
        assert s_lean.nmea_skipped == len(others)
        assert s_lean == dataclasses.replace(s_full, nmea_skipped=len(others))


def test_stream_skip_other_equals_general_path_on_sim_stream() -> None:
    """StreamDecoder(emit_nmea_other=False) returns what the default returns minus NmeaOther, with
    the same statistics (plus nmea_skipped), on the simulator's stream, with and without a
    reference time (RMC dates the stream while there is none)."""
    chunks, start = _sim_bytes(20.0)
    _check_skip_equals_general(chunks, start)
    _check_skip_equals_general(chunks, None)


def test_stream_skip_other_equals_general_path_on_real_nmea() -> None:
    """StreamDecoder(emit_nmea_other=False) equals the default minus NmeaOther on real captures
    (PROVENANCE.md), fed whole and in 97-byte pieces, and on rejected sentences (errors, offsets)."""
    for name in ("pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea", "pynmeagps_pygpsdata-nmea2.log"):
        data = (REAL_DATA / "nmea" / name).read_bytes()
        _check_skip_equals_general([data], None)
        _check_skip_equals_general([data[i : i + 97] for i in range(0, len(data), 97)], None)
    _check_skip_equals_general([_REJECTS], None)
    _check_skip_equals_general([_REJECTS[i : i + 1] for i in range(len(_REJECTS))], None)
    _, stats = _decode([_REJECTS], None, frozenset({"GGA"}), emit=False)
    assert (stats.nmea_decoded, stats.nmea_errors, stats.nmea_skipped) == (3, 3, 1)  # PUBX


def _outcome(fn, raw: bytes, wanted, checked: bool) -> object:  # type: ignore[no-untyped-def]
    try:
        return fn(raw, wanted, checked=checked)
    except ParseError as exc:
        return ("error", str(exc))


def test_decode_wanted_equals_decode_sentence_on_real_sentences() -> None:
    """decode_wanted gives decode_sentence's value or error, and None exactly where that is an
    NmeaOther, for every sentence candidate of the real NMEA captures (PROVENANCE.md)."""
    n = 0
    for path in NMEA_FILES:
        for raw in candidates(path.read_bytes()):
            for wanted in _WANTED:
                for checked in (False, True):
                    general = _outcome(decode_sentence, raw, wanted, checked)
                    lean = _outcome(decode_wanted, raw, wanted, checked)
                    if isinstance(general, NmeaOther):
                        assert lean is None
                    else:
                        assert lean == general
                    n += 1
    assert n > 1000


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=90), st.sampled_from(_WANTED), st.booleans())
def test_decode_wanted_equals_decode_sentence_on_arbitrary_bytes(raw, wanted, checked) -> None:  # type: ignore[no-untyped-def]
    """decode_wanted agrees with decode_sentence (None for NmeaOther) on arbitrary bytes."""
    for candidate in (raw, b"$" + raw, _sentence(raw)):
        general = _outcome(decode_sentence, candidate, wanted, checked)
        lean = _outcome(decode_wanted, candidate, wanted, checked)
        assert lean == (None if isinstance(general, NmeaOther) else general)


# --- GLONASS frequencies cached per layout and channels ------------------------------------------


def _glonass_epoch_heads() -> tuple[list, object]:  # type: ignore[type-arg]
    """The MSM heads of one simulator epoch, with GLONASS channels as the stream decoder sets."""
    chunks, start = _sim_bytes(3.0)
    dec = StreamDecoder(start)
    for chunk in chunks[:-1]:
        dec.feed(chunk)
    heads = []
    for frame in Framer().feed(chunks[-1]):
        if isinstance(frame, RtcmFrame) and 1071 <= frame.msg_type <= 1137:
            head = parse_msm_head(frame.payload)
            if head.system == "R":
                head.glo_channels = dec._glo_channels[head.layout.sat_ids.astype(np.intp) - 100]
            heads.append(head)
    assert any(h.system == "R" for h in heads)
    return heads, start


def _epoch_columns(heads: list, start: object, k: int) -> list[ObsEpoch]:  # type: ignore[type-arg]
    epochs, _ = _msm_epoch.decode_epochs([(heads, start, 0)] * k)  # type: ignore[list-item]
    return epochs


def test_glonass_channel_cache_equals_uncached_decode() -> None:
    """An epoch decoded with its GLONASS frequencies from the layout's cache equals the same epoch
    decoded with an empty cache, bit for bit, alone (live) and in a batch (replay); after a
    channel change the frequencies follow the new channels (GLONASS ICD Ed. 5.1 §3.3.1.4 via
    frequencies_hz)."""
    heads, start = _glonass_epoch_heads()
    for k in (1, 3):
        _msm_epoch._LAYOUTS.clear()
        cold = _epoch_columns(heads, start, k)
        warm = _epoch_columns(heads, start, k)  # cache filled by the cold decode
        assert all(_same(a, b) for a, b in zip(cold, warm, strict=True))
        assert not warm[0].freq_hz.flags.writeable
    glo = next(h for h in heads if h.system == "R")
    known = np.flatnonzero(glo.glo_channels != -128)
    assert known.shape[0] > 0
    changed = glo.glo_channels.copy()
    changed[known[0]] = 6 if changed[known[0]] != 6 else -7
    before = _epoch_columns(heads, start, 1)[0]
    glo.glo_channels = changed
    after = _epoch_columns(heads, start, 1)[0]  # new channel bytes: cache miss
    lay = next(iter(_msm_epoch._LAYOUTS.values()))
    _msm_epoch._LAYOUTS.clear()
    uncached = _epoch_columns(heads, start, 1)[0]
    assert _same(after, uncached)
    assert not np.array_equal(after.freq_hz, before.freq_hz, equal_nan=True)
    r = (after.sat // 100 == 1) & np.isin(after.sig // 32, (1, 2))
    want = frequencies_hz(after.sat[r], after.sig[r], changed[np.searchsorted(
        glo.layout.sat_ids, after.sat[r])])  # fmt: skip
    np.testing.assert_array_equal(after.freq_hz[r], want)
    assert len(lay.glo_cache) == 2


def test_glonass_channel_cache_is_bounded() -> None:
    """The per-layout channel cache is cleared when full, and decoding stays equal to uncached."""
    heads, start = _glonass_epoch_heads()
    glo = next(h for h in heads if h.system == "R")
    base = glo.glo_channels.copy()
    _msm_epoch._LAYOUTS.clear()
    for ch in range(-7, 7):
        glo.glo_channels = np.full_like(base, ch)
        got = _epoch_columns(heads, start, 1)[0]
        lay = next(iter(_msm_epoch._LAYOUTS.values()))
        assert len(lay.glo_cache) <= _msm_epoch._MAX_GLO_CHANNEL_SETS
        lay.glo_cache.clear()
        assert _same(got, _epoch_columns(heads, start, 1)[0])


# --- framer ---------------------------------------------------------------------------------------


def test_framer_fast_frames_equal_dataclass_frames() -> None:
    """Frames built through the slot descriptors equal, hash and print like the constructor's, and
    set every field (a field added to the dataclass must be added to the builder)."""
    r = _rtcm_frame(1074, b"\x43\x20abc", 17)
    assert type(r) is RtcmFrame
    assert r == RtcmFrame(msg_type=1074, payload=b"\x43\x20abc", offset=17)
    assert hash(r) == hash(RtcmFrame(msg_type=1074, payload=b"\x43\x20abc", offset=17))
    assert repr(r) == repr(RtcmFrame(msg_type=1074, payload=b"\x43\x20abc", offset=17))
    n = _nmea_frame(_GGA, 5)
    assert type(n) is NmeaFrame
    assert n == NmeaFrame(raw=_GGA, offset=5)
    assert repr(n) == repr(NmeaFrame(raw=_GGA, offset=5))
    for frame in (r, n):
        for f in dataclasses.fields(frame):
            getattr(frame, f.name)  # AttributeError if the builder left a slot empty
        with pytest.raises(dataclasses.FrozenInstanceError):
            frame.offset = 0  # type: ignore[misc]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.binary(min_size=6, max_size=300), min_size=2, max_size=8), st.integers(0, 5))
def test_framer_crc_run_rows_cache_equals_per_frame_crc(frames: list[bytes], lead: int) -> None:
    """The CRC of every frame of a run (table rows cached by the frames' lengths) equals
    crc24q_fast of that frame alone, with the cache cold, warm and cleared."""
    buf = bytearray(b"\x00" * lead + b"".join(frames))
    starts = [lead + sum(len(f) for f in frames[:k]) for k in range(len(frames))]
    want = [crc24q_fast(f) for f in frames]
    _RUN_ROWS.clear()
    assert _crc_run(buf, starts, len(buf)) == want
    assert _crc_run(buf, starts, len(buf)) == want  # from the cache
    assert tuple(len(f) for f in frames) in _RUN_ROWS


# --- repeated values --------------------------------------------------------------------------------


class _NoMemo(dict):  # type: ignore[type-arg]
    """A memo that never keeps anything: every lookup takes the general path."""

    def __setitem__(self, key: object, value: object) -> None:
        pass


def test_stream_ephemeris_time_memo_equals_general_path() -> None:
    """StreamDecoder reuses a repeated ephemeris's time of ephemeris for its reference checks; the
    outputs, reference time and statistics equal those of a decoder that recomputes it every time
    (simulator stream, with and without a reference; real RTCM capture, PROVENANCE.md)."""
    chunks, start = _sim_bytes(12.0)
    rtk = (REAL_DATA / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    for data, ref in ((chunks, start), (chunks, None), ([rtk[i : i + 4096] for i in range(0, len(rtk), 4096)], None)):  # fmt: skip
        memo, general = StreamDecoder(ref), StreamDecoder(ref)  # type: ignore[arg-type]
        general._eph_refs = _NoMemo()
        for chunk in [*data, b""]:
            a, b = memo.feed(chunk), general.feed(chunk)
            assert len(a) == len(b)
            assert all(_same(x, y) for x, y in zip(a, b, strict=True))
            assert memo.reference_time == general.reference_time
            assert memo._gps_1019_ref == general._gps_1019_ref
        assert memo.statistics() == general.statistics()
        assert memo._eph_refs  # the memo was used


def test_nmea_degrees_cache_equals_uncached() -> None:
    """The lean GGA/RMC latitude/longitude conversion gives the uncached value (pynmeagps
    dmm2ddd rounding, checked against pynmeagps in test_nmea_fast.py) from a cold and a warm
    cache, and the cache stays bounded."""
    texts = ["4717.11399", "00833.91590", "4836.90000", "01025.38000", "", "12.5", "abc.de"]
    texts += [f"{d:02d}{m:02d}.{f:05d}" for d, m, f in zip(range(90), range(60), range(0, 99999, 997), strict=False)]  # fmt: skip
    for warm in (False, True):
        for t in texts:
            if not warm:
                _nmea_fast._DMM_CACHE.clear()
            got, want = _nmea_fast._dmm(t), _nmea_fast._dmm_uncached(t)
            assert got == want or (got != got and want != want)
    for k in range(3 * _nmea_fast._DMM_CACHE_SIZE):
        _nmea_fast._dmm(f"{k % 9000:04d}.{k:05d}")
        assert len(_nmea_fast._DMM_CACHE) <= _nmea_fast._DMM_CACHE_SIZE
