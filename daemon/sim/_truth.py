"""Truth tables (CSV) for tests and for judging the estimator.

* ``truth``: one row per station × epoch × satellite above the horizon. Columns are listed in
  :data:`TRUTH_COLUMNS`; ``slip_signals`` lists the RINEX codes that slipped (or started a new arc)
  at that epoch, space-separated. Time is the receiver's epoch tag (GPS week and seconds of week).
* ``biases``: constant per station × satellite × signal (satellite and receiver code biases, m).
* ``gradients``: per epoch × common satellite × (first station, other station): the difference of
  the first-order L1 delay and its gradient over the baseline (SCIENCE.md §8).

Formatting is pure: functions take arrays and return text.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.parsers import sat_name, signal_name

if TYPE_CHECKING:
    import numpy.typing as npt

    from ._observe import SimBlock

__all__ = [
    "BIAS_COLUMNS",
    "GRADIENT_COLUMNS",
    "TRUTH_COLUMNS",
    "format_biases",
    "format_gradients",
    "format_truth",
]

C_MPS = 299_792_458.0
TRUTH_COLUMNS = (
    "station", "week", "tow_s", "sat", "az_deg", "el_deg", "ipp_lat_deg", "ipp_lon_deg",
    "stec_tecu", "vtec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "iono_l1_m", "range_m", "sat_clock_m",
    "rx_clock_m", "tropo_m", "if_expected_m", "n_signals", "slip_signals", "in_stream",
)  # fmt: skip
BIAS_COLUMNS = ("station", "sat", "signal", "freq_hz", "sat_bias_m", "rx_bias_m")
GRADIENT_COLUMNS = (
    "week", "tow_s", "sat", "base", "rover", "baseline_km", "el_deg",
    "delta_iono_l1_m", "gradient_mm_per_km", "delta_vtec_tecu",
)  # fmt: skip


def _fmt(values: npt.NDArray[np.float64], decimals: int) -> list[str]:
    return [("" if math.isnan(v) else f"{v:.{decimals}f}") for v in values.tolist()]


def format_truth(block: SimBlock, station: str, header: bool = False) -> str:
    """Truth rows of one block (satellites above the horizon at each epoch)."""
    g = block.geometry
    rows = np.nonzero(g.el_rad > 0.0)
    e_i, s_i = rows
    if e_i.size == 0:
        return ",".join(TRUTH_COLUMNS) + "\n" if header else ""
    week = g.week[e_i]
    tow = g.tow_s[e_i]
    names = [sat_name(int(x)) for x in block.sat.tolist()]
    slip_txt = [""] * e_i.size
    slipped = block.slipped[e_i, s_i]
    for r in np.flatnonzero(slipped.any(axis=1)).tolist():
        codes = block.code[s_i[r]][slipped[r]]
        slip_txt[r] = " ".join(signal_name(int(c)) for c in codes.tolist())
    cols: list[list[str]] = [
        [station] * e_i.size,
        [str(w) for w in week.tolist()],
        _fmt(tow, 3),
        [names[s] for s in s_i.tolist()],
        _fmt(np.degrees(g.az_rad[rows]), 3),
        _fmt(np.degrees(g.el_rad[rows]), 3),
        _fmt(np.degrees(g.ipp_lat_rad[rows]), 4),
        _fmt(np.degrees(g.ipp_lon_rad[rows]), 4),
        _fmt(g.stec_tecu[rows], 4),
        _fmt(g.vtec_tecu[rows], 4),
        _fmt(g.rot_tecu_per_min[rows], 4),
        _fmt(g.roti_tecu_per_min[rows], 4),
        _fmt(block.iono_m[e_i, s_i, 0], 4),
        _fmt(g.range_m[rows], 4),
        _fmt(C_MPS * g.sat_clock_s[rows], 4),
        _fmt(C_MPS * g.rx_clock_s[e_i], 4),
        _fmt(g.tropo_m[rows], 4),
        _fmt(block.if_expected_m[rows], 4),
        [str(n) for n in block.present[e_i, s_i].sum(axis=1).tolist()],
        slip_txt,
        [str(int(x)) for x in block.in_stream[e_i].tolist()],
    ]
    lines = [",".join(parts) for parts in zip(*cols, strict=True)]
    text = "\n".join(lines) + "\n"
    return (",".join(TRUTH_COLUMNS) + "\n" + text) if header else text


def format_biases(
    station: str,
    *,
    sat: npt.NDArray[np.int16],
    code: npt.NDArray[np.uint16],
    freq_hz: npt.NDArray[np.float64],
    sat_bias_m: npt.NDArray[np.float64],
    rx_bias_m: npt.NDArray[np.float64],
    header: bool = True,
) -> str:
    """Code biases of every satellite × signal ((S, K) arrays; constant over a run)."""
    out = [",".join(BIAS_COLUMNS)] if header else []
    for s, sid in enumerate(sat.tolist()):
        for k, c in enumerate(code[s].tolist()):
            if c == 0 or not math.isfinite(freq_hz[s, k]):
                continue
            out.append(
                f"{station},{sat_name(sid)},{signal_name(c)},{freq_hz[s, k]:.1f},"
                f"{sat_bias_m[s, k]:.4f},{rx_bias_m[s, k]:.4f}"
            )
    return "\n".join(out) + "\n"


def format_gradients(
    base: SimBlock,
    rover: SimBlock,
    *,
    base_name: str,
    rover_name: str,
    baseline_km: float,
    header: bool = False,
) -> str:
    """Between-station truth for satellites above the mask at both stations."""
    gb, gr = base.geometry, rover.geometry
    common, ib, ir = np.intersect1d(base.sat, rover.sat, return_indices=True)
    if common.size == 0:
        return ",".join(GRADIENT_COLUMNS) + "\n" if header else ""
    vis = (gb.el_rad[:, ib] > 0.0) & (gr.el_rad[:, ir] > 0.0)
    e_i, c_i = np.nonzero(vis)
    d_iono = rover.iono_m[e_i, ir[c_i], 0] - base.iono_m[e_i, ib[c_i], 0]
    d_vtec = gr.vtec_tecu[e_i, ir[c_i]] - gb.vtec_tecu[e_i, ib[c_i]]
    week = gb.week[e_i]
    tow = gb.tow_s[e_i]
    names = [sat_name(int(x)) for x in common.tolist()]
    cols: list[list[str]] = [
        [str(w) for w in week.tolist()],
        _fmt(tow, 3),
        [names[c] for c in c_i.tolist()],
        [base_name] * e_i.size,
        [rover_name] * e_i.size,
        [f"{baseline_km:.3f}"] * e_i.size,
        _fmt(np.degrees(gb.el_rad[e_i, ib[c_i]]), 3),
        _fmt(d_iono, 4),
        _fmt(d_iono * 1000.0 / baseline_km, 3),
        _fmt(d_vtec, 4),
    ]
    text = "\n".join(",".join(p) for p in zip(*cols, strict=True)) + "\n"
    return (",".join(GRADIENT_COLUMNS) + "\n" + text) if header else text
