"""Where every cell, satellite and field of an MSM4/MSM7 encoding goes, for one set of cells.

The structure of an epoch's messages depends only on its (satellite, signal) cells and the MSM
level: which cells are kept, their order, the split into messages (RTCM 10403.3 §3.5.12.3:
NSat × NSig ≤ 64), the three masks of each header (Table 3.5-78) and the bit offset of every field
(Tables 3.5-81/82, 3.5-87/88). A stream repeats the same cells epoch after epoch, so that layout is
computed once with numpy and cached (as ``_msm`` caches its decode layouts); ``_msm_encode`` then
only computes values.

Axes: ``n`` cells kept, sorted by satellite id then signal id (= message order, then cell-mask
order inside each message); ``nu`` satellites in the same order; ``nmsg`` messages; ``ne`` packed
fields of all messages in transmission order.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

import numpy as np
import numpy.typing as npt

from ._bitpack import FramePlan, PackPlan, plan_frames, plan_packing
from ._msm_tables import CELL_FIELDS, MSM_SYSTEMS, SAT_FIELDS

__all__ = ["SYSTEMS_IN_ORDER", "EncodeLayout", "encode_layout"]

_IDX = npt.NDArray[np.intp]
_U64 = npt.NDArray[np.uint64]
_MAX_CELLS: Final = 64  # RTCM 10403.3 §3.5.12.3: NSat × NSig ≤ 64
_MAX_LAYOUTS: Final = 64  # cached layouts (≈ 60 kB each); cleared when full (a stream uses a few)
#: Message order; the index is also the satellite-id hundreds digit (``_signals.SYSTEMS``).
_SYSTEM_ORDER: Final = "GRECJSI"
#: MSM systems in message order.
SYSTEMS_IN_ORDER: Final = tuple(
    next(s for s in MSM_SYSTEMS.values() if s.letter == letter) for letter in _SYSTEM_ORDER
)
_SAT_BASE: Final = np.array([s.sat_base for s in SYSTEMS_IN_ORDER], np.intp)
_SIG_CODES: Final = max(int(s.signals.max()) for s in SYSTEMS_IN_ORDER) + 1
#: 2^(32 − id) by signal id: the DF395 signal-mask bit of each id (index 0 unused).
_SIG_BIT: Final = np.array([0] + [1 << (32 - g) for g in range(1, 33)], np.int64)
# RTCM 10403.3 Table 3.5-78: DF002 12, DF003 12, epoch 30, DF393 1, DF409 3, DF001 7, DF411 2,
# DF412 2, DF417 1, DF418 3, DF394 64, DF395 32, then DF396 of NSat × NSig bits.
_HEADER_WIDTHS: Final = (12, 12, 30, 1, 3, 7, 2, 2, 1, 3, 64, 32)
#: Header fields per message (the twelve above plus DF396).
NHEAD: Final = len(_HEADER_WIDTHS) + 1


def _signal_id_table() -> _IDX:
    """``table[system, packed code]`` = DF395 signal id 1…32, 0 where the system has none."""
    table = np.zeros((len(SYSTEMS_IN_ORDER), _SIG_CODES), np.intp)
    for k, system in enumerate(SYSTEMS_IN_ORDER):
        for sig_id, code in enumerate(system.signals.tolist()):
            if code:
                table[k, code] = sig_id
    table.setflags(write=False)
    return table


_SIG_ID: Final = _signal_id_table()


@dataclass(frozen=True, slots=True, kw_only=True)
class EncodeLayout:
    """Everything about one epoch's MSM messages that does not depend on measured values."""

    #: Epoch cell index of each kept cell (n,), in message order.
    cells: _IDX
    #: Satellite of each cell (n,), first cell of each satellite (nu,), cells per satellite (nu,).
    cell_sat: _IDX
    sat_start: _IDX
    sat_size: _IDX
    #: Column of each cell in a zero-padded (nu, width) per-satellite matrix.
    cell_col: _IDX
    width: int
    #: (cell count, satellite rows) for satellites with ≥ 8 cells (numpy sums those pairwise).
    wide: tuple[tuple[int, _IDX], ...]
    #: True for GLONASS satellites (nu,), and whether there is any.
    sat_glo: npt.NDArray[np.bool_]
    any_glo: bool
    #: System index (``SYSTEMS_IN_ORDER``) of each message.
    msg_sys: tuple[int, ...]
    #: Header fields (nmsg, NHEAD); DF003, the epoch time and DF409 are filled per call.
    head: _U64
    #: Transmission position of every field, gathered from [header, satellite fields, cell fields]
    #: each flattened field-major (ne,).
    perm: _IDX
    #: Bit packing and framing of all messages.
    pack: PackPlan
    frames: FramePlan


