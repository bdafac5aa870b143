"""Pure formatting: estimator and alarm values → JSON payload bytes (STYLE rule 20).

Every payload is a JSON object with a ``schema`` field ("ionwarden.<name>/<version>"; the JSON
Schemas are in ``config/schemas/<name>.schema.json``), units in the field names, and its time both
as UTC ISO 8601 (``time_utc``, millisecond precision, "Z") and as GPS time (``gps_week``,
``gps_tow_s``). Unknown numbers (NaN) are ``null``. Output is compact and key order fixed, so the
same input gives the same bytes (golden tests). No clock is read here: "now" is an argument.
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np

from ionwarden.daemon.alarms import BAND_NAMES
from ionwarden.parsers import MAX_SAT_ID, gps_to_utc, sat_name, utc_to_gps

if TYPE_CHECKING:
    import datetime as dt

    import numpy.typing as npt

    from ionwarden.daemon.alarms import AlarmStatus, AlarmTransition
    from ionwarden.daemon.estimator import StationSnapshot
    from ionwarden.parsers import GpsTime

    from ._model import DaemonSnapshot

__all__ = [
    "SCHEMA_NAMES",
    "alarm_event_payload",
    "alarm_state_payload",
    "daemon_status_payload",
    "encode",
    "health_payload",
    "iso_utc",
    "satellites_payload",
    "schema_id",
    "station_status_payload",
    "summary_payload",
    "time_fields",
]

#: Payload kinds and their current schema versions (a breaking change bumps the version).
SCHEMA_NAMES: dict[str, int] = {
    "summary": 1,
    "satellites": 1,
    "station-status": 1,
    "daemon-status": 1,
    "daemon-health": 1,
    "alarm-state": 1,
    "alarm-event": 1,
}

#: Satellite id → RINEX name ("G07"), for a vectorised lookup.
_SAT_NAMES = np.array([sat_name(i) for i in range(MAX_SAT_ID)], dtype=object)


def schema_id(name: str) -> str:
    """The ``schema`` field value of a payload kind: ``ionwarden.summary/1``."""
    return f"ionwarden.{name}/{SCHEMA_NAMES[name]}"


def encode(obj: dict[str, Any]) -> bytes:
    """Compact UTF-8 JSON; NaN/∞ must already be None (``allow_nan=False`` enforces it)."""
    return json.dumps(obj, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def iso_utc(utc: dt.datetime) -> str:
    """``2026-12-02T13:15:25.123Z`` (UTC, milliseconds)."""
    return utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z"


def time_fields(t: GpsTime) -> dict[str, Any]:
    """The three time fields of a payload, from a GPS time."""
    return {
        "time_utc": iso_utc(gps_to_utc(t)),
        "gps_week": t.week,
        "gps_tow_s": round(t.tow_s, 3),
    }


def _num(x: float, digits: int) -> float | None:
    v = float(x)
    return round(v, digits) if math.isfinite(v) else None


def _col(a: npt.NDArray[Any], digits: int) -> list[float | None]:
    """An array column as a JSON list, rounded, NaN → null (vectorised)."""
    r = np.round(a.astype(np.float64), digits)
    out = r.astype(object)
    out[~np.isfinite(r)] = None
    values: list[float | None] = out.tolist()
    return values


def summary_payload(snap: StationSnapshot) -> bytes:
    """``<prefix>/<station>/summary``: station figures of one epoch."""
    return encode(
        {
            "schema": schema_id("summary"),
            "station": snap.station,
            **time_fields(snap.time),
            "n_sats": snap.n_sats,
            "vtec_tecu": _num(snap.vtec_tecu, 3),
            "roti_max_tecu_per_min": _num(snap.roti_max_tecu_per_min, 4),
            "roti_median_tecu_per_min": _num(snap.roti_median_tecu_per_min, 4),
            "rot_max_abs_tecu_per_min": _num(snap.rot_max_abs_tecu_per_min, 4),
            "gradient_mm_per_km": _num(snap.gradient_mm_per_km, 2),
            "gradient_tecu_per_km": _num(snap.gradient_tecu_per_km, 5),
            "gradient_azimuth_deg": _num(snap.gradient_azimuth_deg, 1),
            "dual_freq_fraction": _num(snap.dual_freq_fraction, 3),
            "receiver_bias_tecu": _num(snap.receiver_bias_tecu, 3),
            "receiver_bias_sigma_tecu": _num(snap.receiver_bias_sigma_tecu, 3),
            "geometry_source": snap.geometry_source,
        }
    )


def satellites_payload(snap: StationSnapshot) -> bytes:
    """``<prefix>/<station>/satellites``: per-satellite figures as columns (index i = one satellite)."""
    s = snap.satellites
    return encode(
        {
            "schema": schema_id("satellites"),
            "station": snap.station,
            **time_fields(snap.time),
            "sat": _SAT_NAMES[s.sat.astype(np.intp)].tolist(),
            "pair": list(s.pair),
            "el_deg": _col(s.el_deg, 2),
            "az_deg": _col(s.az_deg, 2),
            "ipp_lat_deg": _col(s.ipp_lat_deg, 4),
            "ipp_lon_deg": _col(s.ipp_lon_deg, 4),
            "stec_tecu": _col(s.stec_tecu, 3),
            "vtec_tecu": _col(s.vtec_tecu, 3),
            "rot_tecu_per_min": _col(s.rot_tecu_per_min, 4),
            "roti_tecu_per_min": _col(s.roti_tecu_per_min, 4),
            "iono_l1_m": _col(s.iono_l1_m, 4),
            "slip": s.slip.tolist(),
            "arc_id": s.arc_id.tolist(),
        }
    )


def station_status_payload(
    station: str, state: str, now: dt.datetime, last_epoch: GpsTime | None
) -> bytes:
    """``<prefix>/<station>/status`` (retained): ``online``, ``stale`` or ``offline``."""
    return encode(
        {
            "schema": schema_id("station-status"),
            "station": station,
            "state": state,
            **time_fields(utc_to_gps(now)),
            "last_epoch_utc": None if last_epoch is None else iso_utc(gps_to_utc(last_epoch)),
        }
    )


def daemon_status_payload(state: str, now: dt.datetime | None, version: str) -> bytes:
    """``<prefix>/_daemon/status`` (retained): ``online`` or ``offline``; ``now`` None (time
    fields null) for the last will, which the broker sends at an unknown later time."""
    times: dict[str, Any] = (
        time_fields(utc_to_gps(now))
        if now is not None
        else {"time_utc": None, "gps_week": None, "gps_tow_s": None}
    )
    return encode(
        {
            "schema": schema_id("daemon-status"),
            "state": state,
            **times,
            "version": version,
        }
    )


def alarm_state_payload(status: AlarmStatus, now: dt.datetime) -> bytes:
    """``<prefix>/<station>/alarm/<alarm>`` (retained): the alarm's current state."""
    since = status.since
    return encode(
        {
            "schema": schema_id("alarm-state"),
            "station": status.station,
            "alarm": status.alarm,
            "kind": status.kind.value,
            "band": status.band or None,
            "band_name": BAND_NAMES.get(status.band) if status.band else None,
            "severity": status.severity.value,
            "state": status.state.value,
            "pending": status.pending,
            "value": _num(status.value, 4),
            "unit": status.unit,
            "raise_at": status.raise_at,
            "clear_at": status.clear_at,
            **time_fields(utc_to_gps(now)),
            "since_utc": None if since is None else iso_utc(gps_to_utc(since)),
        }
    )


