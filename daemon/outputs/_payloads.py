"""Pure formatting: estimator and alarm values → JSON payload bytes (STYLE rule 20).

Every payload is a JSON object with a ``schema`` field ("ionwarden.<name>/<version>"; the JSON
Schemas are in ``config/schemas/<name>.schema.json``), units in the field names, and its time both
as UTC ISO 8601 (``time_utc``, millisecond precision, "Z") and as GPS time (``gps_week``,
``gps_tow_s``). Unknown numbers (NaN) are ``null``. Output is compact and key order fixed, so the
same input gives the same bytes (golden tests). No clock is read here: "now" is an argument.
"""

# size: ~530 lines: every payload's formatter with its byte template, side by side, so
# the shared field formatting (times, NaN, units) has one home; golden bytes pin each.
from __future__ import annotations

import functools
import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np

from ionwarden.daemon.alarms import BAND_NAMES
from ionwarden.parsers import MAX_SAT_ID, GpsTime, gps_to_utc, sat_name, utc_to_gps

if TYPE_CHECKING:
    import datetime as dt

    import numpy.typing as npt

    from ionwarden.daemon.alarms import AlarmStatus, AlarmTransition
    from ionwarden.daemon.estimator import StationSnapshot

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


def schema_id(name: str) -> str:
    """The ``schema`` field value of a payload kind: ``ionwarden.summary/1``."""
    return f"ionwarden.{name}/{SCHEMA_NAMES[name]}"


