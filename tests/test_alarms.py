"""Debounced alarms: hysteresis, hold times, storm raise/clear, CN0 baseline per band, fix, stall."""

from __future__ import annotations

import logging
import math

import numpy as np
import pytest
from pydantic import ValidationError

from ionwarden.daemon.alarms import (
    AlarmKind,
    AlarmState,
    Cn0Baseline,
    Debouncer,
    Severity,
    StationAlarms,
    band_key,
    band_label,
)
from ionwarden.daemon.config import AlarmSettings, Cn0BaselineSettings, ThresholdAlarm
from ionwarden.daemon.estimator import FixStatus
from ionwarden.parsers import signal_code
from tests._outputs_support import T0, make_snapshot, storm_roti


def run_storm(alarms: StationAlarms, seconds: int, step: int = 1):
    out = []
    for t in range(0, seconds, step):
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t), roti=storm_roti(t)))
    return out


# --- Debouncer -----------------------------------------------------------------------------


def test_debouncer_raises_only_after_hold_time():
    """Debouncer raises when the value stays ≥ raise_at for raise_after_s, not before."""
    d = Debouncer(raise_at=1.0, clear_at=0.5, raise_after_s=10.0, clear_after_s=5.0)
    assert not d.step(2.0, 0.0)
    assert d.pending
    assert not d.step(2.0, 9.9)
    assert d.step(2.0, 10.0)
    assert d.active
    assert not d.pending


def test_debouncer_short_spike_does_not_raise():
    """Debouncer stays normal when the value drops back before the hold time."""
    d = Debouncer(raise_at=1.0, clear_at=0.5, raise_after_s=10.0, clear_after_s=5.0)
    d.step(2.0, 0.0)
    d.step(0.9, 5.0)  # below raise_at: hold restarts
    assert not d.pending
    assert not d.step(2.0, 12.0)
    assert not d.active


def test_debouncer_keeps_state_between_thresholds():
    """Debouncer keeps its state when the value sits between clear_at and raise_at (hysteresis)."""
    d = Debouncer(raise_at=1.0, clear_at=0.5, raise_after_s=0.0, clear_after_s=0.0)
    assert d.step(1.0, 0.0)
    assert not d.step(0.7, 1.0)
    assert d.active
    assert d.step(0.49, 2.0)
    assert not d.active
    assert not d.step(0.7, 3.0)
    assert not d.active


def test_debouncer_nan_restarts_hold_and_keeps_state():
    """Debouncer restarts a hold and keeps its state when the value is unknown (NaN)."""
    d = Debouncer(raise_at=1.0, clear_at=0.5, raise_after_s=10.0, clear_after_s=5.0)
    d.step(2.0, 0.0)
    d.step(math.nan, 5.0)
    assert not d.pending
    assert not d.step(2.0, 11.0)
    assert d.step(2.0, 21.0)


def test_debouncer_rejects_clear_above_raise():
    """Debouncer raises ValueError when clear_at is above raise_at."""
    with pytest.raises(ValueError, match="clear_at"):
        Debouncer(raise_at=1.0, clear_at=2.0, raise_after_s=0.0, clear_after_s=0.0)


def test_alarm_settings_reject_clear_above_raise():
    """ThresholdAlarm rejects a configuration whose clear_at is above raise_at."""
    with pytest.raises(ValidationError, match="clear_at"):
        ThresholdAlarm(raise_at=1.0, clear_at=2.0)


# --- storm ---------------------------------------------------------------------------------


def test_station_alarms_storm_raises_and_clears_roti_once():
    """StationAlarms raises ROTI once after the hold and clears it once when the storm passes."""
    settings = AlarmSettings(roti_statistic="max")
    out = [
        tr for tr in run_storm(StationAlarms("ALPHA", settings), 3000) if tr.kind is AlarmKind.ROTI
    ]
    assert [tr.state for tr in out] == [AlarmState.ACTIVE, AlarmState.NORMAL]
    # Expected times follow from the invented storm profile and the default holds (60 s, 300 s).
    first_above = next(t for t in range(3000) if storm_roti(t) >= settings.roti.raise_at)
    first_below = next(t for t in range(1800, 3000) if storm_roti(t) < settings.roti.clear_at)
    assert out[0].time - T0 == first_above + settings.roti.raise_after_s
    assert out[1].time - T0 == first_below + settings.roti.clear_after_s
    assert out[0].severity is Severity.WARNING
    assert out[0].unit == "TECU/min"
    assert out[1].seq == out[0].seq + 1