def alarm_event_payload(tr: AlarmTransition) -> bytes:
    """``<prefix>/<station>/events``: one transition, in order; ``seq`` detects duplicates/gaps."""
    return encode(
        {
            "schema": schema_id("alarm-event"),
            "seq": tr.seq,
            "station": tr.station,
            "alarm": tr.alarm,
            "kind": tr.kind.value,
            "band": tr.band or None,
            "band_name": BAND_NAMES.get(tr.band) if tr.band else None,
            "severity": tr.severity.value,
            "previous": tr.previous.value,
            "state": tr.state.value,
            **time_fields(tr.time),
            "value": _num(tr.value, 4),
            "unit": tr.unit,
            "raise_at": tr.raise_at,
            "clear_at": tr.clear_at,
        }
    )


def health_payload(daemon: DaemonSnapshot, now: dt.datetime, now_monotonic_s: float) -> bytes:
    """``<prefix>/_daemon/health`` (retained): ingest, queue and MQTT figures of the daemon."""
    stations = [
        {
            "station": st.station,
            "connected": st.ingest.connected,
            "epochs_total": st.epochs_total,
            "last_epoch_age_s": None
            if st.last_epoch_monotonic_s is None
            else round(max(now_monotonic_s - st.last_epoch_monotonic_s, 0.0), 3),
            "bytes_total": st.ingest.bytes_total,
            "frames_total": st.ingest.frames_total,
            "crc_errors_total": st.ingest.crc_errors_total,
            "discarded_bytes_total": st.ingest.discarded_bytes_total,
        }
        for st in daemon.stations
    ]
    queues = [
        {
            "stage": q.stage,
            "station": q.station or None,
            "depth": q.depth,
            "capacity": q.capacity,
            "peak": q.peak,
            "dropped_total": q.dropped_total,
        }
        for q in daemon.queues
    ]
    m = daemon.mqtt
    return encode(
        {
            "schema": schema_id("daemon-health"),
            **time_fields(utc_to_gps(now)),
            "uptime_s": round(max(now_monotonic_s - daemon.started_monotonic_s, 0.0), 3),
            "stations": stations,
            "queues": queues,
            "mqtt_buffered": None if m is None else m.buffered_alarm + m.buffered_epoch,
            "mqtt_dropped_total": None
            if m is None
            else m.dropped_epoch_total + m.dropped_alarm_total,
        }
    )
