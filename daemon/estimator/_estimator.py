"""The rolling ionosphere estimator of one station: ObsEpoch in, StationSnapshot out.

Pure and vectorised (STYLE rules 21–22): ``update(epoch)`` takes time from the epoch and never
reads a clock; per-satellite state is one preallocated (NSTATE, S) matrix indexed by satellite id
(``S = MAX_SAT_ID`` slots, rows in ``_state``). The rows of the layout's ``d`` satellites, with
the layout's pair coefficients appended, form the working block, gathered when the layout changes
and kept while it repeats (written back when it changes or the state is read:
:meth:`StationEstimator.state_rows`); rolling windows are ring buffers (``_windows``); no
per-satellite Python branch on the hot path. Pair choice per satellite: the first configured pair
(``_pairs``) whose two signals both have code and phase this epoch; a change of pair starts a new
arc. The pair choice, cell indices and pair constants depend only on the epoch's layout and are
cached while it repeats (``_cells``); the linear combinations (GF, MW, levelling sample, IF, MP)
come out of one contraction of the (4, d) measurements with the layout's coefficient matrix. Work
on the common path (no arc starts, every satellite dual-frequency, arcs longer than the Hatch
window) skips the masking the rare cases need; every shortcut gives the general path's results
bit for bit (tests/test_estimator_fastpaths.py). Constants enter numpy calls as 0-d arrays (a
Python float costs a conversion per call: the per-epoch cost is the number of calls).

Symbols per satellite (SCIENCE.md §2–§9): P1, P2 code (m); L1, L2 phase (m = cycles·c/f); K
(TECU/m); GF = L1 − L2; MW Melbourne–Wübbena; STEC_raw = K·GF + levelling offset (TECU), the
offset the sin²el-weighted running mean over the arc of K·(P2 − P1) − K·GF; STEC = STEC_raw −
B_sat − B_rcv; VTEC = STEC/M(el); ROT = ΔSTEC/Δt over ``rot_interval_s`` (TECU/min, sliding);
ROTI = std of ROT over ``roti_window_s``; IF = α·X1 + β·X2; Hatch-smoothed IF code with
N = min(samples in arc, window/interval); MP1/MP2 code-minus-carrier with the arc mean removed.
"""

# size: ~600 lines keep the whole per-epoch path in one place (STYLE rule 1, on purpose).
from __future__ import annotations

import copy
import math
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.parsers import MAX_SAT_ID

from ._arcs import REASON_NAMES, REASON_PAIR, ArcBlock, ArcState, SlipThresholds
from ._biases import MIN_FIT, BiasModel
from ._cells import (
    GFT_ROW,
    IFC_ROW,
    IFP_ROW,
    LEVX_ROW,
    MP1_ROW,
    MP2_ROW,
    CellRouter,
    EpochLayout,
)
from ._geometry import Geometry
from ._npfast import count_nonzero as _count_nonzero
from ._npfast import einsum as _einsum
from ._npfast import quiet_enter as _quiet_enter
from ._npfast import quiet_exit as _quiet_exit
from ._pairs import PairTable, band_delays_s
from ._persist import apply_rolling, checked_rolling, resume_allowed, rolling_state
from ._snapshot import SatelliteFigures, StationSnapshot, satellite_figures_of, snapshot_of
from ._state import (
    ARC,
    F1,
    GF0,
    GF_PRED,
    HATCH,
    IFL_PREV,
    L1M,
    LAST_T,
    LEV_MEAN,
    LEV_SW,
    MP1,
    MP2,
    NOISE,
    NROW,
    NSTATE,
    K,
    N,
    new_state,
)  # fmt: skip
from ._station import SkyTerms, station_values
from ._windows import LagRing, SlotStd

if TYPE_CHECKING:
    from ionwarden.parsers import GlonassEphemeris, GpsTime, KeplerEphemeris, ObsEpoch

