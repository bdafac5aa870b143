"""Decode all MSM4–7 messages of one epoch at once, straight into an :class:`ObsEpoch`.

A receiver sends the same messages with the same masks epoch after epoch, so everything that
depends only on their layouts (RTCM 10403.3 §3.5.12: message numbers, satellite, signal and cell
masks, payload lengths) is worked out once per combination and cached: where every needed field
of every output cell sits in the messages' bytes laid end to end, its scale and invalid code,
the output satellite / signal / frequency columns, and which repeated cells are dropped. Decoding
is then one gather of the big-endian 64-bit word under every field (as ``_msm`` does for one
message), two shifts and a mask, one scaling, and a handful of element-wise operations on the
rows below; epochs of the same layout decoded together (a replayed file, a feed that closes
several epochs) share those operations.

Rows (``_NROWS`` × ``n`` output cells; satellite fields repeated for each of their cells):
0 DF397 rough range (integer ms, Tables 3.5-81/83/85/87), 1 DF399 rough phase-range rate (m/s;
MSM5/7 only, NaN otherwise), 2 DF398 rough range modulo 1 ms, 3 DF404 fine phase-range rate (m/s;
MSM5/7 only), 4 fine pseudorange DF400/DF405, 5 fine phase range DF401/DF406 (Tables
3.5-82/84/86/88), 6 CNR DF403/DF408, 7 lock-time indicator DF402/DF407, 8 half-cycle DF420.
Rows 0–1 plus rows 2–3 give the rough range and the rate; the formulas are those of
``_msm.decode_msm``, operation for operation, so both give bit-identical values.
"""

# size: ~560 lines: the whole-epoch MSM decode, the layout cache it runs on and the one-epoch
# plan beside the general path it must equal; the layout and the decode change together.
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Final

import numpy as np
import numpy.typing as npt

from ._epoch import ObsEpoch
from ._msm import _LIGHT_MS_M, _PAD, MsmHead
from ._msm_tables import LOCK_TIME_DF402_S, LOCK_TIME_DF407_S
from ._signals import frequencies_hz
from ._twin import slots_twin

if TYPE_CHECKING:
    from collections.abc import Sequence

    from ._gnsstime import GpsTime

__all__ = ["decode_epochs"]

_F64 = npt.NDArray[np.float64]
_IDX = npt.NDArray[np.intp]
_NROWS: Final = 9
_MAX_EPOCH_LAYOUTS: Final = 64  # cached epoch layouts; cleared when full (a stream uses a few)
#: Channel assignments cached per layout (cleared when full): one is used for months, a handful
#: while a satellite's channel is being learnt (MSM4 before its 1020, a channel reused after a
#: constellation change).
_MAX_GLO_CHANNEL_SETS: Final = 8
#: Lock-time lookup: DF407 indicators (RTCM 10403.3 Table 3.5-75) then DF402 ones (Table 3.5-74).
_LOCK_BOTH: Final = np.concatenate([LOCK_TIME_DF407_S, LOCK_TIME_DF402_S])
_LOCK_BOTH.setflags(write=False)
_DF402_AT: Final = LOCK_TIME_DF407_S.shape[0]
#: Field of each row (MSM4/5, MSM6/7); DF399 and DF404 are absent from MSM4/6 (rows of NaN).
_ROWS_45: Final = ("DF397", "DF399", "DF398", "DF404", "DF400", "DF401", "DF403", "DF402", "DF420")
_ROWS_67: Final = ("DF397", "DF399", "DF398", "DF404", "DF405", "DF406", "DF408", "DF407", "DF420")
_SAT_ROWS: Final = frozenset({"DF397", "DF398", "DF399"})
#: Most epochs of one layout decoded together (bounds the temporaries: ~30 kB per epoch of 120
#: cells).
_MAX_BATCH: Final = 64
#: Elements (epochs × ``_NROWS`` × cells) of one batch of several epochs at most: the layout's
#: per-element arrays are repeated for each epoch of the batch (``_tiles``, ~32 bytes per
#: element), so that every operation runs on arrays of one shape (numpy's plain loops; mixing a
#: layout row broadcast over epochs with a cast goes through its buffered iterator, which copies
#: the broadcast operand epoch by epoch). A batch holds at least one epoch.
_MAX_BATCH_ELEMENTS: Final = 8192
#: Repeated layouts kept, by (layout, epochs); cleared when full. Several epochs per feed come
#: from replayed files and large reads, which use one or two batch sizes per layout.
_MAX_TILES: Final = 8
_BE32: Final = np.dtype(">u4")
#: "No invalid code" in 32 bits: a value no ≤ 24-bit field takes.
_NO_INVALID: Final = 1 << 30
#: Epoch j's first byte in the messages of a batch laid end to end is j × (bytes per epoch).
_STEP: Final = np.arange(_MAX_BATCH, dtype=np.intp).reshape(1, _MAX_BATCH, 1)

