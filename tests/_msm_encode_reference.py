"""Frozen copy of the scalar MSM encoder as it was before vectorisation (oracle for tests only).

Byte-for-byte reference for ``tests/test_msm_encode.py``: the runtime encoder in
``parsers/_msm_encode.py`` must produce the same frames for the same epoch. Do not edit.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Final

import numpy as np
import numpy.typing as npt

from ionwarden.parsers._bitio import BitWriter
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._gnsstime import BDS_GPS_OFFSET_S, SECONDS_PER_WEEK, GpsTime, leap_seconds_at
from ionwarden.parsers._msm_tables import (
    CELL_FIELDS,
    LOCK_TIME_DF402_S,
    LOCK_TIME_DF407_S,
    MSM_SYSTEMS,
    SAT_FIELDS,
    SPEED_OF_LIGHT_MPS,
    MsmSystem,
)

if TYPE_CHECKING:
    from ionwarden.parsers._epoch import ObsEpoch

__all__ = ["encode_msm_reference"]

_LIGHT_MS_M: Final = SPEED_OF_LIGHT_MPS / 1000.0
_MAX_CELLS: Final = 64  # RTCM 10403.3 §3.5.12.3: NSat × NSig ≤ 64
_FINE_PR_RANGE_MS: Final = 2.0**-10  # DF400/DF405 span ±2⁻¹⁰ ms
_FINE_PH_RANGE_MS: Final = 2.0**-8  # DF401/DF406 span ±2⁻⁸ ms
_SYSTEM_ORDER: Final = "GRECJSI"


def _system_block(letter: str) -> int:
    return next(block for block, s in MSM_SYSTEMS.items() if s.letter == letter)


def _fit_signed(values: npt.NDArray[np.float64], width: int) -> list[int]:
    """Round to a signed ``width``-bit code; NaN or out of range → the invalid (most negative) code."""
    lo = -(1 << (width - 1))
    out = []
    for v in values.tolist():
        if math.isnan(v):
            out.append(lo)
            continue
        code = round(v)
        out.append(code if lo < code <= -lo - 1 else lo)
    return out


def _lock_code(lock_s: npt.NDArray[np.float32], table: npt.NDArray[np.float32]) -> list[int]:
    """Largest indicator whose minimum lock time does not exceed the lock time (NaN → 0)."""
    valid = np.nan_to_num(table, nan=np.inf)
    times = np.nan_to_num(lock_s.astype(np.float64), nan=0.0)
    return (np.searchsorted(valid, times, side="right") - 1).clip(0).tolist()  # type: ignore[no-any-return]


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


def _encode_one(
    epoch: ObsEpoch,
    system: MsmSystem,
    *,
    level: int,
    cells: npt.NDArray[np.intp],
    sig_ids: dict[int, int],
    multiple: bool,
    station_id: int,
    iods: int,
) -> bytes:
    sat = epoch.sat[cells]
    sat_bits = sorted({int(s) - system.sat_base for s in sat.tolist()})
    used_sig = sorted({sig_ids[int(g)] for g in epoch.sig[cells].tolist()})
    nsat, nsig = len(sat_bits), len(used_sig)
    sat_pos = {b: i for i, b in enumerate(sat_bits)}
    sig_pos = {g: i for i, g in enumerate(used_sig)}
    cell_idx = np.array(
        [
            sat_pos[int(s) - system.sat_base] * nsig + sig_pos[sig_ids[int(g)]]
            for s, g in zip(sat.tolist(), epoch.sig[cells].tolist(), strict=True)
        ],
        np.intp,
    )
    order = np.argsort(cell_idx, kind="stable")
    cells, cell_idx = cells[order], cell_idx[order]
    cell_sat = cell_idx // nsig

    pr_ms = epoch.pseudorange_m[cells] / _LIGHT_MS_M
    with np.errstate(invalid="ignore", divide="ignore"):
        ph_ms = epoch.phase_cycles[cells] / epoch.freq_hz[cells] * 1000.0
    rough = np.full(nsat, np.nan)
    rate = np.full(nsat, np.nan)
    for k in range(nsat):
        mine = cell_sat == k
        base = pr_ms[mine]
        if np.isnan(base).all():
            base = ph_ms[mine]
        if not np.isnan(base).all():
            rough[k] = round(float(np.nanmean(base)) * 1024) / 1024
        rr = epoch.range_rate_mps[cells][mine]
        if not np.isnan(rr).all():
            rate[k] = round(float(np.nanmean(rr)))
    rough_ok = ~np.isnan(rough) & (rough >= 0) & (rough < 255)
    rough[~rough_ok] = np.nan
    fine_pr = pr_ms - rough[cell_sat]
    fine_ph = ph_ms - rough[cell_sat]
    fine_pr[np.abs(fine_pr) >= _FINE_PR_RANGE_MS] = np.nan
    fine_ph[np.abs(fine_ph) >= _FINE_PH_RANGE_MS] = np.nan

    w = BitWriter()
    w.u(12, system.base + level - 1).u(12, station_id)  # DF002, DF003
    w.u(30, _epoch_field(system, epoch.time.total_s))
    w.u(1, int(multiple)).u(3, iods).u(7, 0).u(2, 0).u(2, 0).u(1, 0).u(3, 0)  # DF393…DF418
    satmask = sum(1 << (64 - b) for b in sat_bits)
    sigmask = sum(1 << (32 - g) for g in used_sig)
    w.u(64, satmask).u(32, sigmask)
    cellmask = sum(1 << (nsat * nsig - 1 - int(c)) for c in cell_idx.tolist())
    w.u(nsat * nsig, cellmask)

    sat_values: dict[str, list[int]] = {
        "DF397": [255 if math.isnan(r) else int(r) for r in rough.tolist()],
        "DF398": [0 if math.isnan(r) else round((r - int(r)) * 1024) for r in rough.tolist()],
        "DF399": _fit_signed(rate, 14),
        "EXT": [0] * nsat,
    }
    if system.letter == "R":
        ext = []
        for k in range(nsat):
            f = epoch.freq_hz[cells][(cell_sat == k)]
            sg = epoch.sig[cells][(cell_sat == k)] // 32
            chans = [
                round((fv - 1602e6) / 0.5625e6) if b == 1 else round((fv - 1246e6) / 0.4375e6)
                for fv, b in zip(f.tolist(), sg.tolist(), strict=True)
                if b in (1, 2) and not math.isnan(fv)
            ]
            ext.append(chans[0] + 7 if chans and -7 <= chans[0] <= 6 else 15)
        sat_values["EXT"] = ext
    rate_fine = epoch.range_rate_mps[cells] - rate[cell_sat]
    cn0 = epoch.cn0_dbhz[cells].astype(np.float64)
    if level == 4:
        cn0_code = np.nan_to_num(np.round(cn0), nan=0.0).clip(0, 63)
        lock_code = _lock_code(epoch.lock_time_s[cells], LOCK_TIME_DF402_S)
        fine = {"DF400": (fine_pr, 2**24, 15), "DF401": (fine_ph, 2**29, 22)}
    else:
        cn0_code = np.nan_to_num(np.round(cn0 * 16), nan=0.0).clip(0, 1023)
        lock_code = _lock_code(epoch.lock_time_s[cells], LOCK_TIME_DF407_S)
        fine = {"DF405": (fine_pr, 2**29, 20), "DF406": (fine_ph, 2**31, 24)}
    cell_values: dict[str, list[int]] = {
        name: _fit_signed(v * scale, width) for name, (v, scale, width) in fine.items()
    }
    cell_values["DF402"] = cell_values["DF407"] = lock_code
    cell_values["DF420"] = epoch.half_cycle[cells].astype(int).tolist()
    cell_values["DF403"] = cell_values["DF408"] = cn0_code.astype(int).tolist()
    cell_values["DF404"] = _fit_signed(rate_fine * 1e4, 15)

    for name, width, is_signed in SAT_FIELDS[level]:
        for v in sat_values[name]:
            w.s(width, v) if is_signed else w.u(width, v)
    for name, width, is_signed in CELL_FIELDS[level]:
        for v in cell_values[name]:
            w.s(width, v) if is_signed else w.u(width, v)
    return frame_rtcm(w.to_bytes())


def encode_msm_reference(
    epoch: ObsEpoch, *, level: int = 7, station_id: int | None = None, iods: int = 0
) -> list[bytes]:
    """Encode ``epoch`` as MSM4 or MSM7 frames, one per constellation (RTCM 10403.3 §3.5.12).

    Cells whose signal code has no MSM signal id in their system's table are left out.
    """
    if level not in (4, 7):
        raise ValueError(f"MSM level must be 4 or 7, got {level}")
    sid = epoch.station_id if station_id is None else station_id
    sid = max(sid, 0)
    jobs: list[tuple[MsmSystem, npt.NDArray[np.intp], dict[int, int]]] = []
    sys_idx = epoch.sat.astype(np.intp) // 100
    for letter in _SYSTEM_ORDER:
        system = MSM_SYSTEMS[_system_block(letter)]
        sig_ids = {int(code): i for i, code in enumerate(system.signals.tolist()) if code}
        mine = np.flatnonzero(
            (sys_idx == _SYSTEM_ORDER.index(letter))
            & np.isin(epoch.sig, list(sig_ids))
            & (epoch.sat.astype(np.intp) - system.sat_base >= 1)
            & (epoch.sat.astype(np.intp) - system.sat_base <= 64)
        )
        if mine.size == 0:
            continue
        nsig = len({sig_ids[int(g)] for g in epoch.sig[mine].tolist()})
        sats = sorted(set(epoch.sat[mine].tolist()))
        per_msg = max(1, _MAX_CELLS // nsig)
        for start in range(0, len(sats), per_msg):
            chunk = np.isin(epoch.sat[mine], sats[start : start + per_msg])
            jobs.append((system, mine[chunk], sig_ids))
    return [
        _encode_one(
            epoch,
            system,
            level=level,
            cells=cells,
            sig_ids=sig_ids,
            multiple=i < len(jobs) - 1,
            station_id=sid,
            iods=iods,
        )
        for i, (system, cells, sig_ids) in enumerate(jobs)
    ]