def test_station_alarms_roti_watches_the_median_by_default():
    """StationAlarms judges ROTI on the median over satellites unless told to use the max."""
    # make_snapshot: median = 0.8 × max; 0.6 max → 0.48 median, below raise_at 0.5.
    quiet_median = StationAlarms("ALPHA", AlarmSettings())
    worst = StationAlarms("ALPHA", AlarmSettings(roti_statistic="max"))
    out_median, out_max = [], []
    for t in range(120):
        snap = make_snapshot(t=T0 + float(t), roti=0.6)
        out_median += quiet_median.observe_snapshot(snap)
        out_max += worst.observe_snapshot(snap)
    assert [tr.alarm for tr in out_median] == []
    assert [tr.alarm for tr in out_max] == ["roti"]


def test_station_alarms_quiet_day_has_no_transitions():
    """StationAlarms reports nothing when every figure stays quiet."""
    alarms = StationAlarms("ALPHA", AlarmSettings())
    out = []
    for t in range(0, 600, 5):
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t)))
    assert out == []
    assert all(s.state is AlarmState.NORMAL for s in alarms.statuses())


def test_station_alarms_logs_each_transition(caplog):
    """StationAlarms logs a warning naming the alarm and station when an alarm is raised."""
    caplog.set_level(logging.WARNING, logger="ionwarden.daemon.alarms")
    run_storm(StationAlarms("ALPHA", AlarmSettings()), 1200)
    assert any("alarm roti raised at station ALPHA" in r.getMessage() for r in caplog.records)


def test_station_alarms_disabled_alarm_is_absent():
    """StationAlarms leaves out an alarm when it is disabled in the settings."""
    settings = AlarmSettings(vtec=ThresholdAlarm(enabled=False, raise_at=80.0, clear_at=70.0))
    keys = {s.alarm for s in StationAlarms("ALPHA", settings).statuses()}
    assert "vtec" not in keys
    assert "roti" in keys


def test_station_alarms_dual_frequency_loss_uses_single_band_fraction():
    """StationAlarms raises dual-frequency-loss when too few satellites keep two bands."""
    alarms = StationAlarms("ALPHA", AlarmSettings())
    out = []
    for t in range(40):
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t), dual=0.5))
    assert [(tr.alarm, tr.state) for tr in out] == [("dual-frequency-loss", AlarmState.ACTIVE)]
    assert out[0].value == pytest.approx(0.5)


# --- CN0 -----------------------------------------------------------------------------------


def _cn0_settings() -> AlarmSettings:
    return AlarmSettings(cn0_baseline=Cn0BaselineSettings(min_samples=20, min_cells=3))


def test_station_alarms_cn0_drop_names_the_band():
    """StationAlarms raises cn0-drop-g2 (GPS L2 only) when L2 C/N0 falls 8 dB below baseline."""
    alarms = StationAlarms("ALPHA", _cn0_settings())
    out = []
    for t in range(30):  # learn the baseline
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t), n=6))
    assert out == []
    for t in range(30, 60):  # interference on L2
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t), n=6, cn0_l2_offset_db=8.0))
    assert [(tr.alarm, tr.band, tr.state) for tr in out] == [
        ("cn0-drop-g2", "G2", AlarmState.ACTIVE)
    ]
    assert out[0].value == pytest.approx(8.0, abs=1e-3)
    assert out[0].time - T0 == 30 + 10  # raise_after_s = 10 s (default)
    for t in range(60, 200):  # interference gone
        out += alarms.observe_snapshot(make_snapshot(t=T0 + float(t), n=6))
    assert [tr.state for tr in out] == [AlarmState.ACTIVE, AlarmState.NORMAL]
    by_key = {s.alarm: s for s in alarms.statuses()}
    assert by_key["cn0-drop-g1"].state is AlarmState.NORMAL
    # The baseline was frozen during the alarm, so the drop is measured against the clean one.
    assert by_key["cn0-drop-g2"].value == pytest.approx(0.0, abs=1e-3)


