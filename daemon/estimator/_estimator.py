"""The rolling ionosphere estimator of one station: ObsEpoch in, StationSnapshot out.

Pure and vectorised (STYLE rules 21–22): ``update(epoch)`` takes time from the epoch and never
reads a clock; per-satellite state is one preallocated (S, NCOL) matrix indexed by satellite id
(``S = MAX_SAT_ID`` slots, columns in ``_state``), gathered once and scattered once per epoch for
the ``m`` satellites present; rolling windows are ring buffers (``_windows``); no per-satellite
Python branch on the hot path. Pair choice per satellite: the first configured pair (``_pairs``)
whose two signals both have code and phase this epoch; a change of pair starts a new arc.

Symbols per satellite (SCIENCE.md §2–§9): P1, P2 code (m); L1, L2 phase (m = cycles·c/f); K
(TECU/m); GF = L1 − L2; MW Melbourne–Wübbena; STEC_raw = K·GF + levelling offset (TECU), the
offset the sin²el-weighted running mean over the arc of K·(P2 − P1) − K·GF; STEC = STEC_raw −
B_sat − B_rcv; VTEC = STEC/M(el); ROT = ΔSTEC/Δt over ``rot_interval_s`` (TECU/min, sliding);
ROTI = std of ROT over ``roti_window_s``; IF = α·X1 + β·X2; Hatch-smoothed IF code with
N = min(samples in arc, window/interval); MP1/MP2 code-minus-carrier with the arc mean removed.
"""

from __future__ import annotations

import copy
import math
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.geo import mapping_factor
from ionwarden.parsers import MAX_SAT_ID

from ._arcs import REASON_NAMES, REASON_PAIR, ArcState, SlipThresholds
from ._biases import BiasModel
from ._geometry import Geometry
from ._pairs import C_MPS, PairTable, band_delays_s, iono_coefficients
from ._snapshot import SatelliteFigures, StationSnapshot
from ._state import (
    ALPHA,
    ARC,
    BETA,
    F1,
    F2,
    GAMMA,
    GF0,
    HATCH,
    IFL_PREV,
    L1M,
    LAST_T,
    LEV_MEAN,
    LEV_SW,
    LWL,
    MP1,
    MP2,
    NOISE,
    K,
    N,
    new_state,
)  # fmt: skip
from ._station import pierce_offsets_km, station_figures
from ._windows import LagRing, SlotStd

if TYPE_CHECKING:
    from ionwarden.parsers import GlonassEphemeris, GpsTime, KeplerEphemeris, ObsEpoch

