"""Lean constructors and steps of the per-epoch framing and decoding, against the previous code.

* Golden digests: every frame and every decoded message (type, each field; arrays by dtype, shape
  and bytes) and every counter of the real RTCM captures and of the simulator's stream, equal to
  the previous implementation (digests captured from it, commit 7f7ee21, before these changes).
* ``Framer._rtcm_at`` (lengths gathered while following the run, payloads cut from one copy of
  the run, frames built through a slots twin) and ``_take_nmea_run`` (frames built through a
  slots twin): the frames, offsets, counters and resynchronisation of the previous code (kept
  below as ``_PreviousRuns``) for any stream and any cutting of it.
* ``_msm_time.resolve_epoch`` (GpsTime built through a slots twin; the leap seconds passed in by
  the stream): the previous code's time (kept below) for any epoch field and reference.
* Objects built through a twin (``_twin.slots_twin``) are instances of the frozen dataclass like
  any other: exact type, frozen, equal and hashing as the constructor's, and they pickle.
"""

from __future__ import annotations

import dataclasses
import hashlib
import pickle
from itertools import accumulate
from types import SimpleNamespace
from typing import TYPE_CHECKING

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ionwarden.parsers import ObsEpoch
from ionwarden.parsers._framer import (
    _CRC_FLAT,
    _CRC_ROW,
    _CRC_RUN_BYTES,
    _RTCM_MAX_FRAME,
    _TAIL_XOR,
    Frame,
    Framer,
    NeedData,
    NmeaFrame,
    RtcmFrame,
    _nmea_frame,
    _rtcm_frame,
    _run_rows,
)
from ionwarden.parsers._gnsstime import GpsTime
from ionwarden.parsers._msm_time import WEEK_MS, leap_at, resolve_epoch
from ionwarden.parsers._msm_time import gps_ms_of_day as sod_of
from ionwarden.parsers._msm_time import msm_gps_tow_ms as tow_of
from ionwarden.parsers._stream import StreamDecoder

from .conftest import REAL_DATA
from .test_decode_shortcuts import _sim_bytes
from .test_framer_runs import _JUNK, _cut, _nmea_piece, _outcome, _rtcm_piece

if TYPE_CHECKING:
    from collections.abc import Iterable

#: Real RTCM captures (read in place; see /work/wt/shared/data/real/PROVENANCE.md).
_RTCM_FILES = (
    "RTK134_202102051543.rtcm3",
    "pygnssutils_ntrip_encode_none.bin",
    "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log",
)


def _put(h: hashlib._Hash, x: object) -> None:
    """Feed one value to the digest: arrays by dtype, shape and bytes; dataclasses by type and
    fields; containers item by item; scalars by type and repr (exact for floats)."""
    if isinstance(x, np.ndarray):
        h.update(f"A{x.dtype.str}{x.shape}".encode())
        h.update(np.ascontiguousarray(x).tobytes())
    elif dataclasses.is_dataclass(x) and not isinstance(x, type):
        h.update(f"D{type(x).__module__}.{type(x).__qualname__}(".encode())
        for f in dataclasses.fields(x):
            h.update(f.name.encode())
            _put(h, getattr(x, f.name))
        h.update(b")")
    elif isinstance(x, tuple | list):
        h.update(f"T{type(x).__name__}{len(x)}(".encode())
        for v in x:
            _put(h, v)
        h.update(b")")
    elif isinstance(x, dict) or type(x).__name__ == "mappingproxy":
        h.update(b"M(")
        for k, v in sorted(x.items(), key=repr):  # type: ignore[attr-defined]
            _put(h, k)
            _put(h, v)
        h.update(b")")
    else:
        h.update(f"S{type(x).__name__}:{x!r};".encode())


def _digest(items: Iterable[object]) -> str:
    h = hashlib.sha256()
    for x in items:
        _put(h, x)
    return h.hexdigest()[:32]


def _chunks(data: bytes, size: int) -> list[bytes]:
    return [data[k : k + size] for k in range(0, len(data), size)]


def _frames_digest(chunks: list[bytes]) -> str:
    framer = Framer()
    out: list[object] = []
    for c in [*chunks, b""]:
        out += framer.feed(c)
        out.append("|")  # where each feed ended
    out.append(framer.statistics())
    return _digest(out)