_LAYOUTS: dict[tuple[int, str, bytes, bytes], EncodeLayout | None] = {}


def _sizes(start: _IDX, total: int) -> _IDX:
    """Lengths of the runs that begin at ``start`` (sorted) and end at ``total``."""
    size = np.empty_like(start)
    size[:-1] = start[1:] - start[:-1]
    size[-1] = total - start[-1]
    return size


def _run_starts(key: _IDX) -> tuple[_IDX, _IDX]:
    """(index of each run start, run number of every element) of a sorted key."""
    new = np.ones(key.shape[0], np.bool_)
    new[1:] = key[1:] != key[:-1]
    return np.flatnonzero(new), np.cumsum(new) - 1


def encode_layout(
    sat: npt.NDArray[np.int16], sig: npt.NDArray[np.uint16], level: int
) -> EncodeLayout | None:
    """The (cached) layout for these cells, or None when no cell fits an MSM.

    Raises ``ValueError`` for two cells with the same satellite and signal.
    """
    key = (level, sat.dtype.str + sig.dtype.str, sat.tobytes(), sig.tobytes())
    if key in _LAYOUTS:
        return _LAYOUTS[key]
    if len(_LAYOUTS) >= _MAX_LAYOUTS:
        _LAYOUTS.clear()
    lay = _LAYOUTS[key] = _build(sat, sig, level)
    return lay


