"""Synthetic estimator snapshots for the output and alarm tests (an invented station, invented storm).

Not a test module: imported by tests/test_outputs*.py, test_alarms*.py, test_mqtt*.py,
test_exporter*.py and bench/bench_outputs.py.
"""

from __future__ import annotations

import numpy as np

from ionwarden.daemon.estimator import SatelliteFigures, StationSnapshot
from ionwarden.daemon.outputs import OutboundMessage, Topic
from ionwarden.parsers import GpsTime, signal_code

#: An invented epoch: GPS week 2395, 2025-12-02 (a Tuesday) 12:00:00 UTC.
T0 = GpsTime(2395, 2 * 86400.0 + 12 * 3600.0 + 18.0)


def make_snapshot(
    station: str = "ALPHA",
    t: GpsTime = T0,
    *,
    n: int = 4,
    roti: float = 0.1,
    rot: float = 0.2,
    vtec: float = 20.0,
    gradient: float = 3.0,
    dual: float = 1.0,
    cn0_l2_offset_db: float = 0.0,
    nan_sat: bool = False,
) -> StationSnapshot:
    """``n`` GPS satellites G01…, elevations 20°…, two cells each (1C and 2W)."""
    sat = np.arange(1, n + 1, dtype=np.int16)
    el = np.linspace(20.0, 80.0, n)
    f = np.full(n, 1.0)
    stec = 10.0 + np.arange(n, dtype=np.float64)
    if nan_sat:
        stec[0] = np.nan
    figs = SatelliteFigures(
        sat=sat,
        pair=tuple("1C-2W" for _ in range(n)),
        el_deg=el,
        az_deg=np.linspace(0.0, 270.0, n),
        ipp_lat_deg=45.0 + 0.1 * f,
        ipp_lon_deg=7.0 + 0.2 * f,
        stec_tecu=stec,
        vtec_tecu=stec / 2.0,
        rot_tecu_per_min=rot * f,
        roti_tecu_per_min=roti * f,
        iono_l1_m=stec * 0.1624,
        if_code_m=np.full(n, 2.0e7),
        if_phase_m=np.full(n, 2.0e7),
        if_code_smoothed_m=np.full(n, 2.0e7),
        slip=np.zeros(n, np.bool_),
        arc_id=np.arange(n, dtype=np.int32),
    )
    cell_sat = np.repeat(sat, 2)
    cell_sig = np.tile(np.array([signal_code("1C"), signal_code("2W")], np.uint16), n)
    cell_el = np.repeat(el, 2)
    # A plausible CN0-versus-elevation curve (ours): 35 dB-Hz at the horizon, +0.2 dB per degree.
    cn0 = (35.0 + 0.2 * cell_el).astype(np.float32)
    cn0[1::2] -= np.float32(5.0 + cn0_l2_offset_db)
    return StationSnapshot(
        station=station,
        time=t,
        n_sats=n,
        vtec_tecu=vtec,
        roti_max_tecu_per_min=roti,
        roti_median_tecu_per_min=roti * 0.8,
        rot_max_abs_tecu_per_min=rot,
        gradient_mm_per_km=gradient,
        gradient_tecu_per_km=gradient / 162.4,
        gradient_azimuth_deg=135.0,
        dual_freq_fraction=dual,
        receiver_bias_tecu=1.5,
        receiver_bias_sigma_tecu=0.2,
        satellites=figs,
        cell_sat=cell_sat,
        cell_sig=cell_sig,
        cell_el_deg=cell_el,
        cell_cn0_dbhz=cn0,
    )


def storm_roti(t_s: float) -> float:
    """An invented storm: quiet 0.1 TECU/min, ramps to 0.9 between 10 and 20 min, holds to 30 min,
    falls back to 0.1 by 40 min (``t_s`` = seconds since T0)."""
    m = t_s / 60.0
    if m < 10 or m >= 40:
        return 0.1
    if m < 20:
        return 0.1 + 0.08 * (m - 10)
    if m < 30:
        return 0.9
    return 0.9 - 0.08 * (m - 30)


def class_message(topic: Topic, n: int, klass: int) -> OutboundMessage:
    """Message number ``n`` of the buffer property tests: class 0 alarm, 1 summary, 2 bulk."""
    return OutboundMessage(
        topic=topic,
        payload=str(n).encode(),
        qos=1,
        retain=False,
        alarm_class=klass == 0,
        bulk=klass == 2,
    )