# Hot-path construction (one ObsEpoch per epoch): the frozen dataclass's generated ``__init__``
# stores each field with ``object.__setattr__(self, name, value)`` (a lookup by name every time)
# and then calls ``__post_init__``, which returns at once for ``_validate=False``; ``_epoch``
# stores the same values into a plain twin with ObsEpoch's slots, whose class is then set to
# ObsEpoch (see ``_twin``). Same type, same fields, equal values: tests/test_decode_speed_epoch.py
# and tests/test_decode_twin_paths.py.
_ObsEpochSlots = slots_twin(ObsEpoch)


@dataclass(frozen=True, slots=True, eq=False)
class _EpochLayout:
    """Everything about an epoch's messages that does not depend on the measured values."""

    #: Per element (``_NROWS`` × n, row-major): first payload byte, shifts, mask, invalid, scale.
    bytepos: _IDX
    lsh: npt.NDArray[np.uint32]
    rsh: npt.NDArray[np.int32]
    mask: npt.NDArray[np.int32]
    invalid: npt.NDArray[np.int32]
    scale: _F64
    n: int
    #: Output columns shared (read-only) by every epoch of this layout.
    sat: npt.NDArray[np.int16]
    sig: npt.NDArray[np.uint16]
    freq_hz: _F64
    #: Multipliers of (pseudorange, phase) in light-ms: c/1000 (m), f/1000 (cycles).
    mult: _F64
    lli: npt.NDArray[np.uint8]
    #: Bytes of all the messages, end to end.
    nbytes: int
    #: Lock-time table and per-cell offset into it (None when all cells use one indicator type).
    lock_table: npt.NDArray[np.float32]
    lock_offset: _IDX | None
    #: GLONASS FDMA cells: output position, and index into the messages' channel arrays joined.
    glo_pos: _IDX
    glo_src: _IDX
    glo_sat: npt.NDArray[np.int16]
    glo_sig: npt.NDArray[np.uint16]
    sources: tuple[int, ...]
    duplicates: int
    #: GLONASS FDMA: (frequencies, multipliers) of every cell, read-only, by the channel bytes of
    #: the epoch's GLONASS messages (receivers keep a satellite's channel for months).
    glo_cache: dict[bytes, tuple[_F64, _F64]]
    #: The same fields rearranged for ``_decode_one`` (see ``_OnePlan``).
    one: _OnePlan


#: C/N0 by a unified 10-bit code: DF408's (2^-4 dB-Hz, MSM6/7), or DF403's (1 dB-Hz, MSM4/5) read
#: 4 bits lower so that it is 16 times its value; 0 is "not computed" (NaN) for both. The same
#: float32 values as scaling in float64 and casting (every value is exact in both).
_CN0_BY_CODE: Final = np.array([np.nan, *(np.arange(1, 1024) * 2.0**-4)]).astype(np.float32)
_CN0_BY_CODE.setflags(write=False)


@dataclass(frozen=True, slots=True, eq=False)
class _OnePlan:
    """A layout's fields as ``_decode_one`` reads them: the rows it scales first (``nf`` rows:
    DF397, [DF399,] DF398, [DF404,] the fine pseudorange and phase range; the rate rows only when
    a message has them, MSM5/7), then the C/N0 (unified code, see ``_CN0_BY_CODE``), lock-time
    and half-cycle rows, which are looked up or cast without scaling."""

    bytepos: _IDX
    lsh: npt.NDArray[np.uint32]
    rsh: npt.NDArray[np.int32]
    mask: npt.NDArray[np.int32]
    #: Scale and invalid code of the first ``nf`` rows.
    scale: _F64
    invalid: npt.NDArray[np.int32]
    #: Scaled rows, and their elements (``nf`` × n).
    nf: int
    m: int
    rate: bool
    #: NaN per cell, copied as the range rate of layouts without one (read-only).
    no_rate: _F64