def _build(
    sat_in: npt.NDArray[np.int16], sig_in: npt.NDArray[np.uint16], level: int
) -> EncodeLayout | None:
    # Keep the cells whose system has an MSM, whose signal has an id there and whose satellite has
    # a mask bit 1…64.
    sat_all = sat_in.astype(np.intp)
    sys_all = sat_all // 100
    known = (sys_all >= 0) & (sys_all < len(SYSTEMS_IN_ORDER))
    sys_all = np.where(known, sys_all, 0)
    code = sig_in.astype(np.intp)
    sig_all = np.where(
        known & (code < _SIG_CODES), _SIG_ID[sys_all, np.minimum(code, _SIG_CODES - 1)], 0
    )
    bit_all = sat_all - _SAT_BASE[sys_all]
    cells = np.flatnonzero((sig_all > 0) & (bit_all >= 1) & (bit_all <= 64))
    if cells.size == 0:
        return None
    order_key = sat_all[cells] * 64 + sig_all[cells]
    order = np.argsort(order_key, kind="stable")
    cells, order_key = cells[order], order_key[order]
    step = order_key[1:] - order_key[:-1]
    if not (step > 0).all():
        dup = int(order_key[np.flatnonzero(step == 0)[0]])
        raise ValueError(f"two cells for satellite {dup // 64} and MSM signal id {dup % 64}")
    n = cells.shape[0]
    c_sig = sig_all[cells]
    c_sat = sat_all[cells]

    # Satellites, then messages: per system, satellites in id order, 64 // NSig per message.
    sat_start, cell_sat = _run_starts(c_sat)
    nu = sat_start.shape[0]
    sat_size = _sizes(sat_start, n)
    u_sys = sys_all[cells][sat_start]
    used = np.zeros((len(SYSTEMS_IN_ORDER), 33), np.bool_)
    used[u_sys[cell_sat], c_sig] = True
    per_msg = np.maximum(1, _MAX_CELLS // np.maximum(used.sum(axis=1), 1))
    rank = np.arange(nu) - np.searchsorted(u_sys, u_sys)
    msg_sat0, sat_msg = _run_starts(u_sys * 64 + rank // per_msg[u_sys])
    nmsg = msg_sat0.shape[0]
    nsat_m = _sizes(msg_sat0, nu)
    cell_msg = sat_msg[cell_sat]
    msg_cell0 = sat_start[msg_sat0]
    ncell_m = _sizes(msg_cell0, n)
    used_m = np.zeros((nmsg, 33), np.bool_)
    used_m[cell_msg, c_sig] = True
    nsig_m = used_m.sum(axis=1)
    sig_pos = (np.cumsum(used_m, axis=1) - 1)[cell_msg, c_sig]
    sat_pos = np.arange(nu) - msg_sat0[sat_msg]
    cell_idx = sat_pos[cell_sat] * nsig_m[cell_msg] + sig_pos
    ncm = nsat_m * nsig_m

    # Header template (Table 3.5-78): message number, DF393 on all but the last, the masks.
    msg_sys = u_sys[msg_sat0]
    head = np.zeros((nmsg, NHEAD), np.uint64)
    head[:, 0] = np.array([s.base for s in SYSTEMS_IN_ORDER], np.int64)[msg_sys] + level - 1
    head[:-1, 3] = 1
    one = np.uint64(1)
    sat_bit = one << (64 - (c_sat[sat_start] - _SAT_BASE[u_sys])).astype(np.uint64)
    head[:, 10] = np.bitwise_or.reduceat(sat_bit, msg_sat0)
    head[:, 11] = used_m.astype(np.int64) @ _SIG_BIT
    cell_bit = one << (ncm[cell_msg] - 1 - cell_idx).astype(np.uint64)
    head[:, 12] = np.bitwise_or.reduceat(cell_bit, msg_cell0)
    head.setflags(write=False)

    # Transmission position and width of every field.
    sat_fields, cell_fields = SAT_FIELDS[level], CELL_FIELDS[level]
    nelem = NHEAD + len(sat_fields) * nsat_m + len(cell_fields) * ncell_m
    elem0 = np.cumsum(nelem) - nelem
    head_w = np.empty((nmsg, NHEAD), np.int64)
    head_w[:, :-1] = _HEADER_WIDTHS
    head_w[:, -1] = ncm
    at_sat = elem0[sat_msg] + NHEAD + sat_pos
    at_cell = elem0[cell_msg] + NHEAD + len(sat_fields) * nsat_m[cell_msg]
    at_cell = at_cell + np.arange(n) - msg_cell0[cell_msg]
    dest = [(elem0[:, None] + np.arange(NHEAD)).ravel()]
    dest += [at_sat + k * nsat_m[sat_msg] for k in range(len(sat_fields))]
    dest += [at_cell + k * ncell_m[cell_msg] for k in range(len(cell_fields))]
    src_w = [head_w.ravel()]
    src_w += [np.full(nu, w, np.int64) for _, w, _ in sat_fields]
    src_w += [np.full(n, w, np.int64) for _, w, _ in cell_fields]
    to = np.concatenate(dest)
    perm = np.empty_like(to)
    perm[to] = np.arange(to.shape[0])
    width = np.concatenate(src_w)[perm]

    pack = plan_packing(width, nelem)

    glo = u_sys == SYSTEMS_IN_ORDER.index(MSM_SYSTEMS[108])
    wide = tuple(
        (int(m), np.flatnonzero(sat_size == m)) for m in np.unique(sat_size[sat_size >= 8])
    )
    cell_col = np.arange(n) - sat_start[cell_sat]
    for shared in (cells, cell_sat, sat_start, sat_size, cell_col, glo, perm):
        shared.setflags(write=False)  # shared by every epoch with these cells
    return EncodeLayout(
        cells=cells,
        cell_sat=cell_sat,
        sat_start=sat_start,
        sat_size=sat_size,
        cell_col=cell_col,
        width=int(sat_size.max()),
        wide=wide,
        sat_glo=glo,
        any_glo=bool(glo.any()),
        msg_sys=tuple(msg_sys.tolist()),
        head=head,
        perm=perm,
        pack=pack,
        frames=plan_frames(pack.msg_bytes),
    )
