"""Several stations' epochs of one GPS second estimated as one tick (DEVELOPERS.md, "What would
reach the line": the batched tick, slice 1).

Receivers align their epochs to the GPS second, so a daemon's stations all step at once, and a
station's estimate costs mostly the number of numpy calls (~1 µs each here, whatever the length
of the arrays), not the arithmetic. :meth:`TickBatch.update` lays the working blocks of the
stations side by side, as column ranges of one (NROW, D) array that each station's own block
views, and runs the per-satellite core of the estimate once over all of them: the linear
combinations, the slip tests' common case, the levelling and the Hatch filter. What differs per
station stays per station: the bookkeeping, the bias correction, ROT and ROTI, and the station
figures and records; the geometry's rows and the sky terms are computed over the joined columns
too where every station allows it (``_tick_sky``).

It gives what ``[est.update(epoch) for est, epoch in items]`` gives, bit for bit: the same
snapshots, counters and later state (tests/test_estimator_tick.py). Element-wise operations and
the combinations' contraction give the same bits on a segment alone as cut out of a longer
array (``bench/bench_segment_bits.py`` checks a platform); the core's decisions are the
conjunction of the stations' own, and when one station needs more than the common case (an arc
starts, a slip test fires, a loss-of-lock flag, another time, interval or sampling gap), every
station of the tick runs its own path, which rewrites whatever the shared screen wrote (only work
rows and buffers: ``ArcState.try_continue``).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ._cells import GFT_ROW, IFC_ROW, IFP_ROW, MP1_ROW, MP2_ROW
from ._estimator import BlockRows, _Block, _Pre, level, smooth
from ._npfast import einsum as _einsum
from ._npfast import quiet_enter as _quiet_enter
from ._npfast import quiet_exit as _quiet_exit
from ._state import NROW
from ._tick_sky import JointGeometry, joint_sky

if TYPE_CHECKING:
    from collections.abc import Sequence

    from ionwarden.parsers import ObsEpoch

    from ._cells import EpochLayout
    from ._estimator import StationEstimator
    from ._geometry import Cached
    from ._snapshot import StationSnapshot

__all__ = ["TickBatch"]

F64 = npt.NDArray[np.float64]


class _Side(BlockRows):
    """The working blocks of a tick's stations side by side: one (NROW, D) array ``g`` whose
    column range ``offs[i]`` is station i's block (its ``_Block`` is rebuilt on that view), with
    the rows and buffers the core runs on (``BlockRows``), the stations' epoch values joined
    (``cur``, el, sin el, total bias) and the layouts' coefficients joined."""

    __slots__ = ("blocks", "comb", "cos_lat", "cur", "el", "ests", "lon_lat", "offs", "pos", "sin",
                 "total")  # fmt: skip

    def __init__(self, ests: tuple[StationEstimator, ...], blocks: Sequence[_Block]) -> None:
        widths = [b.g.shape[1] for b in blocks]
        d = sum(widths)
        g = np.empty((NROW, d))
        self.ests = ests
        self.offs: list[slice] = []
        joined: list[_Block] = []
        at = 0
        for est, b, w in zip(ests, blocks, widths, strict=True):
            view = g[:, at : at + w]
            view[...] = b.g
            # The station's block on its columns of ``g`` (the state moves, nothing else).
            nb = _Block(b.lay, view, b.cur, b.arc, b.n_min)
            nb.meas[...] = b.meas  # (this epoch's, gathered before the blocks were joined)
            est._blk = nb
            joined.append(nb)
            self.offs.append(slice(at, at + w))
            at += w
        super().__init__(g)
        self.blocks = tuple(joined)
        self.comb = np.concatenate([b.lay.comb for b in joined], axis=2)
        self.cur = np.empty((7, d))
        self.el, self.sin, self.total = np.empty(d), np.empty(d), np.empty(d)
        #: The stations' positions (lat, lon rad) the rows below were made for, and those rows:
        #: each column's station longitude and latitude, and the cosine of that latitude.
        self.pos: tuple[tuple[float, float], ...] = ()
        self.lon_lat = np.empty((2, d))
        self.cos_lat = np.empty(d)

    def positions(self) -> tuple[F64, F64]:
        """Each column's station (lon, lat) rows and cos(lat) row (``SkyTerms.offsets``' column
        and 0-d factor, per column), renewed when a station's position changed."""
        pos = tuple((e.geometry.lat_rad, e.geometry.lon_rad) for e in self.ests)
        if pos != self.pos:
            for (lat, lon), o in zip(pos, self.offs, strict=True):
                self.lon_lat[0, o] = lon
                self.lon_lat[1, o] = lat
                self.cos_lat[o] = math.cos(lat)
            self.pos = pos
        return self.lon_lat, self.cos_lat

    def holds(self, ests: tuple[StationEstimator, ...], blocks: Sequence[_Block]) -> bool:
        """These stations, each still on its block of this side (same order)."""
        return ests == self.ests and all(a is b for a, b in zip(blocks, self.blocks, strict=True))


