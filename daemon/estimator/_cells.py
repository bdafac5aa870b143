"""Which cells of an epoch feed which satellite's frequency pair: the epoch layout, cached.

Axes: ``n`` cells of the epoch, ``m`` satellites present (sorted ids), ``d`` of them with a usable
pair (``idx``), ``S`` satellite slots (``MAX_SAT_ID``). A receiver sends the same satellites,
signals and carrier frequencies epoch after epoch, and which cells are usable (code and phase
present) rarely changes; everything that depends only on that — the pair chosen per satellite
(the first configured pair whose two signals both have code, phase and frequency), the cell
indices of its two signals, the pair labels, and the per-satellite pair constants of SCIENCE.md §3
(K, α, β, γ, λ_WL, L1 metres per TECU, noise factor) folded into one coefficient matrix — is
computed when the layout changes (keys: the bytes of ``sat``, ``sig`` and ``freq_hz``, and of the
usable mask) and reused otherwise; the last few layouts are kept, so one that comes back after a
blip is the same object (state kept per layout by identity, in the rings and the geometry, carries
on).

Linear combinations per satellite (rows of :attr:`EpochLayout.comb`, over the measurement rows
L1, L2, P1, P2 in metres): GF = L1 − L2; MW = (f1·L1 − f2·L2)/(f1 − f2) − (f1·P1 + f2·P2)/(f1 + f2);
levelling sample K·(P2 − P1) − K·GF; raw multipath MP1 = P1 − (1 + g)·L1 + g·L2 and
MP2 = P2 − γ·g·L1 + (γ·g − 1)·L2 with g = 2/(γ − 1); K·GF; IF code α·P1 + β·P2; IF phase
α·L1 + β·L2 (SCIENCE.md §3, §9).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import MAX_SAT_ID

from ._pairs import C_MPS, iono_coefficients

if TYPE_CHECKING:
    from ionwarden.parsers import ObsEpoch

    from ._pairs import PairTable

__all__ = ["COMB_NAMES", "N_SIG", "CellRouter", "EpochLayout"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
N_SIG = 10 * 32  # packed signal codes are band*32 + attribute, bands 0–9
#: Rows of the combination matrix (see module doc); the first six are differenced with the state
#: rows of the same order (``_state``: "gf_pred" … "gf0") in one call.
COMB_NAMES = ("gf", "mw", "lev_x", "mp1", "mp2", "gf_tecu", "if_code", "if_phase")
(GF_ROW, MW_ROW, LEVX_ROW, MP1_ROW, MP2_ROW, GFT_ROW, IFC_ROW, IFP_ROW) = range(len(COMB_NAMES))
_ZERO = np.array(0.0)
#: Layouts remembered by :class:`CellRouter` (~20 KiB each at 40 satellites); a blip needs two.
_RECENT = 4


@dataclass(slots=True, eq=False, kw_only=True)
class EpochLayout:
    """Everything about one epoch that depends only on its layout (see module doc)."""

    ids: bytes  # the bytes of sat, sig and freq_hz
    usable: bytes  # the bytes of the usable mask
    freq_finite: bool  # every freq_hz is finite
    n_unusable: int
    present: Idx  # (m,) satellite ids present, sorted
    sat16: npt.NDArray[np.int16]  # (m,) the same as int16, read-only (goes into snapshots)
    has: npt.NDArray[np.bool_]  # (m,) satellite has a usable pair
    all_dual: bool
    rank_all: Idx  # (m,) pair rank (0 where none)
    idx: Idx  # (d,) satellite ids with a pair
    rank: Idx  # (d,)
    rank_f: F64  # (d,) the same as float (state column)
    i12: Idx  # (2d,) cell index of band 1 then band 2 of each pair
    i12_2: Idx  # (2, d) the same as rows band 1, band 2
    labels: tuple[str, ...]  # (m,) pair label ("" single-frequency)
    cell_pos: Idx  # (n,) position of each cell's satellite in ``present`` (m: out of range)
    cells_in_range: bool  # no cell is out of range (every cell_pos < m)
    bias_flat: Idx  # (d,) flat index sat·W + rank into the (S, W) bias tables
    group: Idx  # (d,) receiver-bias group (system, rank)
    wavelength_m: F64  # (2, d) c/f of band 1 and band 2
    coefs: F64  # (9, d) block rows F1 … NOISE: f1, f2, K, α, β, γ, λ_WL, L1 m/TECU, noise
    comb: F64  # (len(COMB_NAMES), 4, d) combination coefficients over L1, L2, P1, P2
    no_lli: npt.NDArray[np.bool_]  # (d,) all False, read-only


class CellRouter:
    """Maps an epoch's cells to pairs, caching the result while the layout repeats."""

    def __init__(self, pairs: PairTable) -> None:
        self.pairs = pairs
        # Only signals named in the pair table matter: map their packed codes to compact slots
        # (the rest, and the table's padding code 0, to one slot no usable cell takes).
        codes = np.unique(np.concatenate((pairs.sig1.ravel(), pairs.sig2.ravel())))
        codes = codes[codes > 0]
        self._sig_slot = np.full(N_SIG, codes.shape[0], np.intp)
        self._sig_slot[codes] = np.arange(codes.shape[0])
        self._n_sig_slots = int(codes.shape[0])
        self._c1 = self._sig_slot[pairs.sig1]
        self._c2 = self._sig_slot[pairs.sig2]
        self._last: EpochLayout | None = None
        #: The read-only sat, sig and freq_hz arrays whose bytes are ``_last.ids`` (None: not
        #: known): the decoder hands the same arrays while the layout repeats, and the same
        #: read-only arrays hold the same bytes (no join of their bytes to compare).
        self._src: tuple[object, object, object] | None = None
        #: Recent layouts by (ids, usable), oldest first: a layout that comes back after a blip
        #: (a cell unusable for an epoch or two) is the same object again, so the per-layout
        #: state of the rings and the geometry (kept by identity) carries on. Setting ``_last``
        #: to None forgets them too (the next layout is built afresh).
        self._recent: dict[tuple[bytes, bytes], EpochLayout] = {}
        #: Times the layout changed (a new one built, or a recent one recalled); ``built``:
        #: layouts built.
        self.rebuilds = 0
        self.built = 0

    def layout(self, epoch: ObsEpoch) -> EpochLayout:
        """The layout of ``epoch`` (the cached one when sat, sig, freq and usability repeat)."""
        pr = epoch.pseudorange_m
        sat, sig, freq = epoch.sat, epoch.sig, epoch.freq_hz
        last = self._last
        src = self._src
        if (
            last is not None
            and src is not None
            and src[0] is sat
            and src[1] is sig
            and src[2] is freq
        ):
            ids = last.ids
            same: EpochLayout | None = last
        else:
            ids = b"".join((sat.tobytes(), sig.tobytes(), freq.tobytes()))
            same = last if last is not None and last.ids == ids else None
            read_only = not (sat.flags.writeable or sig.flags.writeable or freq.flags.writeable)
            src = (sat, sig, freq) if read_only else None
            self._src = None  # (set again below, with ``_last``)
        # Usable values: code > 0 and code, phase, frequency finite (their product is finite
        # exactly when all three are: |values| < 1e9 · 1e9 · 1e10 never overflow). With the
        # last layout's frequencies, all finite, the product of code and phase tells the same.
        prod = pr * epoch.phase_cycles
        if same is None or not same.freq_finite:
            prod *= epoch.freq_hz
        ok: npt.NDArray[np.bool_] = np.isfinite(prod)
        ok &= pr > _ZERO
        usable = ok.tobytes()
        if same is not None and same.usable == usable:
            self._src = src
            return same
        if last is None:
            self._recent.clear()
        key = (ids, usable)
        lay = self._recent.get(key)
        if lay is None:  # (a layout is a function of its key: the same one, built again)
            lay = self._build(epoch, ok, ids, usable)
            self.built += 1
            if len(self._recent) >= _RECENT:
                del self._recent[next(iter(self._recent))]
            self._recent[key] = lay
        self._last = lay
        self._src = src
        self.rebuilds += 1
        return lay

    def _build(
        self, epoch: ObsEpoch, ok: npt.NDArray[np.bool_], ids: bytes, usable_key: bytes
    ) -> EpochLayout:
        sat = epoch.sat.astype(np.intp)
        sig = epoch.sig.astype(np.intp)
        in_range = (sat >= 0) & (sat < MAX_SAT_ID) & (sig < N_SIG)
        usable = in_range & (sig >= 32) & ok
        slot = self._sig_slot[np.where(in_range, sig, 0)]
        cells = np.flatnonzero(usable & (slot < self._n_sig_slots))
        # Usable cells by key satellite·(slots + 1) + signal slot, sorted (stable: of a repeated
        # cell the last one is the rightmost, and the one taken).
        width_k = self._n_sig_slots + 1
        keys = sat[cells] * width_k + slot[cells]
        order = np.argsort(keys, kind="stable")
        sorted_keys = keys[order]

        def find(query: Idx) -> tuple[npt.NDArray[np.bool_], Idx]:
            """Whether each key is a usable cell, and that cell's index (0 where not)."""
            pos = np.searchsorted(sorted_keys, query, side="right") - 1
            pos_ok = np.maximum(pos, 0)
            if not sorted_keys.shape[0]:
                return np.zeros(query.shape, np.bool_), np.zeros(query.shape, np.intp)
            found = (pos >= 0) & (sorted_keys[pos_ok] == query)
            return found, cells[order[pos_ok]]

        # Satellites present, and per satellite the first configured pair with both signals.
        present = np.unique(sat[in_range])  # sorted, unique
        sysi = present // 100
        c1 = self._c1[sysi]
        c2 = self._c2[sysi]
        col = present[:, None] * width_k
        ok1, cell1 = find(col + c1)
        ok2, cell2 = find(col + c2)
        avail = ok1 & ok2
        has = np.logical_or.reduce(avail, axis=1)
        rank_all = avail.argmax(axis=1)
        idx = present[has]
        rank = rank_all[has]
        rows = np.flatnonzero(has)
        i12 = np.concatenate((cell1[rows, rank], cell2[rows, rank])).astype(np.intp)
        d = idx.shape[0]
        m = present.shape[0]

        width = self.pairs.width
        codes = sysi * width + rank_all
        labels = np.where(has, self.pairs.label_of_code[codes], "")
        cell_pos = np.full(sat.shape[0], m, np.intp)
        cell_pos[in_range] = np.searchsorted(present, sat[in_range])

        f = epoch.freq_hz[i12].reshape(2, d)
        f1, f2 = f
        co = iono_coefficients(f1, f2)
        coefs = np.stack(
            (f1, f2, co.k_tecu_per_m, co.alpha, co.beta, co.gamma, co.lambda_wl_m,
             co.l1_m_per_tecu, co.noise_factor),
        )  # fmt: skip
        k, a, b, gam = co.k_tecu_per_m, co.alpha, co.beta, co.gamma
        g1 = 2.0 / (gam - 1.0)
        one = np.ones(d)
        zero = np.zeros(d)
        # Rows over (L1, L2, P1, P2); see COMB_NAMES and the module doc.
        comb = np.array(
            [
                [one, -one, zero, zero],
                [f1 / (f1 - f2), -f2 / (f1 - f2), -f1 / (f1 + f2), -f2 / (f1 + f2)],
                [-k, k, -k, k],
                [-(1.0 + g1), g1, one, zero],
                [-gam * g1, gam * g1 - 1.0, zero, one],
                [k, -k, zero, zero],
                [zero, zero, a, b],
                [a, b, zero, zero],
            ]
        ).reshape(len(COMB_NAMES), 4, d)
        sat16 = present.astype(np.int16)
        no_lli = np.zeros(d, np.bool_)
        i12_2 = i12.reshape(2, d)
        for arr in (present, sat16, has, rank_all, idx, rank, i12, i12_2, cell_pos, no_lli, coefs):
            arr.setflags(write=False)
        return EpochLayout(
            ids=ids,
            usable=usable_key,
            freq_finite=bool(np.isfinite(epoch.freq_hz).all()),
            n_unusable=int(np.count_nonzero(in_range) - np.count_nonzero(usable)),
            present=present,
            sat16=sat16,
            has=has,
            all_dual=bool(d == m),
            rank_all=rank_all,
            idx=idx,
            rank=rank,
            rank_f=rank.astype(np.float64),
            i12=i12,
            i12_2=i12_2,
            labels=tuple(labels.tolist()),
            cell_pos=cell_pos,
            cells_in_range=bool(np.count_nonzero(in_range) == sat.shape[0]),
            bias_flat=idx * width + rank,
            group=sysi[has] * width + rank,
            wavelength_m=C_MPS / f,
            coefs=coefs,
            comb=comb,
            no_lli=no_lli,
        )