def test_cn0_baseline_drop_matches_batch_oracle():
    """Cn0Baseline.drop_db equals the batch mean of (baseline − C/N0) per band (numpy oracle)."""
    rng = np.random.default_rng(7)
    base = Cn0Baseline(bin_deg=10.0, time_constant_s=600.0, min_samples=1)
    n = 40
    sat = rng.integers(1, 33, n).astype(np.int16)
    sig = rng.choice([signal_code("1C"), signal_code("2W"), signal_code("5Q")], n).astype(np.uint16)
    el = rng.uniform(5.0, 85.0, n)
    cn0 = rng.uniform(30.0, 50.0, n).astype(np.float32)
    base.learn(sat, sig, el, cn0, 0.0)
    now = (cn0 - 4.0).astype(np.float32)
    drop = base.drop_db(sat, sig, el, now, min_cells=1)
    # Oracle: with one learning epoch the baseline of a bin is its mean C/N0.
    key = band_key(sat, sig)
    binno = np.floor(el / 10.0).astype(int)
    for k in np.unique(key):
        cells = key == k
        ref = np.array([cn0[(key == k) & (binno == b)].astype(float).mean() for b in binno[cells]])
        assert drop[k] == pytest.approx(np.mean(ref - now[cells]), abs=1e-4)
    assert {band_label(int(k)) for k in np.unique(key)} <= {"G1", "G2", "G5"}


def test_cn0_baseline_needs_warm_bins():
    """Cn0Baseline.drop_db gives NaN for a band until its bins have min_samples epochs."""
    base = Cn0Baseline(min_samples=5)
    snap = make_snapshot(n=6)
    args = (snap.cell_sat, snap.cell_sig, snap.cell_el_deg, snap.cell_cn0_dbhz)
    for t in range(4):
        base.learn(*args, float(t))
    assert np.isnan(base.drop_db(*args)).all()
    base.learn(*args, 4.0)
    assert base.drop_db(*args)[
        band_key(np.int16([1]), np.uint16([signal_code("2W")]))[0]
    ] == pytest.approx(0.0)


# --- fix and stall -------------------------------------------------------------------------


def test_station_alarms_fix_quality_raises_on_invalid_fix():
    """StationAlarms raises fix-quality when GGA quality is 0 (invalid) for the hold time."""
    alarms = StationAlarms("ALPHA", AlarmSettings())
    out = []
    for t in range(15):
        # GGA quality 0 = fix not valid (NMEA 0183 v4.11 GGA field 6).
        fix = FixStatus(station="ALPHA", time=T0 + float(t), quality=0, n_sats_used=0, hdop=1.0)
        out += alarms.observe_fix(fix)
    assert [(tr.alarm, tr.state) for tr in out] == [("fix-quality", AlarmState.ACTIVE)]
    assert out[0].time - T0 == 10


def test_station_alarms_fix_without_time_uses_given_time_or_skips():
    """StationAlarms uses the caller's time when the fix has none, and skips when neither exists."""
    alarms = StationAlarms("ALPHA", AlarmSettings())
    fix = FixStatus(station="ALPHA", time=None, quality=1, n_sats_used=9, hdop=9.0)
    assert alarms.observe_fix(fix) == []
    assert alarms.observe_fix(fix, T0) == []
    out = alarms.observe_fix(fix, T0 + 30.0)
    assert [(tr.alarm, tr.state) for tr in out] == [("fix-hdop", AlarmState.ACTIVE)]


def test_station_alarms_stall_raises_at_once_and_clears_on_fresh_data():
    """StationAlarms raises stream-stall (severe) as soon as the age passes stall_after_s."""
    alarms = StationAlarms("ALPHA", AlarmSettings(stall_after_s=30.0))
    assert alarms.observe_stall(29.0, T0) == []
    out = alarms.observe_stall(31.0, T0 + 2.0)
    assert [(tr.alarm, tr.state, tr.severity) for tr in out] == [
        ("stream-stall", AlarmState.ACTIVE, Severity.SEVERE)
    ]
    out = alarms.observe_stall(0.5, T0 + 40.0)
    assert [tr.state for tr in out] == [AlarmState.NORMAL]