def _one_plan(
    n: int, rate: bool, lock_offset: _IDX, fields: tuple[npt.NDArray[np.generic], ...]
) -> _OnePlan:
    """The plan of a layout of ``n`` cells from its per-element fields (bytepos, lsh, rsh, mask,
    invalid, scale: ``_NROWS`` rows of n) and its cells' lock-time offsets."""
    bytepos, lsh, rsh, mask, invalid, scale = fields
    rows = [0, 1, 2, 3, 4, 5] if rate else [0, 2, 4, 5]
    order = np.concatenate([np.arange(r * n, (r + 1) * n) for r in [*rows, 6, 7, 8]]).astype(
        np.intp
    )
    m = len(rows) * n
    rsh_one = np.asarray(rsh[order], np.int32)
    mask_one = np.asarray(mask[order], np.int32)
    # DF403 cells (MSM4/5: their lock-time offset is DF402's): read 4 bits lower, 16 x the value.
    df403 = m + np.flatnonzero(lock_offset == _DF402_AT)
    rsh_one[df403] -= 4
    mask_one[df403] <<= 4
    no_rate = np.full(n, np.nan)
    no_rate.setflags(write=False)
    return _OnePlan(
        bytepos=bytepos[order],  # type: ignore[arg-type]
        lsh=lsh[order],  # type: ignore[arg-type]
        rsh=rsh_one,
        mask=mask_one,
        scale=scale[order[:m]],  # type: ignore[arg-type]
        invalid=invalid[order[:m]],  # type: ignore[arg-type]
        nf=len(rows),
        m=m,
        rate=rate,
        no_rate=no_rate,
    )


_LAYOUTS: dict[tuple[tuple[object, int], ...], _EpochLayout] = {}