def _decoded_digest(chunks: list[bytes], ref: GpsTime | None) -> str:
    dec = StreamDecoder(ref)
    out: list[object] = []
    for c in [*chunks, b""]:
        out += dec.feed(c)
        out.append("|")
    out.append(dec.statistics())
    out.append(dec.reference_time)
    return _digest(out)


def _real(name: str) -> bytes:
    return (REAL_DATA / "rtcm" / name).read_bytes()


def _cases() -> dict[str, tuple[list[bytes], GpsTime | None]]:
    sim, start = _sim_bytes(40.0)
    cases: dict[str, tuple[list[bytes], GpsTime | None]] = {"sim": (sim, start)}  # type: ignore[dict-item]
    for name in _RTCM_FILES:
        data = _real(name)
        cases[f"{name}/1935"] = (_chunks(data, 1935), None)
        cases[f"{name}/333"] = (_chunks(data[:200_000], 333), None)
    return cases


#: (frames, decoded) digests of each case, from the previous implementation (see the docstring).
_GOLDEN = {
    "sim": ("571e36532dc187f4550bbaaf35825122", "cf39bab9b27e40b9381aad89707b34fc"),
    "RTK134_202102051543.rtcm3/1935": (
        "f7db9e2e09beb4c78c9aa1cc49d5b86c",
        "cdb1fdc7f76a9f86280eef878fd960c2",
    ),
    "RTK134_202102051543.rtcm3/333": (
        "4007f1eec3f6b2b292fa0ae2505f0b95",
        "572dcf109362dc9a087112631aae6f64",
    ),
    "pygnssutils_ntrip_encode_none.bin/1935": (
        "0a7c4c7943eb395e091b8ceffdac7601",
        "ffa0bf828d8757da76b6275fcb5bd205",
    ),
    "pygnssutils_ntrip_encode_none.bin/333": (
        "8dcb74f2de737d9e23213c47eba64c5f",
        "d11cb9ced7324f6a43f7cad51938409a",
    ),
    "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log/1935": (
        "21265fdae8f38e8f4128aa5405c2d1cc",
        "b919acd293b8208886a549077e95dc72",
    ),
    "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log/333": (
        "f936374e10d3c2fa06bd217d1da4bc07",
        "d8118058553c063b7870010bafd8f7a7",
    ),
}


@pytest.mark.parametrize("key", list(_GOLDEN))
def test_framer_and_decoder_equal_previous_goldens(key: str) -> None:
    """Framer and StreamDecoder give the previous code's frames, messages and counters on the real
    captures and the simulator's stream (equal to the previous implementation: golden digests)."""
    chunks, ref = _cases()[key]
    assert (_frames_digest(chunks), _decoded_digest(chunks, ref)) == _GOLDEN[key]


# --- framer: the previous run paths (oracle copy) -----------------------------------------------


def _previous_crc_run(buf: bytearray, starts: list[int], end: int) -> list[int]:
    """The previous ``_framer._crc_run`` (verbatim)."""
    s0 = starts[0]
    if len(starts) == 1:  # one frame: fewer numpy calls
        idx = _CRC_ROW[_RTCM_MAX_FRAME - (end - s0) :] + np.frombuffer(buf, np.uint8, end - s0, s0)
        return [int(np.bitwise_xor.reduce(_CRC_FLAT.take(idx)))]
    ends = [*starts[1:], end]
    rows, first = _run_rows(tuple([b - a for a, b in zip(starts, ends, strict=True)]))
    idx = rows + np.frombuffer(buf, np.uint8, end - s0, s0)
    crcs: list[int] = np.bitwise_xor.reduceat(_CRC_FLAT.take(idx), first).tolist()
    return crcs


