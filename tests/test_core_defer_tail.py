"""FramingCore(defer=True) frames a chunk's bytes after its last RTCM 3 frame in settle(), not in
feed(): the frames the consumer gets, in which calls (feed / settle / end_stream), and every
counter once settled are those of framing each chunk whole (``_WholeChunkCore``: the core as it
was before, kept here as the reference) and of FramingCore(defer=False), for any stream and any
cutting of it into chunks; settled after every feed (as the runtime does) or never. Streams: the
simulator's invented quiet-day stream, invented streams with junk of every kind, and a real
capture read in place from /work/shared/data/real/."""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ionwarden.daemon.runtime import FramingCore
from ionwarden.daemon.runtime._core import DecoderCounts, _after_last_epoch, _tail_cut
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._framer import Frame, Framer, FramerStatistics, RtcmFrame

# --- the reference and the recording consumer ---------------------------------------------------


def _add(a: DecoderCounts, s: FramerStatistics) -> DecoderCounts:
    """The counts as FramingCore added them before (from the framer's ``statistics()``)."""
    return DecoderCounts(
        frames_total=a.frames_total + s.rtcm_frames + s.nmea_frames,
        rtcm_frames_total=a.rtcm_frames_total + s.rtcm_frames,
        nmea_frames_total=a.nmea_frames_total + s.nmea_frames,
        crc_errors_total=a.crc_errors_total + s.crc_failures,
        checksum_errors_total=a.checksum_errors_total + s.nmea_checksum_failures,
        discarded_bytes_total=a.discarded_bytes_total + s.bytes_discarded,
        truncated_frames_total=a.truncated_frames_total + s.truncated_at_eof,
    )


class _WholeChunkCore:
    """FramingCore as it was before the tail was deferred: each chunk framed whole in feed(), the
    frames after its last epoch held for settle()."""

    def __init__(self, consumer: Any, *, rebuild: Callable[[], Any] | None = None, defer: bool):
        self._defer = defer
        self._later: list[Frame] = []
        self._framer = Framer()
        self._done = DecoderCounts()
        self._consumer = consumer
        self._rebuild = rebuild
        self._frames_total = 0

    def feed(self, data: bytes) -> Sequence[object]:
        frames = self._framer.feed(data)
        self._frames_total += len(frames)
        if self._later:
            frames = self._later + frames
            self._later = []
        if self._consumer is None or not frames:
            return ()
        if self._defer:
            k = _after_last_epoch(frames)
            if 0 < k < len(frames):
                self._later = frames[k:]
                frames = frames[:k]
        return self._consumer.feed_frames(frames)  # type: ignore[no-any-return]

    def end_stream(self) -> Sequence[object]:
        frames = self._framer.feed(b"")
        self._frames_total += len(frames)
        self._done = _add(self._done, self._framer.statistics())
        self._framer = Framer()
        if self._later:
            frames = self._later + frames
            self._later = []
        if self._consumer is None or not frames:
            return ()
        return self._consumer.feed_frames(frames)  # type: ignore[no-any-return]

    def counts(self) -> DecoderCounts:
        return _add(self._done, self._framer.statistics())

    def frames_total(self) -> int:
        return self._frames_total

    def unsettled(self) -> bool:
        return bool(self._later) or self._consumer.unsettled()

    def settle(self) -> Sequence[object]:
        later, self._later = self._later, []
        out = list(self._consumer.feed_frames(later)) if later else []
        out.extend(self._consumer.settle())
        return out

    def reset(self) -> None:
        self._done = _add(self._done, self._framer.statistics())
        self._framer = Framer()
        self._later = []
        if self._rebuild is not None:
            self._consumer = self._rebuild()


class _Recorder:
    """Fake consumer: logs every ``feed_frames`` call with the core method that made it."""

    def __init__(self, log: list[tuple[str, tuple[Frame, ...]]], phase: list[str]):
        self.log = log
        self.phase = phase

    def feed_frames(self, frames: Sequence[Frame]) -> list[object]:
        self.log.append((self.phase[0], tuple(frames)))
        return [(self.phase[0], len(self.log), len(frames))]

    def unsettled(self) -> bool:
        return False

    def settle(self) -> list[object]:
        return []

    def state_dict(self) -> dict[str, Any]:
        return {}

    def load_state_dict(self, state: Any) -> None:
        pass