def _build(heads: Sequence[MsmHead]) -> _EpochLayout:
    rows: list[list[tuple[_IDX, int]]] = [[] for _ in range(_NROWS)]
    dummy: list[list[bool]] = [[] for _ in range(_NROWS)]
    sats, sigs, freqs, lock_off, glo_pos, glo_src = [], [], [], [], [], []
    offset = cell0 = glo0 = 0
    for h in heads:
        lay = h.layout
        n = lay.sat.shape[0]
        names = _ROWS_45 if h.msm_level in (4, 5) else _ROWS_67
        for r, name in enumerate(names):
            seg = lay.seg.get(name)
            if seg is None:  # DF399/DF404 of MSM4/6: no rate
                rows[r].append((np.zeros(n, np.intp), offset))
                dummy[r].append(True)
                continue
            idx = seg.start + (lay.cell_sat if name in _SAT_ROWS else np.arange(n))
            rows[r].append((idx.astype(np.intp), offset))
            dummy[r].append(False)
        sats.append(lay.sat)
        sigs.append(lay.sig)
        freqs.append(lay.freq_hz)
        lock_off.append(np.full(n, _DF402_AT if h.msm_level in (4, 5) else 0, np.intp))
        if lay.glo_fdma:
            glo_pos.append(cell0 + np.arange(n))
            glo_src.append(glo0 + lay.cell_sat)
            glo0 += lay.sat_ids.shape[0]
        offset += len(h.payload)
        cell0 += n

    sat = np.concatenate(sats).astype(np.int16)
    sig = np.concatenate(sigs).astype(np.uint16)
    total = sat.shape[0]
    keep = np.arange(total)
    # Only two messages of one system (e.g. MSM6 and MSM7) can repeat a cell: keep the later one.
    if len({h.system for h in heads}) < len(heads):
        key = sat.astype(np.int32) * 1024 + sig
        _, first_rev = np.unique(key[::-1], return_index=True)
        keep = np.sort(total - 1 - first_rev)
    n = keep.shape[0]

    parts: dict[str, list[npt.NDArray[np.generic]]] = {
        k: [] for k in ("bytepos", "lsh", "rsh", "mask", "invalid", "scale")
    }
    for r in range(_NROWS):
        for (idx, off), is_dummy, h in zip(rows[r], dummy[r], heads, strict=True):
            lay = h.layout
            m = idx.shape[0]
            if is_dummy:  # mask 0 reads 0, which is the invalid code: NaN
                parts["bytepos"].append(np.full(m, off, np.intp))
                parts["lsh"].append(np.zeros(m, np.int64))
                parts["rsh"].append(np.zeros(m, np.int64))
                parts["mask"].append(np.zeros(m, np.int64))
                parts["invalid"].append(np.zeros(m, np.int64))
                parts["scale"].append(np.ones(m))
                continue
            parts["bytepos"].append(lay.bytepos[idx] + off)
            # Every field is ≤ 24 bits and starts ≤ 7 bits into its byte: a 32-bit word holds it.
            parts["lsh"].append(lay.lsh[idx].astype(np.int64))
            parts["rsh"].append(lay.rsh[idx] - 32)
            parts["mask"].append(lay.mask[idx])
            parts["invalid"].append(np.minimum(lay.invalid[idx], _NO_INVALID))
            parts["scale"].append(lay.scale[idx])

    def rowwise(name: str, dtype: type[np.generic]) -> npt.NDArray[np.generic]:
        full = np.concatenate(parts[name]).reshape(_NROWS, total) if total else None
        out = full[:, keep] if full is not None else np.zeros((_NROWS, 0))
        return np.ascontiguousarray(out, dtype).ravel()

    freq = np.concatenate(freqs)[keep]
    offs = np.concatenate(lock_off)[keep]
    g_pos = np.concatenate(glo_pos) if glo_pos else np.zeros(0, np.intp)
    g_src = np.concatenate(glo_src) if glo_src else np.zeros(0, np.intp)
    # GLONASS cells that survive deduplication, at their output position.
    where = np.full(total, -1, np.intp)
    where[keep] = np.arange(n)
    g_new = where[g_pos]
    kept = g_new >= 0
    g_pos, g_src = g_new[kept], g_src[kept]
    mixed = bool(offs.any()) and not bool(offs.all())
    out_sat, out_sig = sat[keep], sig[keep]
    lli = np.zeros(n, np.uint8)
    mult = np.empty((2, n))
    mult[0] = _LIGHT_MS_M
    mult[1] = freq * 1e-3
    for arr in (out_sat, out_sig, freq, mult, lli):
        arr.setflags(write=False)  # shared by every epoch with this layout
    bytepos = rowwise("bytepos", np.intp)
    lsh = rowwise("lsh", np.uint32)
    rsh = rowwise("rsh", np.int32)
    mask = rowwise("mask", np.int32)
    invalid = rowwise("invalid", np.int32)
    scale = rowwise("scale", np.float64)
    rate = any(h.msm_level in (5, 7) for h in heads)
    one = _one_plan(n, rate, offs, (bytepos, lsh, rsh, mask, invalid, scale))
    return _EpochLayout(
        bytepos=bytepos,  # type: ignore[arg-type]
        lsh=lsh,  # type: ignore[arg-type]
        rsh=rsh,  # type: ignore[arg-type]
        mask=mask,  # type: ignore[arg-type]
        invalid=invalid,  # type: ignore[arg-type]
        scale=scale,  # type: ignore[arg-type]
        n=n,
        sat=out_sat,
        sig=out_sig,
        freq_hz=freq,
        mult=mult,
        lli=lli,
        nbytes=offset,
        lock_table=_LOCK_BOTH
        if mixed
        else (LOCK_TIME_DF402_S if offs.all() else LOCK_TIME_DF407_S),
        lock_offset=offs if mixed else None,
        glo_pos=g_pos,
        glo_src=g_src,
        glo_sat=out_sat[g_pos],
        glo_sig=out_sig[g_pos],
        sources=tuple(h.msg_type for h in heads),
        duplicates=total - n,
        glo_cache={},
        one=one,
    )