class _PreviousRuns(Framer):
    """The framer with the previous ``_rtcm_at`` and ``_take_nmea_run`` (verbatim, frames built
    by ``_rtcm_frame`` / ``_nmea_frame``, the dataclass-equal builders of the previous code)."""

    def _rtcm_at(self, i: int, frames: list[Frame]) -> NeedData | None:
        buf = self._buf
        size = len(buf)
        if size - i < 3:
            return self._incomplete()
        if buf[i + 1] & 0xFC:
            self._skip(1)
            return None
        end = i + 6 + (((buf[i + 1] & 0x03) << 8) | buf[i + 2])
        if size < end:
            return self._incomplete()
        starts = [i]
        p = end
        limit = min(size, end + _CRC_RUN_BYTES)
        while p + 3 <= limit and buf[p] == 0xD3:
            if buf[p + 1] & 0xFC:
                break
            q = p + 6 + (((buf[p + 1] & 0x03) << 8) | buf[p + 2])
            if q > limit:
                break
            starts.append(p)
            p = q
        crcs = _previous_crc_run(buf, starts, p)
        if crcs[0] != 0:
            self._counts[3] += 1
            self._skip(1)
            return None
        starts.append(p)
        counts, by_type, base = self._counts, self._by_type, self._base
        taken = 0
        for k, crc in enumerate(crcs):
            if crc != 0:
                break
            a, b = starts[k], starts[k + 1]
            if b - a < 8:
                self._accept(a, b, frames)
                continue
            payload = bytes(buf[a + 3 : b - 3])
            msg_type = (payload[0] << 4) | (payload[1] >> 4)
            by_type[msg_type] = by_type.get(msg_type, 0) + 1
            frames.append(_rtcm_frame(msg_type, payload, base + a))
            taken += 1
            self._pos = b
        counts[0] += taken
        return None

    def _take_nmea_run(self, i: int, run: bytes, frames: list[Frame]) -> int:
        parts = run.splitlines(keepends=True)
        starts = list(accumulate(map(len, parts[:-1]), initial=0))
        xors: list[int] = np.bitwise_xor.reduceat(np.frombuffer(run, np.uint8), starts).tolist()
        counts = self._counts
        offset = self._base + i
        for s, x in zip(parts, xors, strict=True):
            if x == _TAIL_XOR[s[-5:] if s[-2] == 0x0D else s[-4:]] ^ s[0]:
                frames.append(_nmea_frame(s, offset))
                counts[1] += 1
            elif s.find(b"$", 1) < 0 and s.find(b"!", 1) < 0:
                counts[4] += 1
                counts[6] += len(s)
            else:
                break
            offset += len(s)
        self._pos = offset - self._base
        return self._pos


def _typed_outcome(framer: Framer, chunks: list[bytes]) -> tuple[object, ...]:
    """``_outcome`` plus each frame's exact type (a twin must never leak out)."""
    probe = type(framer)()
    types = [type(f) for c in [*chunks, b""] for f in probe.feed(c)]
    return (*_outcome(framer, chunks), types)


@pytest.mark.parametrize("name", _RTCM_FILES)
@pytest.mark.parametrize("size", [1, 100, 1935, 1 << 20])
def test_framer_runs_equal_previous_on_real_captures(name: str, size: int) -> None:
    """Framer gives the previous code's frames and counters on real captures, in any chunk size
    (equal to the previous implementation (oracle copy))."""
    chunks = _chunks(_real(name)[:300_000], size)
    assert _typed_outcome(Framer(), chunks) == _typed_outcome(_PreviousRuns(), chunks)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(
        st.one_of(_nmea_piece(), _rtcm_piece(), _rtcm_piece(), _JUNK), min_size=1, max_size=25
    ),
    st.lists(st.integers(0, 10_000), max_size=10),
)
def test_framer_runs_equal_previous_on_any_pieces(pieces: list[bytes], cuts: list[int]) -> None:
    """For any mix of good and bad RTCM frames (keep-alives, CRC errors), sentences and junk, cut
    anywhere, Framer gives the previous code's frames and counters (equal to the previous
    implementation (oracle copy))."""
    chunks = _cut(b"".join(pieces), cuts)
    assert _typed_outcome(Framer(), chunks) == _typed_outcome(_PreviousRuns(), chunks)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=3000), st.lists(st.integers(0, 4000), max_size=6))
def test_framer_runs_equal_previous_on_arbitrary_bytes(data: bytes, cuts: list[int]) -> None:
    """Arbitrary bytes (fuzz): the previous code's frames and counters (equal to the previous
    implementation (oracle copy))."""
    chunks = _cut(data, cuts)
    assert _typed_outcome(Framer(), chunks) == _typed_outcome(_PreviousRuns(), chunks)


# --- epoch times: the previous resolve_epoch (oracle copy) -----------------------------------------