def encode(obj: dict[str, Any]) -> bytes:
    """Compact UTF-8 JSON; NaN/∞ must already be None (``allow_nan=False`` enforces it)."""
    return json.dumps(obj, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


#: Zero-padded numbers for iso_utc (a table look-up is far cheaper than a format spec).
_PAD2 = tuple(f"{i:02d}" for i in range(100))
_PAD3 = tuple(f"{i:03d}" for i in range(1000))


def iso_utc(utc: dt.datetime) -> str:
    """``2026-12-02T13:15:25.123Z`` (UTC, milliseconds).

    Written field by field from tables rather than through ``strftime`` (most of the cost of a
    payload's time fields): the same zero-padded digits for years 1000–9999; before 1000 the C
    library decides the year's padding, so those go through ``strftime`` as before
    (tests/test_emit_lean_summary_times.py)."""
    if utc.year < 1000:
        return utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z"
    pad = _PAD2
    return (
        f"{utc.year}-{pad[utc.month]}-{pad[utc.day]}T{pad[utc.hour]}:{pad[utc.minute]}:"
        f"{pad[utc.second]}.{_PAD3[utc.microsecond // 1000]}Z"
    )


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


# --- fast paths for the per-epoch payloads --------------------------------------------------------
# Summary and satellites are formatted into fixed templates instead of through a dict and
# json.dumps; the bytes are identical (json writes a float as ``float.__repr__`` and a finite value
# only: NaN/±∞ become null, as in _num/_col). tests/test_outputs_fastjson.py checks the equality
# against json.dumps on arbitrary values, tests/test_emit_lean_payloads.py the lean paths (the
# summary's one-step template, the satellites' digit tables) against the code they replaced.

_float_repr = float.__repr__


#: 10^d for the decimals the payloads round to (exact doubles).
_TEN_POW = tuple(10.0**d for d in range(10))
#: Scaled values below this take the shortcut in _jnum: their product v·10^d is within
#: 1e6·2⁻⁵³ ≈ 1.1e-10 of the exact one.
_ROUND_FAST_LIMIT = 1e6
#: The shortcut's margin to a rounding tie (far above that error).
_ROUND_TIE_MARGIN = 0.4999999


def _jnum(x: float, digits: int) -> str:
    """``json.dumps(_num(x, digits))`` (0 ≤ ``digits`` < 10), mostly without the decimal string
    round trip that ``round`` makes.

    ``round(v, d)`` is the double nearest to k·10⁻ᵈ, k the integer nearest to the exact v·10ᵈ
    (ties to even). When the float product y = v·10ᵈ is more than 0.4999999 from a tie, the
    integer nearest to y is that k (y is within 1.1e-10 of the exact product), and k / 10ᵈ (k and
    10ᵈ exact, the division correctly rounded) is that double; a zero keeps v's sign, as in
    ``round``. Anything else (near a tie, large, NaN, ±∞) takes the general path."""
    v = float(x)
    p = _TEN_POW[digits]
    y = v * p
    if -_ROUND_FAST_LIMIT < y < _ROUND_FAST_LIMIT:
        k = math.floor(y + 0.5)
        if -_ROUND_TIE_MARGIN < y - k < _ROUND_TIE_MARGIN:
            return _float_repr(k / p if k else math.copysign(0.0, v))
    return _float_repr(round(v, digits)) if math.isfinite(v) else "null"


@functools.lru_cache(maxsize=1024)
def _jstr(text: str) -> str:
    """A JSON string literal (as ``encode`` writes it), cached: station names, pairs, sources."""
    return json.dumps(text, ensure_ascii=False)


@functools.lru_cache(maxsize=256)
def _time_json(week: int, tow_s: float) -> str:
    """``"time_utc":…,"gps_week":…,"gps_tow_s":…`` of a GPS time, cached: every station of one
    epoch shares it."""
    t = GpsTime(week, tow_s)  # validates tow_s (0 ≤ tow_s < 604800: finite)
    # A whole second (1 Hz epochs) is its own 3-decimal rounding: round's decimal round trip is
    # skipped.
    tow = tow_s if tow_s == math.floor(tow_s) else round(tow_s, 3)
    return (
        f'"time_utc":"{iso_utc(gps_to_utc(t))}","gps_week":{int(week)},'
        f'"gps_tow_s":{_float_repr(tow)}'
    )


def _jcol(a: npt.NDArray[Any], digits: int) -> str:
    """``json.dumps(_col(a, digits))`` without the Python objects of _col."""
    r = np.round(a.astype(np.float64), digits)
    parts = list(map(_float_repr, r.tolist()))
    bad = ~np.isfinite(r)
    if bad.any():
        for i in np.flatnonzero(bad).tolist():
            parts[i] = "null"
    return "[" + ",".join(parts) + "]"


_SUMMARY_HEAD = '{"schema":"' + schema_id("summary") + '","station":'
_SATELLITES_HEAD = '{"schema":"' + schema_id("satellites") + '","station":'
#: Satellite id → its JSON string literal ('"G07"').
_SAT_JSON = np.array([json.dumps(sat_name(i)) for i in range(MAX_SAT_ID)], dtype=object)


#: The summary's ten figures with their decimals, for ``%`` formatting in one step.
_SUMMARY_FIGURES = (
    '"vtec_tecu":%.3f,"roti_max_tecu_per_min":%.4f,"roti_median_tecu_per_min":%.4f,'
    '"rot_max_abs_tecu_per_min":%.4f,"gradient_mm_per_km":%.2f,"gradient_tecu_per_km":%.5f,'
    '"gradient_azimuth_deg":%.1f,"dual_freq_fraction":%.3f,"receiver_bias_tecu":%.3f,'
    '"receiver_bias_sigma_tecu":%.3f,'
)


def summary_payload(snap: StationSnapshot) -> bytes:
    """``<prefix>/<station>/summary``: station figures of one epoch.

    Shortcut when every figure is finite with |x| < 1e8 (their sum of squares is below 1e16:
    NaN, ±∞ and overflow fail it) and the 5-decimal gradient is 0 or |x| ≥ 1e-4: ``"%.{d}f"``
    writes the decimal that ``round(x, d)`` converts back (both are the correctly rounded
    d-decimal string, dtoa mode 3), and with ≤ 15 significant digits repr of that double is the
    same decimal without trailing zeros (no other decimal of ≤ 15 digits maps to it), in fixed
    notation (|x| ≥ 1e-4); the zeros go with three ``replace`` (pairs twice, then one: at most
    5), "1." becomes "1.0" as in repr. A NaN figure (null; ROTI, ROT and the receiver bias are
    unknown for a station's first epochs) does not send the others the slow way: the test is made
    on the known figures, ``"%f"`` writes NaN as ``nan`` (never signed, never with a zero that the
    ``replace`` would touch) and ``nan,`` becomes ``null,``. Otherwise each figure goes through
    _jnum. tests/test_emit_lean_payloads.py and tests/test_emit_lean_summary_times.py check the
    equality."""
    t = snap.time
    figs = (
        vtec := snap.vtec_tecu,
        roti_max := snap.roti_max_tecu_per_min,
        roti_median := snap.roti_median_tecu_per_min,
        rot := snap.rot_max_abs_tecu_per_min,
        grad := snap.gradient_mm_per_km,
        grad_tecu := snap.gradient_tecu_per_km,
        azimuth := snap.gradient_azimuth_deg,
        dual := snap.dual_freq_fraction,
        bias := snap.receiver_bias_tecu,
        bias_sigma := snap.receiver_bias_sigma_tecu,
    )
    squares = (
        vtec * vtec
        + roti_max * roti_max
        + roti_median * roti_median
        + rot * rot
        + grad * grad
        + grad_tecu * grad_tecu
        + azimuth * azimuth
        + dual * dual
        + bias * bias
        + bias_sigma * bias_sigma
    )
    # NaN only from a NaN figure (no subtraction: ±∞ alone gives +∞); ±∞ beside it stays +∞ here.
    nulls = squares != squares  # noqa: PLR0124 - NaN is the only float unequal to itself
    if nulls:
        squares = sum([x * x for x in figs if x == x])  # noqa: PLR0124 - (the known ones)
    if squares < 1e16 and not (-1e-4 < grad_tecu < 1e-4 and grad_tecu != 0.0):
        figures = (
            (_SUMMARY_FIGURES % figs)
            .replace("00,", ",")
            .replace("00,", ",")
            .replace("0,", ",")
            .replace(".,", ".0,")
        )
        if nulls:
            figures = figures.replace("nan,", "null,")
    else:
        figures = (
            f'"vtec_tecu":{_jnum(vtec, 3)},'
            f'"roti_max_tecu_per_min":{_jnum(roti_max, 4)},'
            f'"roti_median_tecu_per_min":{_jnum(roti_median, 4)},'
            f'"rot_max_abs_tecu_per_min":{_jnum(rot, 4)},'
            f'"gradient_mm_per_km":{_jnum(grad, 2)},'
            f'"gradient_tecu_per_km":{_jnum(grad_tecu, 5)},'
            f'"gradient_azimuth_deg":{_jnum(azimuth, 1)},'
            f'"dual_freq_fraction":{_jnum(dual, 3)},'
            f'"receiver_bias_tecu":{_jnum(bias, 3)},'
            f'"receiver_bias_sigma_tecu":{_jnum(bias_sigma, 3)},'
        )
    return (
        f"{_SUMMARY_HEAD}{_jstr(snap.station)},{_time_json(t.week, t.tow_s)},"
        f'"n_sats":{int(snap.n_sats)},{figures}"geometry_source":{_jstr(snap.geometry_source)}}}'
    ).encode()


#: The satellites payload's float columns and their decimals, in payload order.
_SAT_COLUMNS: tuple[tuple[str, int], ...] = (
    ("el_deg", 2),
    ("az_deg", 2),
    ("ipp_lat_deg", 4),
    ("ipp_lon_deg", 4),
    ("stec_tecu", 3),
    ("vtec_tecu", 3),
    ("rot_tecu_per_min", 4),
    ("roti_tecu_per_min", 4),
    ("iono_l1_m", 4),
)
_SAT_SCALE = np.array([10.0**d for _, d in _SAT_COLUMNS])[:, None]
#: Decimals written by the fixed-width formatter (the most any satellites column uses).
_FRAC_DIGITS = 4
#: 10^p for the digit positions p = 12 … 0, most significant first (float64: exact, and float
#: division is far cheaper than int64 division here); a formatter of w integer digits uses the last
#: w + _FRAC_DIGITS + 1 (one more position on top: digit_p = q_p − 10·q_(p+1)).
_POW = 10.0 ** np.arange(12, -1, -1)
_SPACE, _ZERO, _MINUS, _DOT, _COMMA, _CLOSE = b" 0-.,]"
#: Table formatter (|x| < 1e4): a value is two 8-byte words, its sign and integer part
#: right-aligned ("     -12"; index ip + 10⁴·sign), and "." with the 4 decimals, trailing zeros
#: blank but the first kept, and the separator always at byte 5 (".5   ,  "; index = decimals·10⁴).
_INT_WORDS = np.frombuffer(
    "".join(
        [f"{'-' if neg else ''}{i}".rjust(8) for neg in (0, 1) for i in range(10_000)]
    ).encode(),
    np.uint64,
)
_FRAC_WORDS = np.frombuffer(
    "".join([f".{f'{f:04d}'.rstrip('0') or '0':<4},  " for f in range(10_000)]).encode(), np.uint64
)
_NULL_WORDS = np.frombuffer(b"    null     ,  ", np.uint64)
_WORD_BYTES = 16
_SEPARATOR_AT = 8 + 5  # in a value's 16 bytes


def _fixed_columns(r: npt.NDArray[np.float64]) -> list[str] | None:
    """JSON text of each row of ``r`` (already rounded to at most 4 decimals; NaN/±∞ → null),
    written as ``float.__repr__`` would, in a few whole-array steps; None when a value is outside
    the range where that holds (|x| ≥ 1e8: the caller formats it the slow way).

    Why it equals repr: a value rounded to d ≤ 4 decimals with |x| < 1e8 is the double nearest to
    k·10⁻ᵈ with |k| < 2⁴⁰, and no other decimal of ≤ 4 places is that close, so repr's shortest
    round-tripping text is k·10⁻ᵈ without trailing zeros, in fixed notation (1e-4 ≤ |x| < 1e16).
    The digits come from float arithmetic on integers < 1e12 (exact: each quotient k/10ᵖ is at
    least 10⁻ᵖ away from the next integer, far more than its rounding error). Each value is a
    fixed-width field; blanks are removed at the end. Below 1e4 (most figures) the digits are
    looked up instead (:func:`_table_columns`, tests/test_emit_lean_payloads.py)."""
    m, n = r.shape
    flat = r.reshape(-1)
    finite = np.isfinite(flat)
    mag = np.abs(np.where(finite, flat, 0.0))
    k = np.rint(mag * 10.0**_FRAC_DIGITS)
    top = float(k.max()) if k.size else 0.0
    if top < 1e8:  # |x| < 1e4: the table formatter
        return _table_columns(flat, finite, k, m, n)
    if top >= 1e12:  # |x| ≥ 1e8
        return None
    w = len(str(int(top) // 10**_FRAC_DIGITS))  # integer digits of the largest value
    nd = w + _FRAC_DIGITS
    # Built transposed (one row per character position, one column per value) so that every
    # step below writes contiguous rows; transposed back once at the end.
    q = np.floor(k / _POW[-nd - 1 :, None])  # q[j] = ⌊k / 10^p⌋, p = nd … 0
    d = q[1:] - 10.0 * q[:-1]  # digit at p = nd − 1 … 0
    d += _ZERO
    digits = d.astype(np.uint8)
    q = q[1:]
    text = np.empty((nd + 3, m * n), np.uint8)  # sign, w digits, ".", decimals, ","
    text[0] = np.where(np.signbit(flat), _MINUS, _SPACE)
    # Integer digits: a leading zero (nothing at or above it) is blank, the units digit never.
    text[1:w] = np.where(q[: w - 1] == 0.0, _SPACE, digits[: w - 1])
    text[w] = digits[w - 1]
    text[w + 1] = _DOT
    # Decimals: written while a non-zero digit is at or after them (k mod 10^(p+1) ≠ 0); the
    # first always.
    keep = q[w - 1 : nd - 1] * _POW[-_FRAC_DIGITS - 1 : -1, None] != k
    keep[0] = True
    text[w + 2 : -1] = np.where(keep, digits[w:], _SPACE)
    text[-1] = _COMMA
    if not finite.all():
        null = np.frombuffer(b"null".rjust(nd + 2) + b",", np.uint8)
        text[:, ~finite] = null[:, None]
    text[-1, n - 1 :: n] = _CLOSE  # end of each row
    chars = text.T.ravel()  # value by value
    packed: bytes = chars[chars != _SPACE].tobytes()
    return packed.decode().split("]")[:m]


def _table_columns(
    flat: npt.NDArray[np.float64],
    finite: npt.NDArray[np.bool_],
    k: npt.NDArray[np.float64],
    m: int,
    n: int,
) -> list[str]:
    """_fixed_columns for k < 1e8 (|x| < 1e4): the same digits (k's integer part ⌊k/10⁴⌋ and
    its 4 decimals k − 10⁴·⌊k/10⁴⌋, exact in float64) looked up as two 8-byte words per value
    (_INT_WORDS, _FRAC_WORDS) instead of computed position by position; blanks go with one
    ``bytes.translate`` (far cheaper than ``replace`` or a numpy mask here)."""
    ip = np.floor(k / 1e4)
    frac = k - ip * 1e4
    ip += np.signbit(flat) * 1e4
    words = np.empty((m * n, 2), np.uint64)
    words[:, 0] = _INT_WORDS.take(ip.astype(np.intp))
    words[:, 1] = _FRAC_WORDS.take(frac.astype(np.intp))
    if np.count_nonzero(finite) != finite.shape[0]:
        words[~finite] = _NULL_WORDS
    text = words.view(np.uint8).reshape(m, n * _WORD_BYTES)
    text[:, _SEPARATOR_AT - _WORD_BYTES] = _CLOSE  # end of each row
    return text.tobytes().translate(None, b" ").decode().split("]")[:m]


@functools.lru_cache(maxsize=256)
def _pairs_json(pairs: tuple[str, ...]) -> str:
    """The ``pair`` column (cached: it changes only when the tracked signal set does)."""
    return ",".join(map(_jstr, pairs))


def satellites_payload(snap: StationSnapshot) -> bytes:
    """``<prefix>/<station>/satellites``: per-satellite figures as columns (index i = one satellite)."""
    s = snap.satellites
    t = snap.time
    cols: list[str] | None = None
    if s.sat.size:
        raw = np.array([getattr(s, name) for name, _ in _SAT_COLUMNS], np.float64)
        # np.round(x, d) is rint(x·10ᵈ)/10ᵈ; done for all columns at once, each with its d.
        cols = _fixed_columns(np.rint(raw * _SAT_SCALE) / _SAT_SCALE)
    if cols is None:
        cols = [_jcol(getattr(s, name), d)[1:-1] for name, d in _SAT_COLUMNS]
    sats = ",".join(_SAT_JSON[s.sat.astype(np.intp)].tolist())
    slips = ",".join(["true" if x else "false" for x in s.slip.tolist()])
    arcs = ",".join(map(str, s.arc_id.tolist()))
    body = ",".join(
        [f'"{name}":[{col}]' for (name, _), col in zip(_SAT_COLUMNS, cols, strict=True)]
    )
    return (
        f"{_SATELLITES_HEAD}{_jstr(snap.station)},{_time_json(t.week, t.tow_s)},"
        f'"sat":[{sats}],"pair":[{_pairs_json(tuple(s.pair))}],{body},'
        f'"slip":[{slips}],"arc_id":[{arcs}]}}'
    ).encode()


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