def _drive(
    make: Callable[..., Any], chunks: list[bytes], *, settle: bool, defer: bool, resets=()
) -> dict[str, Any]:
    """Feed ``chunks`` as the runtime's estimate loop does (settle when unsettled, if ``settle``),
    ``reset()`` before the chunks indexed in ``resets`` and ``end_stream()`` + ``settle()`` at the
    end; record the consumer's calls, the outputs, and the counters after every settle."""
    log: list[tuple[str, tuple[Frame, ...]]] = []
    phase = ["feed"]
    core = make(_Recorder(log, phase), rebuild=lambda: _Recorder(log, phase), defer=defer)
    outs: list[object] = []
    settled_counts: list[tuple[DecoderCounts, int]] = []
    framed: list[bool] = []  # did feed() count a frame (the runtime's stall detector reads it)
    for i, chunk in enumerate(chunks):
        if i in resets:
            core.reset()
        phase[0] = "feed"
        before = core.frames_total()
        outs += core.feed(chunk)
        framed.append(core.frames_total() > before)
        if settle and core.unsettled():
            phase[0] = "settle"
            outs += core.settle()
        if settle:
            settled_counts.append((core.counts(), core.frames_total()))
    phase[0] = "end"
    outs += core.end_stream()
    phase[0] = "settle"
    outs += core.settle()
    return {
        "log": log,
        "outs": outs,
        "counts": (core.counts(), core.frames_total()),
        "settled": settled_counts,
        "framed": framed if settle else None,
        "frames": [f for _, call in log for f in call],
    }


def _assert_identical(chunks: list[bytes], resets: Sequence[int] = ()) -> None:
    """The new core against the reference (defer on), and both against defer off: the frames,
    calls, outputs and counters are equal, settled after every feed or never. (A reset drops
    the frames held for settle(), so with resets only the counters equal defer off's.)"""
    resets = frozenset(resets)
    plain = _drive(FramingCore, chunks, settle=False, defer=False, resets=resets)
    for settle in (True, False):
        new = _drive(FramingCore, chunks, settle=settle, defer=True, resets=resets)
        old = _drive(_WholeChunkCore, chunks, settle=settle, defer=True, resets=resets)
        assert new == old
        assert new["counts"] == plain["counts"]
        if not resets:
            assert new["frames"] == plain["frames"]


def _rechunk(data: bytes, sizes: Sequence[int]) -> list[bytes]:
    out: list[bytes] = []
    i = 0
    for s in sizes:
        if i >= len(data):
            break
        out.append(data[i : i + s])
        i += s
    if i < len(data):
        out.append(data[i:])
    return out


# --- (a) the simulator's invented quiet-day stream ------------------------------------------------


@pytest.fixture(scope="module")
def seconds() -> list[bytes]:
    """One chunk per simulated second, as ``bench_outputs._replayed_stations`` feeds them."""
    sc = build_scenario("quiet-day", duration_s=60.0)
    return [data for _, data in iter_stream(Simulator(sc), 0)]


def test_one_second_chunks_identical_and_tail_waits(seconds):
    """The simulator's chunks (RTCM, then the second's NMEA): identical to framing whole chunks,
    and the NMEA tail of every chunk is framed by settle(), not by feed()."""
    _assert_identical(seconds)
    core = FramingCore(_Recorder([], ["feed"]), defer=True)
    deferred = 0
    for chunk in seconds:
        nmea = core.counts().nmea_frames_total
        core.feed(chunk)
        deferred += core.counts().nmea_frames_total == nmea and bool(core._tail)
        core.settle()
        assert not core._tail
        assert core.counts().nmea_frames_total > nmea  # each second has its GGA, RMC, GSV, GST
    assert deferred == len(seconds)


def test_cut_hint_taken_and_one_inside_a_frame(seconds, monkeypatch):
    """FramingCore._cut: the last chunk's sentence start, found past the chunk's last 0xD3, is
    the cut (the simulator's chunks: every one after the first); a hint that lands inside the
    last RTCM frame (bytes right after its last 0xD3, forced here) cuts there, and feed() frames
    the rest too: identical to framing whole chunks either way."""
    core = FramingCore(_Recorder([], ["feed"]), defer=True)
    for chunk in seconds[:5]:
        want = _tail_cut(chunk)
        assert core._cut(chunk) == want
        assert core._hint == chunk[want : want + 6]
    real_cut = FramingCore._cut

    def inside(self: FramingCore, data: bytes) -> int:
        last = data.rfind(0xD3)
        if 0 <= last < len(data) - 3:
            self._hint = data[last + 1 : last + 3]
        at = real_cut(self, data)
        assert at == data.find(self._hint, last + 1) or not self._hint
        return at

    monkeypatch.setattr(FramingCore, "_cut", inside)
    _assert_identical(seconds[:20])