__all__ = ["StationEstimator"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
N_SIG = 10 * 32  # packed signal codes are band*32 + attribute, bands 0–9
#: An epoch this much older than the last one restarts the time-dependent state (s).
_TIME_RESET_S = 3600.0
#: Epoch intervals remembered to estimate the sampling interval (median).
_INTERVAL_HISTORY = 9


class StationEstimator:
    """Rolling TEC/ROT/ROTI/VTEC/iono-free estimator for one receiver."""

    def __init__(
        self,
        settings: EstimatorSettings | None = None,
        *,
        station: str = "",
        ephemerides_per_sat: int = 3,
    ) -> None:
        """``ephemerides_per_sat``: newest broadcast sets kept per satellite (raise it when a whole
        day's navigation file is loaded up front, as ``ionwarden process`` does)."""
        cfg = settings or EstimatorSettings()
        self.settings = cfg
        self.station = station
        self.pairs = PairTable.from_config(cfg.pairs)
        self._shell_m = cfg.shell_height_km * 1000.0
        self._mask_rad = math.radians(cfg.elevation_mask_deg)
        S = MAX_SAT_ID
        th = SlipThresholds(mw_k_sigma=cfg.slip_mw_k_sigma, gf_floor_m=cfg.slip_gf_floor_m)
        self.arcs = ArcState(th)
        self.state = new_state(S, th.mw_prior_sigma_m**2, th.gf_prior_sigma_m**2)
        self.geometry = Geometry(
            S, cfg.geometry_refresh_s, shell_m=self._shell_m, keep_per_sat=ephemerides_per_sat
        )
        self.rot_ring = LagRing(S, cfg.rot_interval_s)
        self.roti_window = SlotStd(S, cfg.roti_window_s, cfg.roti_sample_s)
        self.biases = BiasModel(self.pairs, cfg, S)
        self._seen = np.zeros(S, np.int64)
        # Per-cell lookup by (satellite, signal), stamped per epoch instead of cleared.
        # Only signals named in the pair table matter: map their packed codes to compact slots
        # (the rest, and the table's padding code 0, to one never-stamped slot) so the per-cell
        # tables stay small enough for the CPU cache.
        codes = np.unique(np.concatenate((self.pairs.sig1.ravel(), self.pairs.sig2.ravel())))
        codes = codes[codes > 0]
        self._sig_slot = np.full(N_SIG, codes.shape[0], np.intp)
        self._sig_slot[codes] = np.arange(codes.shape[0])
        self._n_sig_slots = int(codes.shape[0])
        self._c1 = self._sig_slot[self.pairs.sig1]
        self._c2 = self._sig_slot[self.pairs.sig2]
        self._cell_stamp = np.zeros((S, codes.shape[0] + 1), np.int64)
        self._cell_index = np.zeros((S, codes.shape[0] + 1), np.intp)
        self._stamp = 0
        self._last_epoch_t = -math.inf
        self._intervals = np.full(_INTERVAL_HISTORY, np.nan)
        self._interval = 1.0  # s, median of the recent epoch intervals
        self._last_eph: dict[int, KeplerEphemeris | GlonassEphemeris] = {}
        self._n_epochs = 0
        self._last_roti_median = math.nan
        self._last: StationSnapshot | None = None
        self.counters: dict[str, int] = {"epochs": 0, "epochs_out_of_order": 0, "cells_unusable": 0}
        for name in REASON_NAMES.values():
            self.counters[f"arcs_{name}"] = 0

    # -- inputs other than observations -----------------------------------------------------------
    def add_ephemeris(self, eph: KeplerEphemeris | GlonassEphemeris) -> None:
        """Use a broadcast ephemeris for geometry and its group delays for the satellite bias."""
        if not 0 <= eph.sat < MAX_SAT_ID or self._last_eph.get(eph.sat) == eph:
            return  # receivers repeat the same set every few seconds
        self._last_eph[eph.sat] = eph
        t = self._last_epoch_t if math.isfinite(self._last_epoch_t) else None
        self.geometry.add_ephemeris(eph, t)
        delays = band_delays_s(eph)
        if np.isfinite(delays).any():
            self.biases.set_delays(eph.sat, delays)

    def set_receiver_position(self, ecef_m: npt.ArrayLike, source: str) -> None:
        """Receiver antenna position (ECEF m) from config, RTCM 1005/1006 or GGA."""
        self.geometry.set_receiver_position(ecef_m, source)

    def set_gsv(
        self, time: GpsTime, sats: npt.ArrayLike, el_deg: npt.ArrayLike, az_deg: npt.ArrayLike
    ) -> None:
        """Fallback elevations/azimuths from NMEA GSV (used only where no orbit is known)."""
        self.geometry.set_gsv(time.total_s, sats, el_deg, az_deg)

    # -- the hot path -------------------------------------------------------------------------------
    def update(self, epoch: ObsEpoch) -> StationSnapshot:
        """Process one epoch (time from the epoch) and return the station snapshot."""
        n = epoch.sat.shape[0]
        assert epoch.sig.shape == epoch.pseudorange_m.shape == epoch.phase_cycles.shape == (n,)
        t = epoch.time.total_s
        if t <= self._last_epoch_t - _TIME_RESET_S:
            self._restart_time()  # a replay restarted, or the receiver's clock was reset
        elif t <= self._last_epoch_t:
            self.counters["epochs_out_of_order"] += 1
            return self._last if self._last is not None else self._empty(epoch)
        if math.isfinite(self._last_epoch_t):
            dt = t - self._last_epoch_t
            self._intervals[self._n_epochs % _INTERVAL_HISTORY] = dt
            if abs(dt - self._interval) > 1e-6:
                self._interval = float(np.nanmedian(self._intervals))
                self.rot_ring.ensure_interval(self._interval)
        self._last_epoch_t = t
        self._n_epochs += 1
        self.counters["epochs"] += 1
        # NaN marks "unknown" throughout: silence the invalid/0-division warnings it causes.
        with np.errstate(invalid="ignore", divide="ignore"):
            snap = self._update(epoch, t, self._interval)
        self._last = snap
        return snap

    def _update(self, epoch: ObsEpoch, t: float, interval: float) -> StationSnapshot:
        # Cells usable for a pair: known satellite/signal, code and phase and frequency present.
        sat = epoch.sat.astype(np.intp)
        sig = epoch.sig.astype(np.intp)
        in_range = (sat >= 0) & (sat < MAX_SAT_ID) & (sig < N_SIG)
        usable = (
            in_range
            & (sig >= 32)
            & np.isfinite(epoch.pseudorange_m)
            & np.isfinite(epoch.phase_cycles)
            & np.isfinite(epoch.freq_hz)
            & (epoch.pseudorange_m > 0.0)
        )
        self.counters["cells_unusable"] += int(in_range.sum() - usable.sum())
        self._stamp += 1
        slot = self._sig_slot[np.where(in_range, sig, 0)]
        cells = np.flatnonzero(usable & (slot < self._n_sig_slots))
        self._cell_stamp[sat[cells], slot[cells]] = self._stamp
        self._cell_index[sat[cells], slot[cells]] = cells

        # Satellites present, and per satellite the first configured pair with both signals.
        self._seen[sat[in_range]] = self._stamp
        present = np.flatnonzero(self._seen == self._stamp)  # sorted, unique
        sysi = present // 100
        c1 = self._c1[sysi]
        c2 = self._c2[sysi]
        col = present[:, None]
        avail = (self._cell_stamp[col, c1] == self._stamp) & (
            self._cell_stamp[col, c2] == self._stamp
        )
        has = avail.any(axis=1)
        rank_all = avail.argmax(axis=1)
        idx = present[has]
        rank = rank_all[has]
        rows = np.flatnonzero(has)
        i1 = self._cell_index[idx, c1[rows, rank]]
        i2 = self._cell_index[idx, c2[rows, rank]]

        el_all, az_all, ipp_lat, ipp_lon, geo_source = self.geometry.lookup(present, t)
        el = el_all[has]
        figs = self._dual(
            epoch, t=t, interval=interval, idx=idx, rank=rank,
            i1=i1, i2=i2, el=el,
        )  # fmt: skip

        # Assemble per-satellite output over every satellite present (NaN where single-frequency).
        m = present.shape[0]

        fields = (
            "stec",
            "rot",
            "roti",
            "iono_l1",
            "if_code",
            "if_phase",
            "hatch",
            "mp1",
            "mp2",
            "noise_factor",
        )
        block = np.full((len(fields), m), np.nan)
        for j, name in enumerate(fields):
            block[j, has] = figs[name]
        row = dict(zip(fields, block, strict=True))

        def spread(name: str) -> F64:
            return row[name]

        mapping = mapping_factor(el_all, self._shell_m)
        stec = spread("stec")
        vtec = np.where(el_all > 0.0, stec / mapping, np.nan)
        rot = spread("rot")
        roti = spread("roti")
        x_km, y_km = pierce_offsets_km(
            self.geometry.lat_rad, self.geometry.lon_rad, ipp_lat, ipp_lon, self._shell_m
        )
        st = station_figures(
            el_rad=el_all,
            vtec=vtec,
            rot=rot,
            roti=roti,
            x_km=x_km,
            y_km=y_km,
            mask_rad=self._mask_rad,
        )
        self._last_roti_median = st.roti_median
        # The snapshot reports the receiver bias that was applied to this epoch's STEC.
        bias_ref, sigma_ref = self.biases.reference()
        self._update_receiver_bias(
            t, figs, has=has, el_all=el_all, mapping=mapping, x_km=x_km, y_km=y_km
        )

        slip = np.zeros(m, np.bool_)
        slip[has] = figs["new"]
        arc_id = np.full(m, -1, np.int32)
        arc_id[has] = figs["arc"]
        switch = np.zeros(m, np.bool_)
        switch[has] = figs["pair_switch"]
        codes = sysi * self.pairs.width + rank_all
        labels = np.where(has, self.pairs.label_of_code[codes], "")
        sats = SatelliteFigures(
            sat=present.astype(np.int16),
            pair=tuple(labels.tolist()),
            el_deg=np.degrees(el_all),
            az_deg=np.degrees(az_all),
            ipp_lat_deg=np.degrees(ipp_lat),
            ipp_lon_deg=np.degrees(ipp_lon),
            stec_tecu=stec,
            vtec_tecu=vtec,
            rot_tecu_per_min=rot,
            roti_tecu_per_min=roti,
            iono_l1_m=spread("iono_l1"),
            if_code_m=spread("if_code"),
            if_phase_m=spread("if_phase"),
            if_code_smoothed_m=spread("hatch"),
            slip=slip,
            arc_id=arc_id,
            mp1_m=spread("mp1"),
            mp2_m=spread("mp2"),
            if_noise_factor=spread("noise_factor"),
            pair_switch=switch,
        )
        el_slot = np.full(MAX_SAT_ID, np.nan)
        el_slot[present] = el_all
        cell_el = np.full(sat.shape[0], np.nan)
        cell_el[in_range] = np.degrees(el_slot[sat[in_range]])
        return StationSnapshot(
            station=self.station,
            time=epoch.time,
            n_sats=m,
            vtec_tecu=st.vtec_tecu,
            roti_max_tecu_per_min=st.roti_max,
            roti_median_tecu_per_min=st.roti_median,
            rot_max_abs_tecu_per_min=st.rot_max_abs,
            gradient_mm_per_km=st.gradient_mm_per_km,
            gradient_tecu_per_km=st.gradient_tecu_per_km,
            gradient_azimuth_deg=st.gradient_azimuth_deg,
            dual_freq_fraction=float(idx.shape[0] / m) if m else math.nan,
            receiver_bias_tecu=bias_ref,
            receiver_bias_sigma_tecu=sigma_ref,
            satellites=sats,
            cell_sat=epoch.sat,
            cell_sig=epoch.sig,
            cell_el_deg=cell_el,
            cell_cn0_dbhz=epoch.cn0_dbhz,
            geometry_source=geo_source if m else "none",
            counters=self._counters(),
        )

    def _dual(
        self,
        epoch: ObsEpoch,
        *,
        t: float,
        interval: float,
        idx: Idx,
        rank: Idx,
        i1: Idx,
        i2: Idx,
        el: F64,
    ) -> dict[str, Any]:
        """All dual-frequency figures of the satellites ``idx`` (arrays of length m).

        The state rows of ``idx`` are gathered once into ``g`` and scattered back at the end.
        Cell values come as (2, m) arrays: row 0 band 1, row 1 band 2 of each pair.
        """
        m = idx.shape[0]
        g = self.state[idx]
        i12 = np.concatenate((i1, i2))
        f = epoch.freq_hz[i12].reshape(2, m)
        p = epoch.pseudorange_m[i12].reshape(2, m)
        lm = epoch.phase_cycles[i12].reshape(2, m) * (C_MPS / f)  # phase in metres
        f1, f2 = f
        p1, p2 = p
        l1, l2 = lm
        if not (np.array_equal(g[:, F1], f1) and np.array_equal(g[:, F2], f2)):
            co = iono_coefficients(f1, f2)
            g[:, F1], g[:, F2] = f1, f2
            g[:, K], g[:, ALPHA], g[:, BETA], g[:, GAMMA] = (
                co.k_tecu_per_m,
                co.alpha,
                co.beta,
                co.gamma,
            )
            g[:, LWL], g[:, L1M], g[:, NOISE] = co.lambda_wl_m, co.l1_m_per_tecu, co.noise_factor
        k, alpha, beta, gamma = g[:, K], g[:, ALPHA], g[:, BETA], g[:, GAMMA]
        gf = l1 - l2
        fl = f * lm
        fp = f * p
        mw = (fl[0] - fl[1]) / (f1 - f2) - (fp[0] + fp[1]) / (f1 + f2)
        lli_lost = np.asarray((epoch.lli[i12].reshape(2, m) & 1).any(axis=0), dtype=np.bool_)
        gap_s = max(self.settings.max_gap_s, self.settings.gap_samples * interval)
        new, reason = self.arcs.detect(
            g, t=t, rank=rank.astype(np.float64), mw_m=mw, gf_m=gf, el_rad=el,
            lock=epoch.lock_indicator[i12].reshape(2, m).T,
            locktime=epoch.lock_time_s[i12].reshape(2, m).T,
            half=epoch.half_cycle[i12].reshape(2, m).T, lli_lost=lli_lost, gap_s=gap_s,
        )  # fmt: skip
        if new.any():
            for bit, name in REASON_NAMES.items():
                self.counters[f"arcs_{name}"] += int(np.count_nonzero(reason & bit))
        gf_tecu = k * gf
        n_arc = g[:, N]
        # Arc starts reset every per-arc accumulator (levelling, ROT origin, Hatch, MP means).
        keep = ~new
        g[:, GF0] = np.where(keep, g[:, GF0], gf_tecu)

        # Levelling: running sin²el-weighted mean of K·(P2 − P1) − K·GF over the arc.
        s_el = np.maximum(np.sin(el), 0.1)
        w = np.where(np.isnan(el), 1.0, s_el * s_el)
        sw = np.where(keep, g[:, LEV_SW], 0.0) + w
        x = k * (p2 - p1) - gf_tecu
        lev = np.where(keep, g[:, LEV_MEAN], x)
        lev += (w / sw) * (x - lev)
        g[:, LEV_SW] = sw
        g[:, LEV_MEAN] = lev
        stec_raw = gf_tecu + lev
        b_sat, total_bias, group = self.biases.correction(idx, rank, k)
        stec = stec_raw - total_bias

        # ROT over the lag, from the arc-relative levelled phase; ROTI over the window.
        rel = gf_tecu - g[:, GF0]
        arc = g[:, ARC].astype(np.int32)
        lagged, t_lag = self.rot_ring.lagged(t, idx, arc, interval)
        rot = (rel - lagged) * (60.0 / (t - t_lag)) if math.isfinite(t_lag) else lagged
        self.rot_ring.push(t, idx, rel, arc)
        self.roti_window.push(t, idx, rot)
        roti = self.roti_window.std(idx, self.settings.roti_min_samples)

        # Iono-free code/phase, Hatch filter (reset per arc), code-minus-carrier multipath.
        if_code = alpha * p1 + beta * p2
        if_phase = alpha * l1 + beta * l2
        n_h = np.minimum(n_arc, max(self.settings.hatch_window_s / interval, 1.0))
        prev = g[:, HATCH] + if_phase - g[:, IFL_PREV]
        hatch = np.where(new, if_code, if_code / n_h + (n_h - 1.0) / n_h * prev)
        g[:, HATCH] = hatch
        g[:, IFL_PREV] = if_phase
        g1 = 2.0 / (gamma - 1.0)
        mp = np.empty((m, 2))
        mp[:, 0] = p1 - (1.0 + g1) * l1 + g1 * l2
        mp[:, 1] = p2 - gamma * g1 * l1 + (gamma * g1 - 1.0) * l2
        mp_mean = np.where(keep[:, None], g[:, MP1 : MP2 + 1], 0.0)
        mp_mean += (mp - mp_mean) / n_arc[:, None]
        g[:, MP1 : MP2 + 1] = mp_mean
        self.state[idx] = g
        mp -= mp_mean
        return {
            "stec": stec,
            "stec_raw": stec_raw,
            "b_sat": b_sat,
            "group": group,
            "idx": idx,
            "rank": rank,
            "n_arc": n_arc,
            "rot": rot,
            "roti": roti,
            "iono_l1": stec * g[:, L1M],
            "if_code": if_code,
            "if_phase": if_phase,
            "hatch": hatch,
            "mp1": mp[:, 0],
            "mp2": mp[:, 1],
            "noise_factor": g[:, NOISE],
            "arc": arc,
            "new": new,
            "pair_switch": (reason & REASON_PAIR) != 0,
        }

    def _update_receiver_bias(
        self, t: float, figs: dict[str, Any], *, has: npt.NDArray[np.bool_], el_all: F64,
        mapping: F64, x_km: F64, y_km: F64,
    ) -> None:  # fmt: skip
        """Feed the bias model every ``receiver_bias_update_s`` with mature arcs above the mask,
        weighted by sin²el and down-weighted when the ionosphere is disturbed (ROTI)."""
        if not self.biases.due(t):
            return
        el = el_all[has]
        use = (
            (el >= self._mask_rad)
            & (figs["n_arc"] * self._interval >= self.settings.receiver_bias_min_arc_s)
            & ~np.isnan(x_km[has])
            & ~np.isnan(figs["stec_raw"])
        )
        roti_med = self._last_roti_median
        quiet = 1.0 / (1.0 + (roti_med / 0.25) ** 2) if math.isfinite(roti_med) else 1.0
        y = figs["stec_raw"] - figs["b_sat"]
        self.biases.update(
            t, y=y[use], idx=figs["idx"][use], rank=figs["rank"][use], group=figs["group"][use],
            mapping=mapping[has][use], x_km=x_km[has][use], y_km=y_km[has][use],
            weight=quiet * np.sin(el[use]) ** 2,
        )  # fmt: skip

    def _restart_time(self) -> None:
        """Time went far backwards: forget everything tied to time (arcs, windows), keep the
        receiver-bias estimate (a property of the hardware)."""
        self.counters["time_resets"] = self.counters.get("time_resets", 0) + 1
        self.state[:, LAST_T] = np.nan
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
        """What survives a restart: the receiver-bias normal equations (plain JSON types)."""
        return {"version": 1, "station": self.station, "receiver_bias": self.biases.state_dict()}

    def load_state(self, state: dict[str, Any]) -> None:
        if int(state.get("version", -1)) != 1:
            raise ValueError(f"unknown estimator state version {state.get('version')!r}")
        self.biases.load_state(state["receiver_bias"])

    def copy(self) -> StationEstimator:
        """An independent deep copy (the whole rolling state)."""
        return copy.deepcopy(self)