def _layout_key(heads: Sequence[MsmHead]) -> tuple[tuple[object, int], ...]:
    """What fixes an epoch's layout: each message's layout and payload length, in order."""
    return tuple([(h.layout, len(h.payload)) for h in heads])


def _layout_of(key: tuple[tuple[object, int], ...], heads: Sequence[MsmHead]) -> _EpochLayout:
    """The epoch layout of ``key`` (``_layout_key(heads)``), built from ``heads`` on a miss."""
    lay = _LAYOUTS.get(key)
    if lay is None:
        if len(_LAYOUTS) >= _MAX_EPOCH_LAYOUTS:
            _LAYOUTS.clear()
        lay = _LAYOUTS[key] = _build(heads)
    return lay


def decode_epochs(
    epochs: Sequence[tuple[Sequence[MsmHead], GpsTime, int]],
) -> tuple[list[ObsEpoch], int]:
    """The epochs of these MSM messages (checked by ``parse_msm_head``), and their repeated cells.

    Each item is (messages of one epoch in arrival order, its time, its station id). Epochs with
    the same layout are decoded together. Cells come in message order; a cell that a later message
    repeats (MSM6 and MSM7 of one system) is kept once, from the later message, and the count of
    those dropped is returned. GLONASS FDMA frequencies use each message's ``glo_channels``.

    ``sat``, ``sig``, ``lli`` and ``freq_hz`` are read-only arrays shared by every epoch of the
    same layout (``freq_hz`` with GLONASS FDMA cells: of the same layout and channels); the
    measured columns are new for each call (an epoch's
    columns may be views of one block allocated for the epochs decoded together).
    """
    if len(epochs) == 1:  # the daemon's usual feed: one epoch (same steps, no grouping)
        heads = epochs[0][0]
        lay = _layout_of(_layout_key(heads), heads)
        return [_decode_one(lay, epochs[0])], lay.duplicates
    groups: dict[tuple[tuple[object, int], ...], list[int]] = {}
    for k, (heads, _, _) in enumerate(epochs):
        groups.setdefault(_layout_key(heads), []).append(k)
    out: list[ObsEpoch] = [None] * len(epochs)  # type: ignore[list-item]
    duplicates = 0
    for key, members in groups.items():
        lay = _layout_of(key, epochs[members[0]][0])
        batch = min(_MAX_BATCH, max(1, _MAX_BATCH_ELEMENTS // max(1, _NROWS * lay.n)))
        for at in range(0, len(members), batch):
            part = members[at : at + batch]
            _decode_group(lay, [epochs[k] for k in part], out, part)
        duplicates += lay.duplicates * len(members)
    return out, duplicates


def _glo_columns(lay: _EpochLayout, heads: Sequence[MsmHead]) -> tuple[_F64, _F64]:
    """Frequencies (Hz) and (pseudorange, phase) multipliers of every cell of an epoch with
    GLONASS FDMA cells, from its messages' channels (``MsmHead.glo_channels``); read-only, cached
    per layout by the channel bytes, which with the layout fix every value."""
    chans = [h.glo_channels for h in heads if h.glo_channels is not None]
    key = chans[0].tobytes() if len(chans) == 1 else b"".join([c.tobytes() for c in chans])
    hit = lay.glo_cache.get(key)
    if hit is not None:
        return hit
    chan = (chans[0] if len(chans) == 1 else np.concatenate(chans)).take(lay.glo_src)
    f = lay.freq_hz.copy()
    # GLONASS ICD Ed. 5.1 §3.3.1.4 (f = base + k · step): parsers._signals.frequencies_hz
    f[lay.glo_pos] = frequencies_hz(lay.glo_sat, lay.glo_sig, chan)
    mult = np.empty((2, lay.n))
    mult[0] = lay.mult[0]
    mult[1] = f * 1e-3
    f.setflags(write=False)
    mult.setflags(write=False)
    if len(lay.glo_cache) >= _MAX_GLO_CHANNEL_SETS:
        lay.glo_cache.clear()
    lay.glo_cache[key] = (f, mult)
    return f, mult


@dataclass(frozen=True, slots=True, eq=False)
class _Tiles:
    """A layout's per-element arrays for a batch of k epochs, ordered (row, epoch, cell): each
    row's values repeated for every epoch, the byte positions moved on by the epoch's offset
    into the messages laid end to end."""

    bytepos: _IDX
    lsh: npt.NDArray[np.uint32]
    rsh: npt.NDArray[np.int32]
    mask: npt.NDArray[np.int32]
    invalid: npt.NDArray[np.int32]
    scale: _F64
    #: (pseudorange, phase) multipliers, (2, k, n); GLONASS FDMA layouts fill theirs per batch.
    mult: _F64


_TILES: dict[tuple[_EpochLayout, int], _Tiles] = {}


def _tiles(lay: _EpochLayout, k: int) -> _Tiles:
    hit = _TILES.get((lay, k))
    if hit is not None:
        return hit
    n = lay.n

    # Private to this module, never handed out; left writeable all the same, because ``take``
    # copies an index array that is not (numpy asks for a well-behaved, writeable one).
    def rep(a: npt.NDArray[np.generic], rows: int = _NROWS) -> npt.NDArray[np.generic]:
        return np.repeat(a.reshape(rows, 1, n), k, axis=1).ravel()

    pos = (lay.bytepos.reshape(_NROWS, 1, n) + _STEP[:, :k] * lay.nbytes).ravel()
    if len(_TILES) >= _MAX_TILES:
        _TILES.clear()
    hit = _TILES[lay, k] = _Tiles(
        bytepos=pos,
        lsh=rep(lay.lsh),  # type: ignore[arg-type]
        rsh=rep(lay.rsh),  # type: ignore[arg-type]
        mask=rep(lay.mask),  # type: ignore[arg-type]
        invalid=rep(lay.invalid),  # type: ignore[arg-type]
        scale=rep(lay.scale),  # type: ignore[arg-type]
        mult=rep(lay.mult, 2).reshape(2, k, n),  # type: ignore[arg-type]
    )
    return hit


def _decode_group(
    lay: _EpochLayout,
    epochs: list[tuple[Sequence[MsmHead], GpsTime, int]],
    out: list[ObsEpoch],
    where: list[int],
) -> None:
    k = len(epochs)
    n = lay.n
    # RTCM 10403.3 §3.5.12: one gather of the big-endian 64-bit word at every field's first byte,
    # shift the field to the top, arithmetic-shift it down (sign-extends), mask unsigned fields.
    # (32-bit words: every field is ≤ 24 bits and starts ≤ 7 bits into its first byte.)
    buf = b"".join([h.payload for heads, _, _ in epochs for h in heads] + [_PAD])
    words = np.ndarray((len(buf) - 3,), _BE32, buf, 0, (1,))
    # Elements in (row, epoch, cell) order: a row of every epoch is one contiguous block.
    t: _EpochLayout | _Tiles = lay if k == 1 else _tiles(lay, k)
    left = np.left_shift(words.take(t.bytepos), t.lsh, dtype=np.uint32)
    raw = left.view(np.int32) >> t.rsh
    raw &= t.mask
    val = raw * t.scale
    val[raw == t.invalid] = np.nan
    v = val.reshape(_NROWS, k, n)
    r = raw.reshape(_NROWS, k, n)

    # §3.5.12.3–4: rough + fine values. Rows 0–1 plus rows 2–3 give the rough range (ms) and
    # the phase-range rate (m/s); fine pseudorange and phase range (rows 4–5) plus the rough
    # range, times c/1000 and f/1000, give metres and cycles.
    rough_rate = v[0:2] + v[2:4]
    ranges = v[4:6] + rough_rate[0]
    freq = [lay.freq_hz] * k
    if lay.glo_pos.shape[0]:
        per_epoch = [_glo_columns(lay, heads) for heads, _, _ in epochs]
        if k == 1:
            freq[0], mult = per_epoch[0]
            mult = mult.reshape(2, 1, n)  # (2, n) over the one epoch: the same products
        else:
            mult = np.empty((2, k, n))
            for j, (f, m) in enumerate(per_epoch):
                mult[:, j] = m
                freq[j] = f
        ranges *= mult
    else:
        ranges *= lay.mult.reshape(2, 1, n) if k == 1 else t.mult
    cn0 = v[6].astype(np.float32)
    lock_raw = r[7]
    lock_s = lay.lock_table.take(
        lock_raw if lay.lock_offset is None else lock_raw + lay.lock_offset
    )
    lock_ind = lock_raw.astype(np.int16)
    half = r[8].astype(np.bool_)
    for j, (_, time, station) in enumerate(epochs):
        out[where[j]] = _epoch(
            lay, time=time, station=station, pr=ranges[0, j], phase=ranges[1, j],
            rate=rough_rate[1, j], cn0=cn0[j], lock_s=lock_s[j], lock_ind=lock_ind[j],
            half=half[j], freq=freq[j],
        )  # fmt: skip


def _epoch(
    lay: _EpochLayout, *, time: GpsTime, station: int, pr: _F64, phase: _F64, rate: _F64,
    cn0: npt.NDArray[np.float32], lock_s: npt.NDArray[np.float32],
    lock_ind: npt.NDArray[np.int16], half: npt.NDArray[np.bool_], freq: _F64,
) -> ObsEpoch:  # fmt: skip
    """``ObsEpoch(time=…, station_id=…, …, _validate=False)``, stored field by field into the
    plain twin of ``ObsEpoch`` whose class is then set to it (``_twin``), with the layout's
    shared read-only columns."""
    epoch = _ObsEpochSlots()
    epoch.time = time
    epoch.station_id = station
    epoch.sat = lay.sat
    epoch.sig = lay.sig
    epoch.pseudorange_m = pr
    epoch.phase_cycles = phase
    epoch.range_rate_mps = rate
    epoch.cn0_dbhz = cn0
    epoch.lock_time_s = lock_s
    epoch.lock_indicator = lock_ind
    epoch.half_cycle = half
    epoch.lli = lay.lli
    epoch.freq_hz = freq
    epoch.sources = lay.sources
    epoch._validate = False
    epoch.__class__ = ObsEpoch
    result: ObsEpoch = epoch
    return result


def _decode_one(lay: _EpochLayout, epoch: tuple[Sequence[MsmHead], GpsTime, int]) -> ObsEpoch:
    """``_decode_group`` of one epoch (k = 1) on the layout's ``_OnePlan``: the same values bit
    for bit (tests/test_decode_fixed_single.py compares both) from fewer elements. Only the rows
    that are scaled go through the scaling and the invalid check; C/N0 is one look-up by its
    unified code instead of a scaled row cast to float32; a layout without rate fields (MSM4/6
    only) reads no rows of NaN: its rate is a copy of one."""
    heads, time, station = epoch
    p = lay.one
    n = lay.n
    buf = b"".join([h.payload for h in heads] + [_PAD])
    words = np.ndarray((len(buf) - 3,), _BE32, buf, 0, (1,))
    # uint32 << uint32 (the loop ``dtype=np.uint32`` would pick; the gathered words are >u4)
    raw = np.left_shift(words.take(p.bytepos), p.lsh).view(np.int32) >> p.rsh
    raw &= p.mask
    m = p.m
    scaled = raw[:m]
    val = scaled * p.scale
    val[scaled == p.invalid] = np.nan
    if p.rate:
        v = val.reshape(6, n)
        rough_rate = v[0:2] + v[2:4]
        ranges = v[4:6] + rough_rate[0]
        rate = rough_rate[1]
    else:
        v = val.reshape(4, n)
        ranges = v[2:4] + (v[0] + v[1])
        rate = p.no_rate.copy()
    if lay.glo_pos.shape[0]:
        freq, mult = _glo_columns(lay, heads)
    else:
        freq, mult = lay.freq_hz, lay.mult
    ranges *= mult
    nf = p.nf
    rows = raw.reshape(nf + 3, n)
    lock_raw = rows[nf + 1]
    lock_s = lay.lock_table.take(
        lock_raw if lay.lock_offset is None else lock_raw + lay.lock_offset
    )
    return _epoch(
        lay, time=time, station=station, pr=ranges[0], phase=ranges[1], rate=rate,
        cn0=_CN0_BY_CODE.take(rows[nf]), lock_s=lock_s, lock_ind=lock_raw.astype(np.int16),
        half=rows[nf + 2].astype(np.bool_), freq=freq,
    )  # fmt: skip