@pytest.mark.parametrize("shift", [-7, -3, -2, -1, 1, 2, 3, 7])
def test_second_edges_shifted_into_frames(seconds, shift):
    """Chunk edges a few bytes before or after each second's edge: inside its last NMEA sentence
    or the next second's first RTCM frame."""
    stream = b"".join(seconds)
    edges = np.cumsum([len(c) for c in seconds])[:-1] + shift
    sizes = np.diff(np.concatenate([[0], edges])).tolist()
    _assert_identical(_rechunk(stream, sizes))


@pytest.mark.parametrize("seed", range(6))
def test_random_chunkings_of_the_stream(seconds, seed):
    """Random chunk sizes, mixing runs of 1-4 byte chunks, short and long ones."""
    stream = b"".join(seconds)
    rng = np.random.default_rng(seed)
    sizes: list[int] = []
    while sum(sizes) < len(stream):
        kind = rng.integers(3)
        if kind == 0:
            sizes += rng.integers(1, 5, int(rng.integers(1, 40))).tolist()
        elif kind == 1:
            sizes.append(int(rng.integers(5, 300)))
        else:
            sizes.append(int(rng.integers(300, 5000)))
    resets = rng.integers(0, len(sizes), 2).tolist() if seed % 2 else []
    _assert_identical(_rechunk(stream, sizes), resets)


def test_one_byte_chunks(seconds):
    """Every chunk one byte (the first ten seconds): nothing to defer, all as before."""
    stream = b"".join(seconds[:10])
    _assert_identical([stream[i : i + 1] for i in range(len(stream))])