def _alike(ests: Sequence[StationEstimator]) -> bool:
    """Every station estimates with the same settings (thresholds, windows, gaps)."""
    first = ests[0]
    return all(e.settings == first.settings for e in ests[1:])


def _alone(est: StationEstimator, epoch: ObsEpoch) -> StationSnapshot | Exception:
    try:
        return est.update(epoch)
    except Exception as exc:  # the station's own, in its place
        return exc


def _own(
    est: StationEstimator, epoch: ObsEpoch, t: float, pre: _Pre
) -> StationSnapshot | Exception:
    """The rest of ``est.update(epoch)`` after its bookkeeping (``_begin``) and inputs (``pre``)."""
    try:
        dual = est._dual(epoch, pre[0], t, est._interval, pre[6], pre[7], pre[3])
        return est._post(epoch, t, est._interval, pre, dual)
    except Exception as exc:  # the station's own, in its place
        return exc


class TickBatch:
    """The urgent estimates of several stations' epochs of one GPS second, run as one tick where
    they can be (see the module doc); one per daemon process, fed each burst's epochs."""

    def __init__(self) -> None:
        #: Station-epochs served by the batched core, and by each station's own path.
        self.served_batched = 0
        self.served_alone = 0
        self._side: _Side | None = None
        #: The stations whose settings were last found alike (checked when they change).
        self._alike: tuple[StationEstimator, ...] = ()
        #: The stations' geometry rows from their caches as one (``_tick_sky``).
        self._geometry = JointGeometry()

    def update(self, items: Sequence[tuple[StationEstimator, ObsEpoch]]) -> list[StationSnapshot]:
        """The snapshot of each (estimator, epoch), in order: what ``estimator.update(epoch)``
        gives for each in turn. An estimator appears at most once per call. A station's failure
        is raised once every other station of the tick is done (see :meth:`run`)."""
        out = self.run(items)
        for r in out:
            if isinstance(r, Exception):
                raise r
        return out  # type: ignore[return-value]  # (no exception in it)

    def run(
        self, items: Sequence[tuple[StationEstimator, ObsEpoch]]
    ) -> list[StationSnapshot | Exception]:
        """:meth:`update`, with the exception a station's estimate raised in its place: the
        other stations keep their snapshots (the failing one is left as its own path's
        exception would leave it; one raised in the shared core sends every station down its
        own path)."""
        if len({id(est) for est, _ in items}) != len(items):
            raise ValueError("TickBatch.update: an estimator appears twice in one tick")
        if len(items) < 2:
            self.served_alone += len(items)
            return [_alone(est, epoch) for est, epoch in items]
        token = _quiet_enter()
        try:
            return self._tick(items)
        finally:
            _quiet_exit(token)

    def _tick(
        self, items: Sequence[tuple[StationEstimator, ObsEpoch]]
    ) -> list[StationSnapshot | Exception]:
        out: list[StationSnapshot | Exception | None] = []
        live: list[tuple[int, StationEstimator, ObsEpoch, float]] = []
        lays: list[EpochLayout] = []
        cached: list[Cached | None] = []
        for est, epoch in items:  # (each station's _pre, split around its geometry's lookup)
            try:
                t = est._begin(epoch)
                if t is None:  # out of order: counted, the last snapshot again
                    out.append(est._last if est._last is not None else est._empty(epoch))
                    continue
                lay = est._layout(epoch)
                same = est.geometry.cached(lay.present, t)
            except Exception as exc:  # the station's own, in its place
                out.append(exc)
                continue
            live.append((len(out), est, epoch, t))
            lays.append(lay)
            cached.append(same)
            out.append(None)
        pres: list[_Pre] = []
        try:
            joint = self._geometry.rows(live, cached)
        except Exception:  # each station's own lookup says whose it is
            joint = None
        if joint is not None:  # the rows of every station from its cache, as one
            geo, sin_all, offs = joint
            for (_, est, _, _), lay, same, o in zip(live, lays, cached, offs, strict=True):
                assert same is not None
                pres.append(est._inputs(lay, geo[:, o], same[6], sin_all[o]))
        else:
            kept = []
            for x, lay in zip(live, lays, strict=True):
                try:
                    pres.append(x[1]._looked_up(lay, x[3]))
                except Exception as exc:  # the station's own, in its place
                    out[x[0]] = exc
                    continue
                kept.append(x)
            live = kept
        snaps: list[StationSnapshot | Exception] | None = None
        if len(live) > 1 and all(x[3] == live[0][3] for x in live):
            try:
                snaps = self._batched(live, pres)
            except Exception:  # each station's own path says whose it is
                snaps = None
        if snaps is None:
            # (each station's own path, after its bookkeeping and inputs above)
            snaps = [
                _own(est, epoch, t, pre) for (_, est, epoch, t), pre in zip(live, pres, strict=True)
            ]
            self.served_alone += len(items)
        else:
            self.served_batched += len(live)
            self.served_alone += len(items) - len(live)
        for (i, est, _, _), snap in zip(live, snaps, strict=True):
            if not isinstance(snap, Exception):
                est._last = snap
            out[i] = snap
        return out  # type: ignore[return-value]  # (every None was replaced)

    def _batched(
        self,
        live: list[tuple[int, StationEstimator, ObsEpoch, float]],
        pres: list[_Pre],
    ) -> list[StationSnapshot | Exception] | None:
        """The snapshots by the shared core, or None when a station needs its own path (the
        blocks' work rows and buffers may have been written: the own paths write them again)."""
        ests = tuple(x[1] for x in live)
        t = live[0][3]
        interval = ests[0]._interval
        if ests != self._alike:
            if not _alike(ests):
                return None
            self._alike = ests
        blocks: list[_Block] = []
        gap_s = math.nan
        for (_, est, epoch, _), pre in zip(live, pres, strict=True):
            if est._interval != interval:
                return None
            blk, lli_lost, gap = est._dual_in(epoch, pre[0], interval)
            if lli_lost is not None or blk.g.shape[1] == 0:
                return None
            if gap != gap_s:
                if not math.isnan(gap_s):
                    return None
                gap_s = gap
            blocks.append(blk)
        side = self._side
        if side is None or not side.holds(ests, blocks):
            self._side = side = _Side(ests, blocks)
            blocks = list(side.blocks)
        # The stations' epoch values side by side (their own buffers were filled above).
        np.concatenate([b.meas for b in blocks], axis=1, out=side.meas)
        np.concatenate([b.cur for b in blocks], axis=1, out=side.cur)
        np.concatenate([p[6] for p in pres], out=side.el)
        np.concatenate([p[7] for p in pres], out=side.sin)
        el_known = all(p[3] for p in pres)
        comb = _einsum("kjd,jd->kd", side.comb, side.meas)
        arcs = side.arcs
        arcs.t_all = arcs.dt_s = None  # (a station may have stepped alone since: per row)
        n_min = min(b.n_min for b in blocks)
        # (b, t, gf_mw, el_rad, el_known, cur, lli_lost, gap_s, all_tracked: positional)
        if ests[0].arcs.try_continue(
            arcs, t, comb[: GFT_ROW + 1], side.el, el_known, side.cur, None, gap_s,
            n_min >= 2.0,
        ) is not None:  # fmt: skip
            return None
        try:  # (committed: a failure from here on is every station's)
            return self._commit(live, pres, side, blocks, comb, n_min, el_known)
        except Exception as exc:  # every station's step failed with it
            return [exc] * len(live)

    def _commit(  # noqa: PLR0917 - one call per tick
        self,
        live: list[tuple[int, StationEstimator, ObsEpoch, float]],
        pres: list[_Pre],
        side: _Side,
        blocks: list[_Block],
        comb: F64,
        n_min: float,
        el_known: bool,
    ) -> list[StationSnapshot | Exception]:
        """The rest of the tick once the slip screen committed every station's common case: the
        levelling, bias correction, ROT and ROTI, Hatch filter, then each station's snapshot (a
        station's failure there in its place)."""
        ests = tuple(x[1] for x in live)
        t = live[0][3]
        interval = ests[0]._interval
        for b in blocks:  # what each station's own common case leaves
            b.n_min += 1.0
            b.arcs.t_all = float(t)
            b.arcs.dt_s = None  # (its DT row holds t − its last time: known per row only)
        gf_tecu, if_code, if_phase = comb[GFT_ROW], comb[IFC_ROW], comb[IFP_ROW]
        level(side, side.sin, side.el, el_known)
        stec_raw = gf_tecu + side.lev
        mp = comb[MP1_ROW : MP2_ROW + 1]
        mp -= side.mp_mean
        corr = [est.bias_correction(b.lay, b, False) for est, b in zip(ests, blocks, strict=True)]
        np.concatenate([c[1] for c in corr], out=side.total)
        stec = stec_raw - side.total
        rots = [
            est.rot_roti(t, b.lay.idx, side.rel[o], b.arc, interval)
            for est, b, o in zip(ests, blocks, side.offs, strict=True)
        ]
        hc = ests[0].hatch_consts(interval)  # (the stations' settings and interval are alike)
        hatch = smooth(side, if_code, if_phase, hc, n_min + 1.0 >= hc[1], None)
        iono_l1 = stec * side.l1m
        mp1, mp2 = comb[MP1_ROW], comb[MP2_ROW]
        skies = joint_sky(side, ests, pres, stec)
        snaps: list[StationSnapshot | Exception] = []
        for (_, est, epoch, _), pre, b, o, c, r, sky in zip(
            live, pres, blocks, side.offs, corr, rots, skies, strict=True
        ):
            no = b.lay.no_lli
            figs = (stec[o], r[0], r[1], iono_l1[o], if_code[o], if_phase[o], hatch[o], mp1[o],
                    mp2[o], b.noise, c[2], stec_raw[o], b.lev, c[0], b.n, b.arc, no, no)  # fmt: skip
            try:
                snaps.append(est._post(epoch, t, interval, pre, figs, sky))
            except Exception as exc:  # the station's own, in its place
                snaps.append(exc)
        return snaps
