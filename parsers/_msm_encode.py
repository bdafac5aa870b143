"""MSM4 and MSM7 encoder (``ObsEpoch`` → framed RTCM 3 messages) for the simulator and tests.

Layouts are those of ``_msm_tables`` (RTCM 10403.3 Tables 3.5-78, 3.5-81/82 and 3.5-87/88). One
message per constellation (more if NSat × NSig would exceed 64 cells), the multiple-message bit
(DF393) set on all but the last. Per satellite the rough range is the mean pseudorange rounded to
2⁻¹⁰ ms and the rough rate the mean rate rounded to 1 m/s; a cell whose fine value does not fit its
field, or is NaN, is sent as the field's "invalid" code (the most negative value).

The whole epoch is encoded at once, with no per-satellite or per-cell Python loop (STYLE rule 21):
``_msm_layout`` gives (cached) where every cell and field goes; here the values are computed on
its axes (``n`` cells in message order, ``nu`` satellites) and packed and framed by its plans.
Per-satellite means are summed exactly as ``np.nanmean`` sums, so the frames are the same bytes
as those of the earlier one-satellite-at-a-time encoder (a copy of which the tests keep).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Final

import numpy as np
import numpy.typing as npt

from ._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime, leap_seconds_at
from ._msm_layout import SYSTEMS_IN_ORDER, EncodeLayout, encode_layout
from ._msm_tables import (
    CELL_FIELDS,
    LOCK_TIME_DF402_S,
    LOCK_TIME_DF407_S,
    SAT_FIELDS,
    SPEED_OF_LIGHT_MPS,
    MsmSystem,
)

if TYPE_CHECKING:
    from ._epoch import ObsEpoch

__all__ = ["encode_msm"]

_F64 = npt.NDArray[np.float64]
_I64 = npt.NDArray[np.int64]
_LIGHT_MS_M: Final = SPEED_OF_LIGHT_MPS / 1000.0
_FINE_PR_RANGE_MS: Final = 2.0**-10  # DF400/DF405 span ±2⁻¹⁰ ms
_FINE_PH_RANGE_MS: Final = 2.0**-8  # DF401/DF406 span ±2⁻⁸ ms
_FLOAT_MAX: Final = float(np.finfo(np.float64).max)
#: Lock-time tables with reserved (NaN) indicators never chosen (searchsorted needs them sorted).
_LOCK_DF402_S: Final = np.nan_to_num(LOCK_TIME_DF402_S.astype(np.float64), nan=np.inf)
_LOCK_DF407_S: Final = np.nan_to_num(LOCK_TIME_DF407_S.astype(np.float64), nan=np.inf)


def _fit_signed(values: _F64, width: int) -> _I64:
    """Round to a signed ``width``-bit code; NaN or out of range → the invalid (most negative) code."""
    lo = -(1 << (width - 1))
    code = np.rint(values)
    ok = (code > lo) & (code <= -lo - 1)
    return np.where(ok, code, lo).astype(np.int64)


def _lock_code(lock_s: npt.NDArray[np.float32], table: _F64) -> _I64:
    """Largest indicator whose minimum lock time does not exceed the lock time (NaN → 0)."""
    # As np.nan_to_num(lock_s, nan=0.0): NaN → 0, +inf → the largest float.
    times = np.minimum(np.where(np.isnan(lock_s), 0.0, lock_s.astype(np.float64)), _FLOAT_MAX)
    return (np.searchsorted(table, times, side="right") - 1).clip(0).astype(np.int64)


def _epoch_field(system: MsmSystem, total_s: float) -> int:
    """30-bit MSM epoch time (RTCM 10403.3 Table 3.5-78) for GPS time ``total_s``."""
    ms = round(total_s * 1000.0)
    week_ms = round(SECONDS_PER_WEEK * 1000)
    if system.time_scale == "bdt":
        return (ms - round(BDS_GPS_OFFSET_S * 1000)) % week_ms
    if system.time_scale == "glo":
        leap = leap_seconds_at(GpsTime.from_total(total_s).to_utc())
        glo_ms = (ms - leap * 1000 + 10_800_000) % week_ms  # UTC(SU) + 3 h (GLONASS ICD §3.3.3)
        day, tod = divmod(glo_ms, 86_400_000)
        return (day << 27) | tod
    return ms % week_ms


def _group_nanmeans(values: _F64, lay: EncodeLayout) -> tuple[_F64, npt.NDArray[np.intp]]:
    """Mean and count of the non-NaN values of each satellite, per row of ``values`` (k, n).

    Bit-identical to ``np.nanmean`` of each satellite's cells: that zeroes NaNs and calls
    ``np.sum``, which adds fewer than 8 values in order and 8…128 values in 8 interleaved partial
    sums (numpy pairwise summation, ``pairwise_sum`` in numpy's loops_utils); both are reproduced
    column by column on a zero-padded (k, nu, width) matrix (adding a zero is exact).
    """
    nan = np.isnan(values)
    k, nu = values.shape[0], lay.sat_start.shape[0]
    mat = np.zeros((k, nu, lay.width))
    mat[:, lay.cell_sat, lay.cell_col] = np.where(nan, 0.0, values)
    count = np.add.reduceat((~nan).astype(np.intp), lay.sat_start, axis=1)
    total = mat[:, :, 0].copy()
    for j in range(1, lay.width):
        total += mat[:, :, j]
    for n, rows in lay.wide:
        a = mat[:, rows, :n]
        r = a[:, :, :8].copy()
        stop = n - n % 8
        for i in range(8, stop, 8):
            r += a[:, :, i : i + 8]
        s = ((r[..., 0] + r[..., 1]) + (r[..., 2] + r[..., 3])) + (
            (r[..., 4] + r[..., 5]) + (r[..., 6] + r[..., 7])
        )
        for i in range(stop, n):
            s += a[:, :, i]
        total[:, rows] = s
    with np.errstate(invalid="ignore", divide="ignore"):
        return total / count, count


def _glonass_ext(freq_hz: _F64, sig: npt.NDArray[np.uint16], lay: EncodeLayout) -> _I64:
    """DF419 + 7 per satellite from its first L1/L2 cell with a known frequency, else 15."""
    band = sig // 32
    with np.errstate(invalid="ignore"):
        # GLONASS ICD §3.3.1.1: f = 1602 + 0.5625 k MHz (L1), 1246 + 0.4375 k MHz (L2).
        chan = np.where(
            band == 1,
            np.rint((freq_hz - 1602e6) / 0.5625e6),
            np.rint((freq_hz - 1246e6) / 0.4375e6),
        )
    usable = ((band == 1) | (band == 2)) & ~np.isnan(freq_hz)
    n = freq_hz.shape[0]
    first = np.minimum.reduceat(np.where(usable, np.arange(n), n), lay.sat_start)
    k = chan[np.minimum(first, n - 1)]
    ok = (first < n) & (k >= -7) & (k <= 6) & lay.sat_glo
    return np.where(ok, k + 7, np.where(lay.sat_glo, 15, 0)).astype(np.int64)


def encode_msm(
    epoch: ObsEpoch, *, level: int = 7, station_id: int | None = None, iods: int = 0
) -> list[bytes]:
    """Encode ``epoch`` as MSM4 or MSM7 frames, one per constellation (RTCM 10403.3 §3.5.12).

    Cells whose signal code has no MSM signal id in their system's table are left out. Raises
    ``ValueError`` for another level, a station id over 4095, an IODS outside 0…7, or two cells
    with the same satellite and signal.
    """
    if level not in (4, 7):
        raise ValueError(f"MSM level must be 4 or 7, got {level}")
    sid = max(epoch.station_id if station_id is None else station_id, 0)
    if sid >> 12:
        raise ValueError(f"{sid} does not fit in uint12 (DF003 reference station id)")
    if not 0 <= iods <= 7:
        raise ValueError(f"{iods} does not fit in uint3 (DF409 IODS)")
    lay = encode_layout(epoch.sat, epoch.sig, level)
    if lay is None:
        return []
    cells, cell_sat = lay.cells, lay.cell_sat

    # Rough range (DF397/DF398) and rough rate (DF399) per satellite, fine values per cell.
    pr_ms = epoch.pseudorange_m[cells] / _LIGHT_MS_M
    freq = epoch.freq_hz[cells]
    rr = epoch.range_rate_mps[cells]
    with np.errstate(invalid="ignore", divide="ignore"):
        ph_ms = epoch.phase_cycles[cells] / freq * 1000.0
    mean, count = _group_nanmeans(
        np.stack((pr_ms, ph_ms, rr) if level == 7 else (pr_ms, ph_ms)), lay
    )
    with np.errstate(invalid="ignore", over="ignore"):
        # The phase range stands in where a satellite has no pseudorange.
        rough_q = np.rint(np.where(count[0] == 0, mean[1], mean[0]) * 1024)
        rough = rough_q / 1024
        rough_ok = (rough >= 0) & (rough < 255)
    rough[~rough_ok] = np.nan
    fine_pr = pr_ms - rough[cell_sat]
    fine_ph = ph_ms - rough[cell_sat]
    fine_pr[np.abs(fine_pr) >= _FINE_PR_RANGE_MS] = np.nan
    fine_ph[np.abs(fine_ph) >= _FINE_PH_RANGE_MS] = np.nan
    q = np.where(rough_ok, rough_q, 0.0).astype(np.int64)  # rough range in 2⁻¹⁰ ms

    # Field values by name; SAT_FIELDS / CELL_FIELDS (Tables 3.5-81/82, 3.5-87/88) give the order.
    cn0 = epoch.cn0_dbhz[cells].astype(np.float64)
    values: dict[str, _I64] = {
        "DF397": np.where(rough_ok, q >> 10, 255),  # 255 = invalid
        "DF398": q & 1023,
        "DF420": epoch.half_cycle[cells].astype(np.int64),
    }
    if level == 4:
        cn0_code = np.round(cn0).clip(0, 63)  # ±inf clip to the ends; NaN → 0 below
        values["DF400"] = _fit_signed(fine_pr * 2**24, 15)
        values["DF401"] = _fit_signed(fine_ph * 2**29, 22)
        values["DF402"] = _lock_code(epoch.lock_time_s[cells], _LOCK_DF402_S)
    else:
        rate = np.rint(mean[2])
        values["EXT"] = (
            _glonass_ext(freq, epoch.sig[cells], lay) if lay.any_glo else np.zeros_like(q)
        )
        values["DF399"] = _fit_signed(rate, 14)
        cn0_code = np.round(cn0 * 16).clip(0, 1023)
        values["DF405"] = _fit_signed(fine_pr * 2**29, 20)
        values["DF406"] = _fit_signed(fine_ph * 2**31, 24)
        values["DF407"] = _lock_code(epoch.lock_time_s[cells], _LOCK_DF407_S)
        values["DF404"] = _fit_signed((rr - rate[cell_sat]) * 1e4, 15)
    cn0_code[np.isnan(cn0_code)] = 0.0
    values["DF403"] = values["DF408"] = cn0_code.astype(np.int64)

    # Header (Table 3.5-78): the layout has the message numbers, DF393 and the masks.
    head = lay.head.copy()
    t = epoch.time.total_s
    epoch_field = {k: _epoch_field(SYSTEMS_IN_ORDER[k], t) for k in set(lay.msg_sys)}
    head[:, 1] = sid  # DF003
    head[:, 2] = [epoch_field[k] for k in lay.msg_sys]
    head[:, 4] = iods  # DF409
    fields = (*SAT_FIELDS[level], *CELL_FIELDS[level])
    flat = np.concatenate([head.view(np.int64).ravel(), *(values[f[0]] for f in fields)])
    return lay.frames.frame(lay.pack.pack(flat[lay.perm]))