__all__ = ["StationEstimator"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
Bool = npt.NDArray[np.bool_]
N_SIG = 10 * 32  # packed signal codes are band*32 + attribute, bands 0–9
#: An epoch this much older than the last one restarts the time-dependent state (s).
_TIME_RESET_S = 3600.0
#: Version of :meth:`StationEstimator.state_dict` (1: receiver biases only; 2: + rolling state).
STATE_VERSION = 2
#: Epoch intervals remembered to estimate the sampling interval (median).
_INTERVAL_HISTORY = 9
_LEV_FLOOR = np.array(0.1)  # sin(el) floor of the levelling weights
_ZERO = np.array(0.0)
_ONE = np.array(1.0)
# Ufuncs on the per-epoch path take ``out`` positionally (a keyword costs ~250 instructions;
# not np.maximum: deprecated there).
#: The first figures of :meth:`StationEstimator._dual` (the others follow: "stec_raw", "lev",
#: "b_sat", "n_arc", "arc", "new", "pair_switch"); these are spread over every satellite present
#: (NaN where single-frequency) in epochs with single-frequency satellites.
_SPREAD = ("stec", "rot", "roti", "iono_l1", "if_code", "if_phase", "hatch", "mp1", "mp2",
           "noise_factor", "relevel")  # fmt: skip
#: The figures of :meth:`StationEstimator._dual`, in the order above (a tuple: no dict to build
#: and read back each epoch).
_Dual = tuple[npt.NDArray[Any], ...]
#: :meth:`StationEstimator._pre`'s inputs of an epoch's estimate: (layout, geometry rows, its
#: source, every elevation known, el and sin(el) of the satellites present, of the
#: dual-frequency ones).
_Pre = tuple[EpochLayout, F64, str, bool, F64, F64, F64, F64]
#: An epoch's sky terms (:meth:`StationEstimator._post`): the mapping factor of each satellite
#: present, the (3, m) pierce-point x, y (km) and VTEC rows (C order: the station figures'
#: input), el, az, pierce lat, lon in degrees (rows) and the elevation of each cell (degrees).
_Sky = tuple[F64, F64, F64, F64]


#: (reason bit, its counter), in the order of ``REASON_NAMES``.
_REASON_COUNTERS = tuple((bit, f"arcs_{name}") for bit, name in REASON_NAMES.items())


def _tally_reasons(counters: dict[str, int], reason: npt.NDArray[np.int64]) -> bool:
    """Count the arc starts of each reason (bits of ``reason``) in ``counters`` (whose keys
    exist): the per-bit counts of the set bits, read off the few non-zero satellites in Python
    (a mask and a count per bit cost two numpy calls each). Returns whether any is a pair
    switch."""
    pair = 0
    for r in reason.tolist():
        if r:
            pair |= r & REASON_PAIR
            for bit, key in _REASON_COUNTERS:
                if r & bit:
                    counters[key] += 1
    return pair != 0


def level(b: BlockRows, sin_el: F64, el: F64, el_known: bool) -> None:
    """Levelling: the running sin²el-weighted mean of K·(P2 − P1) − K·GF over the arc, and the
    running arc means of MP1/MP2, as one stack: mean += (sample − mean)·(w/Σw) for the levelling
    row, (sample − mean)/n for the MP rows (``b.step`` holds the samples minus the means)."""
    w = np.maximum(sin_el, _LEV_FLOOR, out=b.w)
    w *= w
    if not el_known:
        w = np.where(np.isnan(el), 1.0, w)
    b.lev_sw += w
    w /= b.lev_sw
    b.step_lev *= w
    b.step_mp /= b.n
    b.means += b.step


def smooth(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
    b: BlockRows, if_code: F64, if_phase: F64, hc: tuple[float, float, F64, F64],
    full: bool, new: Bool | None,
) -> F64:  # fmt: skip
    """Hatch filter (reset per arc) of the iono-free code: the smoothed code (a new array), the
    block's HATCH and IFL_PREV rows updated. ``hc``: ``StationEstimator.hatch_consts``; ``full``:
    every arc is longer than the window (N fixed: the same bits as the general formula, which
    divides by min(n, N)); ``new``: the arcs that start (None: none)."""
    prev = np.add(b.hatch, if_phase, b.prev)
    prev -= b.ifl_prev
    if full:
        hatch = if_code / hc[2]
        prev *= hc[3]
    else:  # (the 0-d window and one: no Python float to convert per call)
        n_h = np.minimum(b.n, hc[2])
        hatch = if_code / n_h
        q = np.subtract(n_h, _ONE)
        q /= n_h  # (N − 1)/N
        prev *= q
    hatch += prev
    if new is not None:
        np.copyto(hatch, if_code, where=new)  # (hatch is this epoch's own array)
    b.hatch[...] = hatch
    b.ifl_prev[...] = if_phase
    return hatch


class BlockRows:
    """A working block ``g`` (NROW, d): the views of its rows and the work buffers the per-epoch
    core uses (the slip tests, :func:`level`, :func:`smooth`), made once per block: a station's
    ``_Block``, or several stations' blocks side by side (``_tick``)."""

    __slots__ = ("arcs", "g", "gf0", "hatch", "ifl_prev", "l1m", "lev", "lev_sw", "means", "meas",
                 "meas_l", "meas_p", "mp_mean", "n", "prev", "rel", "step", "step_lev",
                 "step_mp", "w")  # fmt: skip

    def __init__(self, g: F64) -> None:
        d = g.shape[1]
        self.g = g  # (NROW, d) state rows, the layout's coefficients, work rows
        #: the slip tests' views of g; they difference the rows GF_PRED … GF0 (``_state``)
        self.arcs = ArcBlock(g, GF0 - GF_PRED + 1)
        self.meas = meas = np.empty((4, d))  # L1, L2 (m), P1, P2 (m)
        self.meas_l, self.meas_p = meas[:2], meas[2:]
        self.n, self.lev_sw, self.lev, self.gf0 = g[N], g[LEV_SW], g[LEV_MEAN], g[GF0]
        self.means = g[LEV_MEAN : MP2 + 1]  # levelling offset, MP1 and MP2 arc means
        self.mp_mean = g[MP1 : MP2 + 1]
        self.hatch, self.ifl_prev, self.l1m = g[HATCH], g[IFL_PREV], g[L1M]
        self.w = np.empty(d)  # levelling weights
        diff = self.arcs.diff  # rows GF_PRED … GF0 subtracted from the epoch's comb rows
        self.step = diff[LEV_MEAN - GF_PRED : MP2 - GF_PRED + 1]  # steps of ``means``
        self.step_lev, self.step_mp = self.step[0], self.step[1:]
        self.rel = diff[GF0 - GF_PRED]  # K·GF relative to the arc's first
        self.prev = np.empty(d)  # Hatch: the previous smoothed code carried to this epoch


class _Block(BlockRows):
    """The working block of the current layout (see ``_state``), kept while the layout repeats,
    with the views and work buffers of :meth:`StationEstimator._dual`, made once per block.

    Copies and pickles rebuild the views from the arrays they view (a copied view would be an
    independent array): only ``lay``, ``g``, ``cur``, ``arc`` and ``n_min`` carry state; the other
    buffers are written each epoch before they are read.
    """

    __slots__ = ("arc", "cell_pos", "cell_rows", "cells", "cur", "cur_flags", "i12", "i12_2",
                 "lay", "n_min", "noise")  # fmt: skip

    def __init__(
        self, lay: EpochLayout, g: F64, cur: F64, arc: npt.NDArray[np.int32], n_min: float
    ) -> None:
        super().__init__(g)
        d = lay.idx.shape[0]
        self.lay = lay
        self.cur = cur  # (7, d) this epoch's rank, half-cycle flags, lock indicators, lock times
        self.cur_flags = cur[1:].reshape(3, 2 * d)  # flags, indicators, times: band 1, band 2
        #: (3, n) this epoch's half-cycle flags, lock indicators, lock times per cell
        self.cells = cells = np.empty((3, lay.cell_pos.shape[0]))
        self.cell_rows = (cells[0], cells[1], cells[2])
        self.arc = arc  # (d,) arc ids, read-only (goes into snapshots)
        self.n_min = n_min  # smallest sample count of the arcs (NaN: unknown)
        self.noise = lay.coefs[NOISE - F1]  # IF noise factor, read-only (goes into snapshots)
        # Private writeable copies of the layout's read-only index arrays for ``take`` (it copies
        # a read-only index array on each call, ~1 µs); never written, never handed out.
        self.i12_2, self.i12 = lay.i12_2.copy(), lay.i12.copy()
        self.cell_pos = lay.cell_pos.copy()

    def __reduce__(self) -> tuple[Any, ...]:
        return (_Block, (self.lay, self.g, self.cur, self.arc, self.n_min))


class StationEstimator:
    """Rolling TEC/ROT/ROTI/VTEC/iono-free estimator for one receiver."""

    def __init__(
        self,
        settings: EstimatorSettings | None = None,
        *,
        station: str = "",
        ephemerides_per_sat: int = 3,
        defer_fit: bool = False,
    ) -> None:
        """``ephemerides_per_sat``: newest broadcast sets kept per satellite (raise it when a whole
        day's navigation file is loaded up front, as ``ionwarden process`` does).

        ``defer_fit``: the periodic receiver-bias fit of an epoch (it changes only later epochs'
        figures) waits for :meth:`settle` (the daemon runs it after other stations' snapshots
        are out, midway to the next epoch). The results are the same bit for bit: the fit reads
        the epoch's arrays (fresh, or block buffers only :meth:`update` writes), the bias
        model, the interval and the last ROTI median, never the geometry, and every entry that
        changes one of those settles it first (:meth:`update`, a new ephemeris's satellite
        delays in :meth:`add_ephemeris`, :meth:`state_dict`, :meth:`load_state`, :meth:`copy`,
        a time reset); the receiver position and GSV change the geometry only."""
        cfg = settings or EstimatorSettings()
        self.settings = cfg
        self.station = station
        self.pairs = PairTable.from_config(cfg.pairs)
        self._shell_m = cfg.shell_height_km * 1000.0
        self._mask_rad = math.radians(cfg.elevation_mask_deg)
        S = MAX_SAT_ID
        th = SlipThresholds(mw_k_sigma=cfg.slip_mw_k_sigma, gf_floor_m=cfg.slip_gf_floor_m)
        self.arcs = ArcState(th)
        #: (NSTATE, S) per-satellite state; the rows of the current layout's satellites live in
        #: ``_blk`` between epochs (:meth:`state_rows` writes them back).
        self._st = new_state(S, th.mw_prior_sigma_m**2, th.gf_prior_sigma_m**2)
        self._blk: _Block | None = None
        self._sky = SkyTerms(self._shell_m)
        self.geometry = Geometry(
            S, cfg.geometry_refresh_s, shell_m=self._shell_m, keep_per_sat=ephemerides_per_sat
        )
        self.rot_ring = LagRing(S, cfg.rot_interval_s)
        self.roti_window = SlotStd(S, cfg.roti_window_s, cfg.roti_sample_s)
        self.biases = BiasModel(self.pairs, cfg, S)
        self.cells = CellRouter(self.pairs)
        self._defer_fit = defer_fit
        #: The deferred receiver-bias fit: (epoch time, keyword arguments of _update_receiver_bias).
        self._pending_fit: tuple[float, dict[str, Any]] | None = None
        #: (satellites, time) of the next epoch's orbit refresh, to evaluate in :meth:`prefetch`.
        self._ahead: tuple[Idx, float] | None = None
        self._bias_cache: tuple[EpochLayout, int, F64, F64, F64] | None = None
        #: Hatch constants of the sampling interval: (interval, window N, N and (N − 1)/N as
        #: 0-d arrays).
        self._hatch_consts: tuple[float, float, F64, F64] = (math.nan, 1.0, _ZERO, _ZERO)
        #: (interval, the slip tests' gap max(max_gap_s, gap_samples · interval) in s).
        self._gap = (math.nan, math.nan)
        #: The last read-only LLI array seen all zero (the decoder shares one per layout).
        self._lli_clear: npt.NDArray[np.uint8] | None = None
        #: (ROT lag in s, 60/lag as a 0-d array: the factor to TECU/min).
        self._rot_scale: tuple[float, F64] = (math.nan, _ZERO)
        self._last_epoch_t = -math.inf
        self._intervals = np.full(_INTERVAL_HISTORY, np.nan)
        self._interval = 1.0  # s, median of the recent epoch intervals
        self._last_eph: dict[int, KeplerEphemeris | GlonassEphemeris] = {}
        self._n_epochs = 0
        self._last_roti_median = math.nan
        self._last: StationSnapshot | None = None
        #: Rolling state loaded by :meth:`load_state`, applied or dropped at the next epoch.
        self._resume: dict[str, Any] | None = None
        self.counters: dict[str, int] = {"epochs": 0, "epochs_out_of_order": 0, "cells_unusable": 0}
        for name in REASON_NAMES.values():
            self.counters[f"arcs_{name}"] = 0

    # -- inputs other than observations -----------------------------------------------------------
    def unsettled(self) -> bool:
        """A receiver-bias fit waits for :meth:`settle`, or the next epoch's orbit refresh could
        be evaluated ahead by :meth:`prefetch` (``defer_fit``)."""
        return self._pending_fit is not None or self._ahead is not None

    def slack_after_s(self) -> float | None:
        """How long after its epoch the deferred work (:meth:`settle`, then :meth:`prefetch`) may
        wait: half the median epoch interval, midway to the next epoch, whose entry would settle
        it first (same results); None when nothing waits."""
        return 0.5 * self._interval if self.unsettled() else None

    def prefetch(self) -> None:
        """Evaluate now the orbits the next epoch will refresh, if it comes at the expected time
        with the same satellites (``defer_fit``; see ``Geometry.prefetch``: same results)."""
        ahead, self._ahead = self._ahead, None
        if ahead is not None:
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                self.geometry.prefetch(*ahead)

    def settle(self) -> None:
        """Run the deferred receiver-bias fit, if any (``defer_fit``)."""
        pending, self._pending_fit = self._pending_fit, None
        if pending is not None:
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                self._update_receiver_bias(pending[0], **pending[1])
                self._renew_bias_cache()

    def _renew_bias_cache(self) -> None:
        """After a fit that changed the bias tables: compute now the correction the next epoch
        of the same layout would compute in its urgent step (``_dual``), from the same inputs
        (the layout's bias indices and ``K`` row, the arcs as they stand), so the values are the
        same bit for bit; an epoch that starts arcs while levelling corrections are held, a new
        layout or a later change of the tables still computes its own."""
        blk, cached, ver = self._blk, self._bias_cache, self.biases.version
        if blk is None or cached is None or cached[0] is not blk.lay or cached[1] == ver:
            return
        self._correction(blk.lay, ver, blk.g[K], blk.arc)

    def _correction(
        self, lay: EpochLayout, ver: int, k: F64, arc: npt.NDArray[np.int32]
    ) -> tuple[F64, F64, F64]:
        """The bias tables' correction of ``lay``'s satellites (``BiasModel.correction``), kept
        as the cache of tables version ``ver``."""
        b_sat, total_bias, relevel = self.biases.correction(lay.bias_flat, lay.group, k, arc)
        relevel.setflags(write=False)  # goes into snapshots
        self._bias_cache = (lay, ver, b_sat, total_bias, relevel)
        return b_sat, total_bias, relevel

    def add_ephemeris(self, eph: KeplerEphemeris | GlonassEphemeris) -> None:
        """Use a broadcast ephemeris for geometry and its group delays for the satellite bias."""
        if not 0 <= eph.sat < MAX_SAT_ID:
            return
        last = self._last_eph.get(eph.sat)
        # Receivers repeat the same set every few seconds; the decoder hands a repeat on as the
        # same object (its payload cache), so identity settles most before the field comparison.
        if last is eph or last == eph:
            return
        self._last_eph[eph.sat] = eph
        t = self._last_epoch_t if math.isfinite(self._last_epoch_t) else None
        self.geometry.add_ephemeris(eph, t)
        delays = band_delays_s(eph)
        if np.isfinite(delays).any():
            if self._pending_fit is not None:  # (the fit reads the satellite delays)
                self.settle()
            self.biases.set_delays(eph.sat, delays)

    def set_receiver_position(self, ecef_m: npt.ArrayLike, source: str) -> None:
        """Receiver antenna position (ECEF m) from config, RTCM 1005/1006 or GGA (the geometry
        only: a pending fit reads none of it)."""
        self.geometry.set_receiver_position(ecef_m, source)

    def set_gsv(
        self, time: GpsTime, sats: npt.ArrayLike, el_deg: npt.ArrayLike, az_deg: npt.ArrayLike
    ) -> None:
        """Fallback elevations/azimuths from NMEA GSV (used only where no orbit is known; the
        geometry only: a pending fit reads none of it)."""
        self.geometry.set_gsv(time.total_s, sats, el_deg, az_deg)

    # -- the hot path -------------------------------------------------------------------------------
    def update(self, epoch: ObsEpoch) -> StationSnapshot:
        """Process one epoch (time from the epoch) and return the station snapshot."""
        t = self._begin(epoch)
        if t is None:  # out of order: counted, the last snapshot again
            return self._last if self._last is not None else self._empty(epoch)
        # NaN marks "unknown" throughout: silence the invalid/0-division warnings it causes
        # (np.errstate(invalid="ignore", divide="ignore", over="ignore"), its state made once).
        token = _quiet_enter()
        try:
            snap = self._update(epoch, t, self._interval)
        finally:
            _quiet_exit(token)
        self._last = snap
        return snap

    def _begin(self, epoch: ObsEpoch) -> float | None:
        """:meth:`update`'s bookkeeping before the estimate (a pending fit settled, a loaded
        state applied, a time reset, the sampling interval, the epoch counters): the epoch's
        time (s), or None for an epoch out of order (counted, not estimated)."""
        if self._pending_fit is not None:
            self.settle()
        self._ahead = None  # not evaluated ahead: the lookup evaluates it
        n = epoch.sat.shape[0]
        assert epoch.sig.shape == epoch.pseudorange_m.shape == epoch.phase_cycles.shape == (n,)
        t = epoch.time.total_s
        if self._resume is not None:
            self._apply_resume(t)
        if t <= self._last_epoch_t - _TIME_RESET_S:
            self._restart_time()  # a replay restarted, or the receiver's clock was reset
        elif t <= self._last_epoch_t:
            self.counters["epochs_out_of_order"] += 1
            return None
        if math.isfinite(self._last_epoch_t):
            dt = t - self._last_epoch_t
            self._intervals[self._n_epochs % _INTERVAL_HISTORY] = dt
            if abs(dt - self._interval) > 1e-6:
                self._interval = float(np.nanmedian(self._intervals))
                self.rot_ring.ensure_interval(self._interval)
        self._last_epoch_t = t
        self._n_epochs += 1
        self.counters["epochs"] += 1
        return t

    def _update(self, epoch: ObsEpoch, t: float, interval: float) -> StationSnapshot:
        pre = self._pre(epoch, t)
        lay, _, _, el_known, _, _, el, sin_el = pre
        figs = self._dual(epoch, lay, t, interval, el, sin_el, el_known)  # (positional: cheaper)
        return self._post(epoch, t, interval, pre, figs)

    def _pre(self, epoch: ObsEpoch, t: float) -> _Pre:
        """The estimate's inputs before the per-satellite figures: the layout, the geometry (el,
        az, pierce lat, lon rows), its source, whether every elevation is known, the elevations
        and sin(el) of every satellite present and of the dual-frequency ones."""
        return self._looked_up(self._layout(epoch), t)

    def _looked_up(self, lay: EpochLayout, t: float) -> _Pre:
        """:meth:`_pre` after the layout: the geometry looked up, then :meth:`_inputs`."""
        geo, geo_source = self.geometry.lookup(lay.present, t)
        # sin(el) once: levelling weights, station weights and receiver-bias weights use it.
        return self._inputs(lay, geo, geo_source, np.sin(geo[0]))

    def _layout(self, epoch: ObsEpoch) -> EpochLayout:
        """The epoch's layout (:meth:`_pre`), its unusable cells counted."""
        lay = self.cells.layout(epoch)
        self.counters["cells_unusable"] += lay.n_unusable
        return lay

    def _inputs(self, lay: EpochLayout, geo: F64, geo_source: str, sin_all: F64) -> _Pre:
        """:meth:`_pre`'s inputs from the layout and the geometry (``sin_all``: sin of its
        elevations), right after the geometry's lookup."""
        el_known = self.geometry.all_known  # orbit geometry for all: no elevation is NaN
        el_all = geo[0]
        el = el_all if lay.all_dual else el_all[lay.has]
        sin_el = sin_all if lay.all_dual else sin_all[lay.has]
        return lay, geo, geo_source, el_known, el_all, sin_all, el, sin_el

    def _post(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
        self, epoch: ObsEpoch, t: float, interval: float, pre: _Pre, figs: _Dual,
        sky: _Sky | None = None,
    ) -> StationSnapshot:  # fmt: skip
        """The snapshot of the epoch from :meth:`_pre`'s inputs and :meth:`_dual`'s figures
        (the station figures, the receiver-bias fit when due, the records); ``sky``: the
        epoch's sky terms when a tick computed them for its stations together (the same
        operations on the same elements: ``_tick``), else computed here."""
        lay, geo, geo_source, el_known, el_all, sin_all, _, _ = pre
        present = lay.present
        m = present.shape[0]
        (stec, rot, roti, iono_l1, if_code, if_phase, hatch, mp1, mp2, noise, relevel,
         stec_raw, lev, b_sat, n_arc, arc, new, pair_switch) = figs  # fmt: skip
        if not lay.all_dual:  # per-pair-satellite arrays over every satellite present
            full = np.full((len(_SPREAD), m), np.nan)
            for row, fig in zip(full, figs[: len(_SPREAD)], strict=True):
                row[lay.has] = fig
            (stec, rot, roti, iono_l1, if_code, if_phase, hatch, mp1, mp2, noise,
             relevel) = full  # fmt: skip

        if sky is None:
            mapping = self._sky.mapping(el_all)
            # Rows x, y (km) of the pierce points and VTEC: the station figures' plane-fit input.
            pts = np.empty((3, m))
            self._sky.offsets(self.geometry.lat_rad, self.geometry.lon_rad, geo[2:4], pts[:2])
            vtec = np.divide(stec, mapping, pts[2])
            up = el_all > _ZERO
            if _count_nonzero(up) != m:
                vtec[~up] = np.nan
        else:
            mapping, pts, deg, cell_el = sky
            vtec = pts[2]
        (vtec_st, roti_max, roti_med, rot_max, g_tecu, g_mm, g_az) = station_values(
            el_all, sin_all, el_known, pts, rot, roti, self._mask_rad, self._sky.scratch
        )  # (el_rad, sin_el, el_known, pts, rot, roti, mask_rad, scratch: positional, cheaper)
        self._last_roti_median = roti_med
        # The snapshot reports the receiver bias that was applied to this epoch's STEC.
        bias_ref, sigma_ref = self.biases.reference()
        if self.biases.due(t):
            # It changes later epochs only (this one reports the bias it was corrected with).
            fit_kw = {"lay": lay, "stec_raw": stec_raw, "lev": lev, "b_sat": b_sat,
                      "n_arc": n_arc, "arc": arc, "el_all": el_all, "sin_all": sin_all,
                      "mapping": mapping, "x_km": pts[0], "y_km": pts[1]}  # fmt: skip
            if self._defer_fit:  # the arrays stay untouched until the next entry settles
                self._pending_fit = (t, fit_kw)
            else:
                self._update_receiver_bias(t, **fit_kw)
        if self._defer_fit and self.geometry.refresh_due(present, t + interval):
            self._ahead = (present, t + interval)

        if lay.all_dual:
            slip, arc_id, switch = new, arc, pair_switch
        else:
            slip = np.zeros(m, np.bool_)
            slip[lay.has] = new
            arc_id = np.full(m, -1, np.int32)
            arc_id[lay.has] = arc
            switch = np.zeros(m, np.bool_)
            switch[lay.has] = pair_switch
        # Degrees once for el, az, pierce lat, lon (rows of deg), and the elevation of each cell.
        blk = self._blk  # the block of ``lay`` (_dual made it): its writeable ``cell_pos``
        assert blk is not None
        if sky is not None:
            pass  # (the tick's)
        elif lay.cells_in_range:  # every cell's satellite is present: a contiguous output
            deg = np.degrees(geo)
            cell_el = deg.take(blk.cell_pos)  # row 0: the flat take (cell_pos < m)
        else:  # a NaN slot after the satellites for the cells out of range (cell_pos = m)
            deg_nan = np.empty((4, m + 1))
            np.degrees(geo, out=deg_nan[:, :m])
            deg_nan[0, m] = np.nan
            cell_el = deg_nan.take(blk.cell_pos)  # row 0 (cell_pos ≤ m): the flat take
            deg = deg_nan[:, :m]
        sats = satellite_figures_of(  # (positional, in field order)
            lay.sat16,  # sat
            lay.labels,  # pair
            deg[0],  # el_deg
            deg[1],  # az_deg
            deg[2],  # ipp_lat_deg
            deg[3],  # ipp_lon_deg
            stec,  # stec_tecu
            vtec,  # vtec_tecu
            rot,  # rot_tecu_per_min
            roti,  # roti_tecu_per_min
            iono_l1,  # iono_l1_m
            if_code,  # if_code_m
            if_phase,  # if_phase_m
            hatch,  # if_code_smoothed_m
            slip,  # slip
            arc_id,  # arc_id
            mp1,  # mp1_m
            mp2,  # mp2_m
            noise,  # if_noise_factor
            switch,  # pair_switch
            relevel,  # stec_relevel_tecu
        )
        return snapshot_of(  # (positional, in field order)
            self.station,  # station
            epoch.time,  # time
            m,  # n_sats
            vtec_st,  # vtec_tecu
            roti_max,  # roti_max_tecu_per_min
            roti_med,  # roti_median_tecu_per_min
            rot_max,  # rot_max_abs_tecu_per_min
            g_mm,  # gradient_mm_per_km
            g_tecu,  # gradient_tecu_per_km
            g_az,  # gradient_azimuth_deg
            float(lay.idx.shape[0] / m) if m else math.nan,  # dual_freq_fraction
            bias_ref,  # receiver_bias_tecu
            sigma_ref,  # receiver_bias_sigma_tecu
            sats,  # satellites
            epoch.sat,  # cell_sat
            epoch.sig,  # cell_sig
            cell_el,  # cell_el_deg
            epoch.cn0_dbhz,  # cell_cn0_dbhz
            geo_source if m else "none",  # geometry_source
            self._counters(),  # counters
        )

    # -- the working block ----------------------------------------------------------------------
    def _block(self, lay: EpochLayout) -> _Block:
        """The block of ``lay`` (gathered from the state when the layout changed)."""
        blk = self._blk
        if blk is not None and blk.lay is lay:
            return blk
        self._sync()
        d = lay.idx.shape[0]
        g = np.empty((NROW, d))
        g[:NSTATE] = self._st[:, lay.idx]
        g[F1 : NOISE + 1] = lay.coefs
        self.arcs.prepare_block(g)
        cur = np.empty((7, d))
        cur[0] = lay.rank_f
        arc = g[ARC].astype(np.int32)
        arc.setflags(write=False)
        self._blk = blk = _Block(lay, g, cur, arc, math.nan)
        return blk

    def _sync(self) -> None:
        """Write the working block back into the state and drop it."""
        blk = self._blk
        if blk is not None:
            self._st[:, blk.lay.idx] = blk.g[:NSTATE]
            self._blk = None

    def state_rows(self) -> F64:
        """The (NSTATE, S) per-satellite state, up to date (rows as ``_state.ROWS``); writing
        into it is allowed."""
        self._sync()
        return self._st

    def _dual_in(
        self, epoch: ObsEpoch, lay: EpochLayout, interval: float
    ) -> tuple[_Block, Bool | None, float]:
        """The first part of :meth:`_dual`: the layout's block with this epoch's measurements
        (``meas``: L1, L2 in m, P1, P2) and cell values (``cur``) gathered into its buffers and
        its smallest arc length known; and the loss-of-lock flags (None: none) and the slip
        tests' gap (s) of the epoch."""
        blk = self._block(lay)
        i12 = blk.i12_2
        meas_l = epoch.phase_cycles.take(i12, None, blk.meas_l, "clip")  # (out, mode)
        meas_l *= lay.wavelength_m
        epoch.pseudorange_m.take(i12, None, blk.meas_p, "clip")
        lli_lost = None
        lli = epoch.lli
        if lli is not self._lli_clear:  # (a read-only array seen all zero: zero still)
            if _count_nonzero(lli):
                lli_lost = np.logical_or.reduce(lli[i12] & 1, axis=0)
            elif not lli.flags.writeable:
                self._lli_clear = lli
        gap = self._gap
        if gap[0] != interval:  # the slip tests' gap (s) at this sampling interval
            self._gap = gap = (interval, max(self.settings.max_gap_s,
                                             self.settings.gap_samples * interval))  # fmt: skip
        # Half-cycle flags, lock indicators and lock times of both bands, in block-row order:
        # the three cell arrays as float rows, then one gather of both bands.
        c0, c1, c2 = blk.cell_rows
        c0[...] = epoch.half_cycle
        c1[...] = epoch.lock_indicator
        c2[...] = epoch.lock_time_s
        blk.cells.take(blk.i12, 1, blk.cur_flags, "clip")  # (axis, out, mode)
        if math.isnan(blk.n_min):
            g = blk.g
            blk.n_min = float(np.minimum.reduce(g[N])) if g.shape[1] else math.inf  # g[N].min()
        return blk, lli_lost, gap[1]

    def _dual(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
        self, epoch: ObsEpoch, lay: EpochLayout, t: float, interval: float, el: F64,
        sin_el: F64, el_known: bool,
    ) -> _Dual:  # fmt: skip
        """All dual-frequency figures of the ``d`` satellites ``lay.idx`` (arrays of length d), in
        the order of ``_SPREAD`` and the names after it.

        They work on the layout's block ``g`` (rows: ``_state``). Cell values come as (2, d)
        arrays: row 0 band 1, row 1 band 2 of each pair; the linear combinations of SCIENCE.md
        §3/§9 come out of one product with ``lay.comb``. Arrays returned are new each epoch or
        read-only: snapshots hand them on.
        """
        blk, lli_lost, gap_s = self._dual_in(epoch, lay, interval)
        g = blk.g
        comb = _einsum("kjd,jd->kd", lay.comb, blk.meas)  # (combinations, d)
        gf_tecu = comb[GFT_ROW]
        if_code = comb[IFC_ROW]
        if_phase = comb[IFP_ROW]
        # One subtraction for the slip tests, the levelling and MP steps and ROT (``_state``).
        # (b, t, gf_mw, el_rad, el_known, cur, lli_lost, gap_s, all_tracked, no_new: positional)
        new, reason = self.arcs.detect(
            blk.arcs, t, comb[: GFT_ROW + 1], el, el_known, blk.cur, lli_lost, gap_s,
            blk.n_min >= 2.0, lay.no_lli,
        )  # fmt: skip
        any_new = reason is not None
        if reason is not None:
            if _tally_reasons(self.counters, reason):
                pair_switch = (reason & REASON_PAIR) != 0
            else:  # no pair switch: all False, as that comparison gives
                pair_switch = lay.no_lli
            arc = g[ARC].astype(np.int32)
            arc.setflags(write=False)
            blk.arc = arc
            blk.n_min = math.nan
        else:
            pair_switch = lay.no_lli  # all False, read-only
            arc = blk.arc
            blk.n_min += 1.0
        n_arc = blk.n
        if any_new:
            # Arc starts reset every per-arc accumulator (levelling, ROT origin, Hatch, MP means).
            # (In place where an arc starts: what ``np.where(~new, row, start)`` gives.)
            lev_mp = comb[LEVX_ROW : MP2_ROW + 1]
            np.copyto(blk.gf0, gf_tecu, where=new)
            np.copyto(blk.lev_sw, _ZERO, where=new)
            np.copyto(blk.lev, lev_mp[0], where=new)
            np.copyto(blk.mp_mean, _ZERO, where=new)
            np.subtract(lev_mp, blk.means, out=blk.step)
            np.subtract(gf_tecu, blk.gf0, out=blk.rel)
        level(blk, sin_el, el, el_known)  # (b, sin_el, el, el_known: positional)
        stec_raw = gf_tecu + blk.lev
        mp = comb[MP1_ROW : MP2_ROW + 1]
        mp -= blk.mp_mean
        # The bias tables change every receiver_bias_update_s at most: reuse the correction,
        # except when an arc starts while levelling corrections are held (it drops its
        # predecessor's; without any, the correction does not depend on the arcs).
        b_sat, total_bias, relevel = self.bias_correction(lay, blk, any_new)
        stec = stec_raw - total_bias
        rot, roti = self.rot_roti(t, lay.idx, blk.rel, arc, interval)
        hc = self.hatch_consts(interval)
        hatch = smooth(blk, if_code, if_phase, hc, not any_new and blk.n_min >= hc[1],
                       new if any_new else None)  # fmt: skip
        return (stec, rot, roti, stec * blk.l1m, if_code, if_phase, hatch, comb[MP1_ROW],
                comb[MP2_ROW], blk.noise, relevel, stec_raw, blk.lev, b_sat, n_arc, arc, new,
                pair_switch)  # fmt: skip

    def bias_correction(self, lay: EpochLayout, blk: _Block, any_new: bool) -> tuple[F64, F64, F64]:
        """The bias tables' correction of the block's satellites (b_sat, total, relevel): the
        cached one of the same layout and tables version, unless an arc starts while levelling
        corrections are held (it drops its predecessor's)."""
        cached, biases = self._bias_cache, self.biases
        ver = biases.version
        if (
            cached is not None
            and cached[0] is lay
            and cached[1] == ver
            and not (any_new and biases.per_arc)
        ):
            return cached[2], cached[3], cached[4]
        return self._correction(lay, ver, blk.g[K], blk.arc)

    def rot_roti(
        self, t: float, idx: Idx, rel: F64, arc: npt.NDArray[np.int32], interval: float
    ) -> tuple[F64, F64]:
        """ROT over the lag, from the arc-relative levelled phase ``rel``, and ROTI over the
        window, of the satellites ``idx`` (new arrays)."""
        lagged, t_lag = self.rot_ring.lag_push(t, idx, rel, arc, interval)
        if math.isfinite(t_lag):
            rot = np.subtract(rel, lagged, lagged)
            rs = self._rot_scale
            if rs[0] != t - t_lag:  # (the lag, the same epoch after epoch)
                self._rot_scale = rs = (t - t_lag, np.array(60.0 / (t - t_lag)))
            rot *= rs[1]
        else:
            rot = lagged
        return rot, self.roti_window.push_std(t, idx, rot, self.settings.roti_min_samples)

    def hatch_consts(self, interval: float) -> tuple[float, float, F64, F64]:
        """The Hatch filter's constants at this sampling interval: (interval, window N, N and
        (N − 1)/N as 0-d arrays: no Python float to convert per call)."""
        hc = self._hatch_consts
        if hc[0] != interval:
            window = max(self.settings.hatch_window_s / interval, 1.0)
            self._hatch_consts = hc = (interval, window, np.array(window),
                                       np.array((window - 1.0) / window))  # fmt: skip
        return hc

    def _update_receiver_bias(
        self, t: float, *, lay: EpochLayout, stec_raw: F64, lev: F64, b_sat: F64, n_arc: F64,
        arc: npt.NDArray[np.int32], el_all: F64, sin_all: F64, mapping: F64, x_km: F64, y_km: F64,
    ) -> None:  # fmt: skip
        """Feed the bias model (every ``receiver_bias_update_s``) with mature arcs above the
        mask, weighted by sin²el and down-weighted when the ionosphere is disturbed (ROTI)."""
        if not lay.all_dual:  # the pair satellites' values (all of them when all have a pair)
            has = lay.has
            el_all, sin_all, mapping = el_all[has], sin_all[has], mapping[has]
            x_km, y_km = x_km[has], y_km[has]
        use = (
            (el_all >= self._mask_rad)
            & (n_arc * self._interval >= self.settings.receiver_bias_min_arc_s)
            & ~np.isnan(x_km)
            & ~np.isnan(stec_raw)
        )
        if np.count_nonzero(use) < MIN_FIT:  # what the update does with them, without the gathers
            self.biases.no_fit()
            return
        roti_med = self._last_roti_median
        quiet = 1.0 / (1.0 + (roti_med / 0.25) ** 2) if math.isfinite(roti_med) else 1.0
        y = stec_raw - b_sat
        self.biases.update(
            t, y=y[use], idx=lay.idx[use], rank=lay.rank[use], group=lay.group[use],
            mapping=mapping[use], x_km=x_km[use], y_km=y_km[use],
            weight=quiet * sin_all[use] ** 2, arc_samples=n_arc[use],
            arc=arc[use].astype(np.int64), level=lev[use],
        )  # fmt: skip

    def _restart_time(self) -> None:
        """Time went far backwards: forget everything tied to time (arcs, windows), keep the
        receiver-bias estimate (a property of the hardware)."""
        self.settle()
        self.counters["time_resets"] = self.counters.get("time_resets", 0) + 1
        self.state_rows()[LAST_T] = np.nan
        self.rot_ring = LagRing(MAX_SAT_ID, self.settings.rot_interval_s, self.rot_ring.rows)
        self.roti_window = SlotStd(
            MAX_SAT_ID, self.settings.roti_window_s, self.settings.roti_sample_s
        )
        self._last_epoch_t = -math.inf
        self._intervals.fill(np.nan)
        self.biases.last_t = -math.inf

    def _counters(self) -> dict[str, int]:
        """Counters for the snapshot; the ephemeris store's are refreshed every 32 epochs (its
        statistics walk the whole store)."""
        if self._n_epochs % 32 == 1:
            st = self.geometry.store.statistics()
            self.counters["ephemerides_stored"] = st.stored
            self.counters["ephemerides_stale"] = st.stale
            self.counters["ephemerides_future"] = st.future
            self.counters["ephemerides_unhealthy"] = st.unhealthy
            self.counters["ephemerides_inconsistent"] = st.inconsistent
            self.counters.update(self.geometry.counters)
        return dict(self.counters)

    def _empty(self, epoch: ObsEpoch) -> StationSnapshot:
        e = np.zeros(0)
        return StationSnapshot(
            station=self.station, time=epoch.time, n_sats=0, vtec_tecu=math.nan,
            roti_max_tecu_per_min=math.nan, roti_median_tecu_per_min=math.nan,
            rot_max_abs_tecu_per_min=math.nan, gradient_mm_per_km=math.nan,
            gradient_tecu_per_km=math.nan, gradient_azimuth_deg=math.nan,
            dual_freq_fraction=math.nan, receiver_bias_tecu=math.nan,
            receiver_bias_sigma_tecu=math.nan,
            satellites=SatelliteFigures(
                sat=np.zeros(0, np.int16), pair=(), el_deg=e, az_deg=e, ipp_lat_deg=e,
                ipp_lon_deg=e, stec_tecu=e, vtec_tecu=e, rot_tecu_per_min=e,
                roti_tecu_per_min=e, iono_l1_m=e, if_code_m=e, if_phase_m=e,
                if_code_smoothed_m=e, slip=np.zeros(0, np.bool_), arc_id=np.zeros(0, np.int32),
            ),
            cell_sat=np.zeros(0, np.int16), cell_sig=np.zeros(0, np.uint16), cell_el_deg=e,
            cell_cn0_dbhz=np.zeros(0, np.float32), geometry_source="none",
            counters=dict(self.counters),
        )  # fmt: skip

    # -- persistence --------------------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """What survives a restart (version 2): the receiver-bias normal equations and, once an
        epoch was seen, the rolling state (arcs, ROT ring, ROTI window; see ``_persist``)."""
        self.settle()
        out: dict[str, Any] = {
            "version": STATE_VERSION,
            "station": self.station,
            "receiver_bias": self.biases.state_dict(),
        }
        if math.isfinite(self._last_epoch_t):
            out["rolling"] = rolling_state(self)
        return out

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore :meth:`state_dict` (version 1: biases only). The rolling part is applied at the
        next :meth:`update` if that epoch continues the saved arcs (``_persist``), else dropped;
        a rolling part that does not fit this configuration is dropped (counted), never fatal."""
        self.settle()
        version = int(state.get("version", -1))
        if version not in (1, STATE_VERSION):
            raise ValueError(f"unknown estimator state version {state.get('version')!r}")
        self.biases.load_state(state["receiver_bias"])
        self._bias_cache = None
        self._resume = None
        rolling = state.get("rolling") if version >= 2 else None
        if rolling is not None:
            try:
                self._resume = checked_rolling(self, rolling)
            except (KeyError, TypeError, ValueError):
                self.counters["state_rolling_rejected"] = 1

    def _apply_resume(self, t: float) -> None:
        """First epoch after :meth:`load_state`: continue the saved arcs when still valid."""
        st, self._resume = self._resume, None
        if st is None or math.isfinite(self._last_epoch_t):
            return  # epochs were already processed since loading: they win
        if resume_allowed(self, st, t):
            apply_rolling(self, st)
            self._bias_cache = None
            self.counters["state_resumed"] = 1
        else:  # new arcs, but arc ids stay unique across the restart
            self.arcs.next_arc = max(self.arcs.next_arc, int(st["next_arc"]))
            self.counters["state_expired"] = 1

    def copy(self) -> StationEstimator:
        """An independent deep copy (the whole rolling state)."""
        self.settle()
        return copy.deepcopy(self)
