"""The alarms of one station: inputs from the estimator, the NMEA fix and the runtime.

Pure and clock-free (STYLE rule 22): every ``observe_*`` call carries its own time — the epoch's
GPS time for data alarms, the caller's wall time (as GPS time) for the stream-stall alarm — and
returns the transitions it caused, in order. The caller logs, publishes and exports them.

Deferred learning: folding an epoch's C/N0 cells into the baseline does not change that epoch's
evaluation, so :meth:`StationAlarms.observe_snapshot` leaves it pending and :meth:`StationAlarms.settle`
does it (the runtime calls it once the other stations' urgent work is out), with what else no
transition of the epoch waits for: recording the CN0 values of a quiet epoch, gathering the
baseline for the next one. The next ``observe_snapshot`` settles anything still pending first, and
``statuses`` records pending values, so results never depend on whether or when ``settle`` ran.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.daemon._records import fast_constructor

from ._cn0 import N_BAND_KEYS, Cn0Baseline, band_label
from ._debounce import Debouncer
from ._types import AlarmKind, AlarmState, AlarmStatus, AlarmTransition, Severity

if TYPE_CHECKING:
    import numpy.typing as npt

    from ionwarden.daemon.config import AlarmSettings, ThresholdAlarm
    from ionwarden.daemon.estimator import FixStatus, StationSnapshot
    from ionwarden.parsers import GpsTime

    from ._cn0 import Cn0Cells

__all__ = ["UNITS", "StationAlarms"]

log = logging.getLogger("ionwarden.daemon.alarms")

#: Unit of each alarm's input value (also used in payload and metric docs).
UNITS: dict[AlarmKind, str] = {
    AlarmKind.ROTI: "TECU/min",
    AlarmKind.ROT: "TECU/min",
    AlarmKind.VTEC: "TECU",
    AlarmKind.GRADIENT: "mm/km",
    AlarmKind.DUAL_FREQUENCY_LOSS: "fraction",
    AlarmKind.CN0_DROP: "dB",
    AlarmKind.STREAM_STALL: "s",
    AlarmKind.FIX_QUALITY: "flag",
    AlarmKind.FIX_HDOP: "1",
    AlarmKind.FIX_SIGMA: "m",
}


#: ``AlarmStatus(**values)``, cheaper (statuses() builds one per alarm on every status tick).
_new_status = fast_constructor(AlarmStatus)


@dataclass(slots=True)
class _Alarm:
    key: str
    kind: AlarmKind
    band: str
    severity: Severity
    machine: Debouncer
    value: float = math.nan
    since: GpsTime | None = None


class StationAlarms:
    """Every alarm of one station, built from ``[alarms]`` settings."""

    def __init__(self, station: str, settings: AlarmSettings) -> None:
        self.station = station
        self._settings = settings
        self._seq = 0
        self._alarms: dict[str, _Alarm] = {}
        self._cn0_keys: dict[int, str] = {}
        for kind, cfg in (
            (AlarmKind.ROTI, settings.roti),
            (AlarmKind.ROT, settings.rot),
            (AlarmKind.VTEC, settings.vtec),
            (AlarmKind.GRADIENT, settings.gradient),
            (AlarmKind.DUAL_FREQUENCY_LOSS, settings.dual_frequency_loss),
            (AlarmKind.FIX_QUALITY, settings.fix_quality),
            (AlarmKind.FIX_HDOP, settings.fix_hdop),
            (AlarmKind.FIX_SIGMA, settings.fix_sigma),
        ):
            if cfg.enabled:
                self._add(kind.value, kind, "", cfg)
        self._alarms[AlarmKind.STREAM_STALL.value] = _Alarm(
            key=AlarmKind.STREAM_STALL.value,
            kind=AlarmKind.STREAM_STALL,
            band="",
            severity=Severity.SEVERE,
            machine=Debouncer(
                raise_at=settings.stall_after_s,
                clear_at=settings.stall_after_s,
                raise_after_s=0.0,
                clear_after_s=0.0,
            ),
        )
        base = settings.cn0_baseline
        self._cn0 = Cn0Baseline(
            bin_deg=base.bin_deg, time_constant_s=base.time_constant_s, min_samples=base.min_samples
        )
        #: The snapshot alarms in the order observe_snapshot feeds them (None: disabled).
        self._snapshot_alarms: tuple[_Alarm | None, ...] = tuple(
            self._alarms.get(kind)
            for kind in (
                AlarmKind.ROTI,
                AlarmKind.ROT,
                AlarmKind.VTEC,
                AlarmKind.GRADIENT,
                AlarmKind.DUAL_FREQUENCY_LOSS,
            )
        )
        # The quiet-epoch path of the snapshot alarms: their raise levels (+∞: disabled) and
        # where their values go (a sink of this engine's own for a disabled one).
        sink = _Alarm(
            key="", kind=AlarmKind.ROTI, band="", severity=Severity.ADVISORY,
            machine=Debouncer(raise_at=math.inf, clear_at=math.inf, raise_after_s=0.0,
                              clear_after_s=0.0),
        )  # fmt: skip
        self._snapshot_sinks = tuple(a or sink for a in self._snapshot_alarms)
        self._snapshot_raise = tuple(
            math.inf if a is None else a.machine.raise_at for a in self._snapshot_alarms
        )
        #: No snapshot alarm is active or holding a change.
        self._snapshot_quiet = True
        self._roti_median = settings.roti_statistic == "median"
        self._cn0_on = settings.cn0_drop.enabled
        self._cn0_raise_at = settings.cn0_drop.raise_at
        self._cn0_min_cells = settings.cn0_baseline.min_cells
        #: The CN0 alarm of each band key (None until the band is first evaluated).
        self._cn0_by_key: list[_Alarm | None] = [None] * N_BAND_KEYS
        #: The band keys last judged whose alarms all exist, and those alarms.
        self._cn0_known: tuple[tuple[int, ...], tuple[_Alarm, ...]] = ((), ())
        #: No CN0 alarm is active or pending (nothing frozen; a value below raise_at changes
        #: nothing but the alarm's value).
        self._cn0_quiet = True
        #: The last snapshot's deferred part: its baseline learning (cells, t_s, frozen bands)
        #: and, on a quiet epoch, the CN0 alarms' values to record (alarms, values).
        self._unlearned: (
            tuple[
                Cn0Cells,
                float,
                npt.NDArray[np.bool_] | None,
                tuple[_Alarm, ...] | None,
                list[float] | None,
            ]
            | None
        ) = None

    def unsettled(self) -> bool:
        """Learning is pending: :meth:`settle` has work to do."""
        return self._unlearned is not None

    def settle(self) -> None:
        """Do the deferred part of the last :meth:`observe_snapshot`: record the quiet CN0 alarms'
        values, fold its C/N0 cells into the baseline and gather the baseline for the next epoch
        (a no-op when nothing is pending). Call it after the urgent work of every station;
        skipping it only moves the work into the next ``observe_snapshot`` (:meth:`statuses`
        records the values itself)."""
        self._record_cn0_values()
        pending = self._unlearned
        if pending is not None:
            self._unlearned = None
            cells, t_s, frozen, _, _ = pending
            base = self._cn0
            base.learn_cells(cells, t_s, frozen=frozen)
            base.prepare(cells)

    def _record_cn0_values(self) -> None:
        """Record the CN0 values a quiet epoch left to :meth:`settle`, learning still pending."""
        pending = self._unlearned
        if pending is not None and pending[3] is not None and pending[4] is not None:
            for alarm, value in zip(pending[3], pending[4], strict=True):
                alarm.value = value
            self._unlearned = (pending[0], pending[1], pending[2], None, None)

    def _add(self, key: str, kind: AlarmKind, band: str, cfg: ThresholdAlarm) -> _Alarm:
        alarm = _Alarm(
            key=key,
            kind=kind,
            band=band,
            severity=Severity(cfg.severity),
            machine=Debouncer(
                raise_at=cfg.raise_at,
                clear_at=cfg.clear_at,
                raise_after_s=cfg.raise_after_s,
                clear_after_s=cfg.clear_after_s,
            ),
        )
        self._alarms[key] = alarm
        return alarm

    def _step(
        self,
        alarm: _Alarm,
        value: float,
        time: GpsTime,
        out: list[AlarmTransition],
        t_s: float | None = None,
    ) -> None:
        """Feed ``value`` at ``time`` (``t_s``: its ``total_s``, when the caller has it)."""
        alarm.value = value
        if not alarm.machine.step(value, time.total_s if t_s is None else t_s):
            return
        self._seq += 1
        m = alarm.machine
        state = AlarmState.ACTIVE if m.active else AlarmState.NORMAL
        previous = AlarmState.NORMAL if m.active else AlarmState.ACTIVE
        alarm.since = time
        out.append(
            AlarmTransition(
                seq=self._seq,
                station=self.station,
                alarm=alarm.key,
                kind=alarm.kind,
                band=alarm.band,
                severity=alarm.severity,
                previous=previous,
                state=state,
                time=time,
                value=value,
                unit=UNITS[alarm.kind],
                raise_at=m.raise_at,
                clear_at=m.clear_at,
            )
        )
        log.warning(
            "alarm %s %s at station %s: %s → %s (value %.3g %s, raise at %g, clear below %g)",
            alarm.key,
            "raised" if m.active else "cleared",
            self.station,
            previous.value,
            state.value,
            value,
            UNITS[alarm.kind],
            m.raise_at,
            m.clear_at,
        )

    def _maybe(
        self, kind: AlarmKind, value: float, time: GpsTime, out: list[AlarmTransition]
    ) -> None:
        alarm = self._alarms.get(kind)  # a StrEnum member is its value as a key
        if alarm is not None:
            self._step(alarm, value, time, out)

    def observe_snapshot(self, snap: StationSnapshot) -> list[AlarmTransition]:
        """Evaluate the ionosphere and CN0 alarms on one epoch's snapshot (its baseline learning
        is left pending for :meth:`settle`; anything still pending is settled first)."""
        if self._unlearned is not None:
            self.settle()
        out: list[AlarmTransition] = []
        t_s = snap.time.total_s
        roti = snap.roti_median_tecu_per_min if self._roti_median else snap.roti_max_tecu_per_min
        rot = snap.rot_max_abs_tecu_per_min
        vtec = snap.vtec_tecu
        gradient = abs(snap.gradient_mm_per_km)
        loss = 1.0 - snap.dual_freq_fraction
        r_roti, r_rot, r_vtec, r_gradient, r_loss = self._snapshot_raise
        if self._snapshot_quiet and not (
            roti >= r_roti or rot >= r_rot or vtec >= r_vtec or gradient >= r_gradient
            or loss >= r_loss
        ):  # fmt: skip
            # Shortcut: every alarm normal with no hold, no value reaching raise_at (NaN does
            # not): Debouncer.step would change nothing (no crossing: the hold stays None, no
            # flip); only the values are kept.
            a_roti, a_rot, a_vtec, a_gradient, a_loss = self._snapshot_sinks
            a_roti.value = roti
            a_rot.value = rot
            a_vtec.value = vtec
            a_gradient.value = gradient
            a_loss.value = loss
        else:
            self._observe_levels(snap, (roti, rot, vtec, gradient, loss), out, t_s)
        if self._cn0_on and snap.cell_sat.size:
            self._observe_cn0(snap, out, t_s)
        return out

    def _observe_levels(
        self,
        snap: StationSnapshot,
        values: tuple[float, float, float, float, float],
        out: list[AlarmTransition],
        t_s: float,
    ) -> None:
        """The snapshot alarms one by one (some active, holding or reaching raise_at)."""
        step = self._step
        t = snap.time
        quiet = True
        for alarm, value in zip(self._snapshot_alarms, values, strict=True):
            if alarm is None:
                continue
            m = alarm.machine
            if m.active or m.held_since is not None or value >= m.raise_at:
                step(alarm, value, t, out, t_s)
            else:
                # Shortcut: normal, no hold, below raise_at (or NaN): Debouncer.step would change
                # nothing (no crossing: the hold stays None, no flip); only the value is kept.
                alarm.value = value
            quiet = quiet and not m.active and m.held_since is None
        self._snapshot_quiet = quiet

    def _observe_cn0(self, snap: StationSnapshot, out: list[AlarmTransition], t_s: float) -> None:
        base = self._cn0
        cells = base.cells(snap.cell_sat, snap.cell_sig, snap.cell_el_deg, snap.cell_cn0_dbhz)
        # Bands evaluated this epoch (bounded: at most N_BAND_KEYS); the loops are per band.
        keys, values = base.judged_drops(cells, self._cn0_min_cells)
        if self._cn0_quiet and (not values or max(values) < self._cn0_raise_at):
            known_keys, alarms = self._cn0_known
            if known_keys != keys:
                found = tuple(self._cn0_by_key[k] for k in keys)
                if all(found):  # every band known (truth test: no __eq__ call per alarm)
                    known_keys, alarms = self._cn0_known = (keys, found)  # type: ignore[assignment]
            if known_keys == keys:
                # Shortcut: every CN0 machine is normal with no hold and no value reaches
                # raise_at, so each step would only record the value (Debouncer.step: no
                # crossing → no hold); settle() records them (statuses() first, if called).
                self._unlearned = (cells, t_s, None, alarms, values)
                return
        by_key = self._cn0_by_key
        for k, value in zip(keys, values, strict=True):
            alarm = by_key[k]
            if alarm is None:
                label = band_label(k)
                key = f"{AlarmKind.CN0_DROP.value}-{label.lower()}"
                self._cn0_keys[k] = key
                alarm = by_key[k] = self._add(
                    key, AlarmKind.CN0_DROP, label, self._settings.cn0_drop
                )
            self._step(alarm, value, snap.time, out, t_s)
        frozen: npt.NDArray[np.bool_] | None = None
        for k, key in self._cn0_keys.items():  # per band
            m = self._alarms[key].machine
            if m.active or m.pending:
                if frozen is None:
                    frozen = np.zeros(N_BAND_KEYS, np.bool_)
                frozen[k] = True
        self._cn0_quiet = frozen is None
        self._unlearned = (cells, t_s, frozen, None, None)

    def observe_fix(self, fix: FixStatus, time: GpsTime | None = None) -> list[AlarmTransition]:
        """Evaluate the NMEA fix alarms; ``time`` is used when the fix carries none."""
        out: list[AlarmTransition] = []
        t = fix.time or time
        if t is None:
            return out
        accepted = self._settings.fix_accepted_qualities
        self._maybe(AlarmKind.FIX_QUALITY, 0.0 if fix.quality in accepted else 1.0, t, out)
        self._maybe(AlarmKind.FIX_HDOP, fix.hdop, t, out)
        self._maybe(AlarmKind.FIX_SIGMA, math.hypot(fix.sigma_lat_m, fix.sigma_lon_m), t, out)
        return out

    def observe_stall(self, age_s: float, time: GpsTime) -> list[AlarmTransition]:
        """Evaluate the stream-stall alarm: ``age_s`` since the last valid epoch (monotonic),
        ``time`` = now (wall clock as GPS time), used for the transition's time stamp."""
        out: list[AlarmTransition] = []
        self._step(self._alarms[AlarmKind.STREAM_STALL.value], age_s, time, out)
        return out

    def statuses(self) -> tuple[AlarmStatus, ...]:
        """The current status of every alarm, in a stable order (built by :func:`_new_status`)."""
        self._record_cn0_values()
        station = self.station
        active, normal = AlarmState.ACTIVE, AlarmState.NORMAL
        out = []
        for a in self._alarms.values():
            m = a.machine
            out.append(
                _new_status(
                    station=station,
                    alarm=a.key,
                    kind=a.kind,
                    band=a.band,
                    severity=a.severity,
                    state=active if m.active else normal,
                    pending=m.held_since is not None,  # Debouncer.pending
                    value=a.value,
                    unit=UNITS[a.kind],
                    raise_at=m.raise_at,
                    clear_at=m.clear_at,
                    since=a.since,
                )
            )
        return tuple(out)