def test_stall_detection_sees_every_framed_chunk(seconds):
    """feed() counts a frame exactly when framing the whole chunk would (settled after every feed,
    as the runtime does): a chunk whose NMEA waits still counts its epoch's frames in feed()."""
    stream = b"".join(seconds)
    for chunks in (seconds, _rechunk(stream, [701] * (len(stream) // 701 + 1))):
        new = _drive(FramingCore, chunks, settle=True, defer=True)
        old = _drive(_WholeChunkCore, chunks, settle=True, defer=True)
        assert new["framed"] == old["framed"]


# --- (b) invented streams: junk, 0xD3 in NMEA-looking junk, truncated frames, CRC errors ----------


def _msm(closing: bool, rng: np.random.Generator) -> bytes:
    """An invented MSM4 (GPS 1074): DF002 then random bytes (0xD3 may appear); the multiple-
    message bit DF393 (bit 54, RTCM 10403.3 Table 3.5-78) clear when it closes the epoch."""
    body = bytearray(rng.integers(0, 256, int(rng.integers(8, 120)), dtype=np.uint8).tobytes())
    body[0], body[1] = 1074 >> 4, (1074 & 0xF) << 4 | (body[1] & 0x0F)
    body[6] = body[6] & ~0x02 if closing else body[6] | 0x02
    return bytes(body)


def _sentence(rng: np.random.Generator, *, good: bool = True) -> bytes:
    """An NMEA 0183 §5.3 sentence: ``$``, printable body, ``*hh`` XOR checksum, CR LF."""
    alphabet = b"GPGAVSTRMC0123456789.,-NESW"
    body = b"GP" + bytes(rng.choice(list(alphabet), int(rng.integers(3, 70))).tolist())
    x = 0
    for b in body:
        x ^= b
    if not good:
        x ^= 0x5A
    return b"$" + body + b"*%02X\r\n" % x


def _piece(kind: int, rng: np.random.Generator) -> bytes:
    if kind == 0:
        return frame_rtcm(_msm(True, rng))
    if kind == 1:
        return frame_rtcm(_msm(False, rng))
    if kind == 2:  # another message (1019 number), maybe empty-ish
        return frame_rtcm(
            bytes((1019 >> 4, (1019 & 0xF) << 4)) + rng.bytes(int(rng.integers(0, 60)))
        )
    if kind == 3:
        return b"".join(_sentence(rng) for _ in range(int(rng.integers(1, 14))))
    if kind == 4:
        return _sentence(rng, good=False)
    if kind == 5:  # NMEA-looking junk with a 0xD3 inside (and maybe a header that claims a frame)
        s = bytearray(_sentence(rng))
        at = int(rng.integers(1, len(s)))
        s[at:at] = bytes((0xD3,)) + rng.bytes(int(rng.integers(0, 3)))
        return bytes(s)
    if kind == 6:  # raw junk: random bytes, 0xD3 and start characters likely
        return bytes(
            rng.choice(list(b"\xd3\x00\x01\x03$!*\r\n,A\xff\xb5b"), int(rng.integers(1, 30)))
        )
    if kind == 7:  # a truncated frame
        f = frame_rtcm(_msm(True, rng))
        return f[: int(rng.integers(1, len(f)))]
    if kind == 8:  # a CRC error in an epoch-closing MSM
        f = bytearray(frame_rtcm(_msm(True, rng)))
        f[int(rng.integers(3, len(f)))] ^= 1 << int(rng.integers(8))
        return bytes(f)
    if kind == 9:  # keep-alive (RTCM 10403.3 §4: length 0), D3 00 00 47 EA 4B
        return bytes.fromhex("D3000047EA4B")
    if kind == 10:  # a false preamble claiming a long frame: holds the frames behind it
        high = int(rng.integers(0, 4)) if rng.random() < 0.3 else 0
        return bytes((0xD3, high, int(rng.integers(0, 256))))
    return rng.bytes(int(rng.integers(1, 40)))  # binary noise


def _epochs(rng: np.random.Generator, n: int, kinds: Sequence[int]) -> bytes:
    """``n`` receiver "seconds": some MSMs, the last closing the epoch, then sentences, with
    pieces of ``kinds`` slipped in at random places."""
    out: list[bytes] = []
    for _ in range(n):
        sec = [frame_rtcm(_msm(False, rng)) for _ in range(int(rng.integers(0, 3)))]
        sec.append(frame_rtcm(_msm(True, rng)))
        sec += [_sentence(rng) for _ in range(int(rng.integers(0, 14)))]
        for _ in range(int(rng.integers(0, 3))):
            sec.insert(int(rng.integers(0, len(sec) + 1)), _piece(int(rng.choice(kinds)), rng))
        out += sec
    return b"".join(out)


@pytest.mark.parametrize("seed", range(12))
def test_invented_streams_cut_per_second_and_anywhere(seed):
    """Receiver-like seconds with junk, bad sentences, 0xD3 in sentences, truncated frames, CRC
    errors, keep-alives and false preambles, cut at the seconds' edges and at random."""
    rng = np.random.default_rng(1000 + seed)
    secs = [_epochs(rng, 1, range(12)) for _ in range(25)]
    _assert_identical(secs)
    stream = b"".join(secs)
    sizes = rng.integers(1, 400, len(stream)).tolist()
    _assert_identical(_rechunk(stream, sizes), resets=[3] if seed % 3 == 0 else ())


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(st.integers(0, 12), min_size=1, max_size=30),
    st.integers(0, 2**32 - 1),
    st.lists(st.integers(0, 20_000), max_size=12),
    st.lists(st.integers(0, 15), max_size=2),
)
def test_any_pieces_any_cuts(kinds, seed, cuts, resets):
    """Any sequence of pieces (frames, sentences, junk of every kind above), cut anywhere."""
    rng = np.random.default_rng(seed)
    data = b"".join(_piece(k, rng) for k in kinds)
    edges = sorted({c % (len(data) + 1) for c in cuts} | {0, len(data)})
    chunks = [data[a:b] for a, b in itertools.pairwise(edges) if b > a]
    _assert_identical(chunks, resets)


def test_false_preamble_holding_the_last_epoch_back():
    """A false 0xD3 after one epoch whose claimed length ends in the chunk's sentences holds the
    next epoch back until those bytes are in (the framer's resynchronisation): the chunk must then
    be framed whole in feed(), so the second epoch still reaches the consumer in feed()."""
    rng = np.random.default_rng(5)
    first, second = frame_rtcm(_msm(True, rng)), frame_rtcm(_msm(True, rng))
    sentences = b"".join(_sentence(rng) for _ in range(6))
    false = bytes((0xD3, 0x00, len(second) + len(sentences) // 2))  # claims a frame ending there
    chunk = first + false + second + sentences
    for chunks in ([chunk, chunk], [first, false + second + sentences, chunk]):
        _assert_identical(chunks)
        log: list[tuple[str, tuple[Frame, ...]]] = []
        core = FramingCore(_Recorder(log, ["feed"]), defer=True)
        for c in chunks[:-2]:
            core.feed(c)
            core.settle()
        core.feed(chunks[-2])  # the chunk that completes ``second``
        assert not core._tail  # not deferred: the framer held the false 0xD3
        last = log[-1][1][-1]  # the last frame the consumer got, in feed()
        assert isinstance(last, RtcmFrame)
        assert last.payload == second[3:-3]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.integers(0, 2**32 - 1),
    st.integers(-40, 40),
    st.integers(0, 6),
    st.lists(st.integers(0, 2_000), max_size=4),
)
def test_false_preamble_claims_around_the_tail(seed, shift, n_sentences, cuts):
    """Epoch, a false 0xD3 whose claimed frame ends near the last epoch's end (``shift`` bytes
    off), that epoch, sentences: the false candidate resolves before, at or after the cut."""
    rng = np.random.default_rng(seed)
    first, second = frame_rtcm(_msm(True, rng)), frame_rtcm(_msm(True, rng))
    sentences = b"".join(_sentence(rng) for _ in range(n_sentences))
    claim = max(0, min(1023, len(second) + shift - 3))  # 3 header + claim + 3 CRC after the 0xD3
    chunk = first + bytes((0xD3, claim >> 8, claim & 0xFF)) + second + sentences
    data = chunk * 3
    edges = sorted({c % (len(data) + 1) for c in cuts} | {0, len(chunk), len(data)})
    _assert_identical([data[a:b] for a, b in itertools.pairwise(edges) if b > a])


# --- (c) a real receiver stream: NMEA, u-blox UBX binary and RTCM 3 MSM7 interleaved ---------------

_MIXED = "rtcm/pygnssutils_pygpsdata-rtcm3.log"  # read in place: real_data fixture, PROVENANCE.md


@pytest.mark.parametrize("read", [512, 1024, 4096, -1, -2])
def test_real_mixed_stream(real_data, read):
    """A real u-blox capture (NMEA + UBX + RTCM, 0xD3 bytes in the UBX) read in fixed-size reads
    or random ones (negative: a seed): identical, and tails really wait for settle()."""
    data = (real_data / _MIXED).read_bytes()
    if read > 0:
        sizes = [read] * (len(data) // read + 1)
    else:
        sizes = np.random.default_rng(-read).integers(1, 3000, len(data) // 100).tolist()
    chunks = _rechunk(data, sizes)
    _assert_identical(chunks)
    core = FramingCore(_Recorder([], ["feed"]), defer=True)
    deferred = 0
    for chunk in chunks:
        core.feed(chunk)
        deferred += bool(core._tail)
        core.settle()
    assert deferred > 0
    counts = core.counts()
    assert counts.rtcm_frames_total == 1106  # PROVENANCE.md: 1,106 RTCM frames,
    assert counts.crc_errors_total == 0  # all CRC-OK


@pytest.mark.parametrize(
    ("data", "want"),
    [
        (b"", 0),
        (b"$GPGGA*00\r\n", 11),  # no 0xD3: nothing to cut at
        (frame_rtcm(b"\x43\x20\x00") + b"$A*41\r\n", 9),  # the frame's end (3 + 3 + 3 bytes)
        (b"\xd3\x00", 2),  # a header cut short: no cut
        (b"\xd3\x00\x05\x00", 4),  # a frame still incomplete: no cut
        (b"\xd3\xfc\x00abc", 6),  # reserved bits set, no earlier 0xD3: no cut
        (b"\xd3" * 3000, 3000),  # a flood of 0xD3 (reserved bits set in each header): no cut
        # the last 0xD3 in the frame's payload: the cut is the end of the frame holding it
        (frame_rtcm(b"\x43\x20\xd3\xff") + b"$A*41\r\n", 10),
    ],
)
def test_tail_cut(data, want):
    """Where the chunk's RTCM-free end starts (RTCM 10403.3 Table 4-1 frame layout)."""
    assert _tail_cut(data) == want