def _previous_resolve_epoch(msg: object, ref: GpsTime) -> GpsTime:
    """The previous ``_msm_time.resolve_epoch`` with its ``_at`` (verbatim)."""
    leap = leap_at(ref)
    ref_ms = round(ref.tow_s * 1000.0)
    tow = tow_of(msg, leap)  # type: ignore[arg-type]
    if tow is not None:
        delta = (tow - ref_ms + WEEK_MS // 2) % WEEK_MS - WEEK_MS // 2
    else:
        sod = sod_of(msg, leap)  # type: ignore[arg-type]
        delta = (sod - ref_ms + 86_400_000 // 2) % 86_400_000 - 86_400_000 // 2
    week_shift, tow_ms = divmod(ref_ms + delta, WEEK_MS)
    return GpsTime(ref.week + week_shift, tow_ms / 1000.0)


@settings(max_examples=500, deadline=None)
@given(
    st.sampled_from("GRECJ"),
    st.integers(0, (1 << 30) - 1),
    st.integers(0, 7),
    st.integers(1000, 3000),
    st.floats(0.0, 604_799.999, allow_nan=False),
)
def test_resolve_epoch_equals_previous(
    system: str, epoch: int, day: int, week: int, tow: float
) -> None:
    """resolve_epoch, with or without the leap seconds passed in, gives the previous code's
    GpsTime: exact type, equal, same hash and repr (equal to the previous implementation (oracle
    copy)). The 30-bit epoch field as RTCM 10403.3 Table 3.5-78 reads it (GLONASS: DF416 day,
    DF034 ms of day)."""
    msg = SimpleNamespace(
        system=system,
        epoch_ms=epoch & 0x7FF_FFFF if system == "R" else epoch % WEEK_MS,
        glonass_day=day if system == "R" else -1,
    )
    ref = GpsTime(week, tow)
    want = _previous_resolve_epoch(msg, ref)
    for got in (resolve_epoch(msg, ref), resolve_epoch(msg, ref, leap_at(ref))):  # type: ignore[arg-type]
        assert type(got) is GpsTime
        assert (got, hash(got), repr(got)) == (want, hash(want), repr(want))


# --- objects built through a twin ------------------------------------------------------------------


def test_twin_built_objects_are_plain_frozen_instances() -> None:
    """Frames, epochs and epoch times built through a twin are exact instances of their frozen
    dataclasses: frozen, equal and hashing as the constructor's, pickling to equal objects."""
    chunks, ref = _sim_bytes(5.0)
    frames = Framer().feed(b"".join(chunks))
    dec = StreamDecoder(ref)  # type: ignore[arg-type]
    epochs = [m for m in dec.feed(b"".join(chunks)) if isinstance(m, ObsEpoch)]
    assert {type(f) for f in frames} == {RtcmFrame, NmeaFrame}
    assert epochs
    for f in frames:
        built = (
            RtcmFrame(msg_type=f.msg_type, payload=f.payload, offset=f.offset)
            if isinstance(f, RtcmFrame)
            else NmeaFrame(raw=f.raw, offset=f.offset)
        )
        assert (f, hash(f), repr(f)) == (built, hash(built), repr(built))
        assert pickle.loads(pickle.dumps(f)) == f
        with pytest.raises(dataclasses.FrozenInstanceError):
            f.offset = 0  # type: ignore[misc]
    for ep in epochs:
        assert type(ep) is ObsEpoch
        assert type(ep.time) is GpsTime
        assert ep.time == GpsTime(ep.time.week, ep.time.tow_s)
        assert hash(ep.time) == hash(GpsTime(ep.time.week, ep.time.tow_s))
        back = pickle.loads(pickle.dumps(ep))
        assert type(back) is ObsEpoch
        assert back.time == ep.time
        with pytest.raises(dataclasses.FrozenInstanceError):
            ep.station_id = 0  # type: ignore[misc]
        with pytest.raises(dataclasses.FrozenInstanceError):
            ep.time.week = 0  # type: ignore[misc]


if __name__ == "__main__":  # prints the goldens (run on the previous code)
    for key, (chunks, ref) in _cases().items():
        print(f"    {key!r}: ({_frames_digest(chunks)!r}, {_decoded_digest(chunks, ref)!r}),")
