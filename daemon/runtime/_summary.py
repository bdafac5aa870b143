"""Human-readable lines, pure: the per-station summary ``ionwarden run`` prints and the systemd
``STATUS=`` text. Both read :class:`StationStatistics` only and never invent a figure: what is not
known yet is shown as ``-``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from ._station_records import StationState

if TYPE_CHECKING:
    from collections.abc import Sequence

    from ._station_records import StationStatistics

__all__ = ["format_status", "format_summary"]

#: systemd shows STATUS= in one line of `systemctl status`; keep it readable.
MAX_STATUS_CHARS = 240


def _num(x: float, fmt: str) -> str:
    return "-" if x is None or not math.isfinite(x) else format(x, fmt)


def _bytes(n: int) -> str:
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000  # type: ignore[assignment]
    return f"{n} B"  # pragma: no cover


def format_summary(s: StationStatistics, *, epoch_rate_hz: float | None = None) -> str:
    """One line per station: state, then the latest station figures, then stream health."""
    detail = s.detail if len(s.detail) <= 40 else s.detail[:39] + "…"
    state = s.state.value + (
        f"({detail})" if detail and s.state is not StationState.STREAMING else ""
    )
    parts = [f"{s.station:<12}", f"{state:<22}"]
    snap = s.latest
    if snap is not None:
        t = snap.time.to_utc().strftime("%H:%M:%S")
        parts += [
            f"{t} UTC",
            f"sats {snap.n_sats:2d}",
            f"VTEC {_num(snap.vtec_tecu, '5.1f')} TECU",
            f"ROTI max {_num(snap.roti_max_tecu_per_min, '.2f')} TECU/min",
            f"grad {_num(snap.gradient_mm_per_km, '.1f')} mm/km",
            f"dual {_num(100 * snap.dual_freq_fraction, '.0f')}%",
        ]
    else:
        parts.append("no epoch yet")
    d = s.decoder
    rate = f" ({epoch_rate_hz:.1f}/s)" if epoch_rate_hz is not None else ""
    parts += [
        f"epochs {s.epochs_total}{rate}",
        f"frames {d.frames_total}",
        f"crc-fail {d.crc_errors_total}",
        f"skipped {_bytes(d.discarded_bytes_total)}",
        f"in {_bytes(s.bytes_total)}",
    ]
    if s.queue.dropped_total:
        parts.append(f"queue-drops {s.queue.dropped_total}")
    if s.reconnects_total:
        parts.append(f"reconnects {s.reconnects_total}")
    if s.pipeline_errors_total:
        parts.append(f"pipeline-errors {s.pipeline_errors_total}")
    return "  ".join(parts)


def format_status(stations: Sequence[StationStatistics]) -> str:
    """The systemd STATUS= text: how many stations stream, then each one that does not, and why."""
    if not stations:
        return "no stations configured"
    ok = [s for s in stations if s.state is StationState.STREAMING]
    text = f"{len(ok)}/{len(stations)} stations streaming"
    bad = [
        f"{s.station} {s.state.value}" + (f" ({s.detail})" if s.detail else "")
        for s in stations
        if s.state is not StationState.STREAMING
    ]
    if bad:
        text += "; " + "; ".join(bad)
    if len(text) > MAX_STATUS_CHARS:
        text = text[: MAX_STATUS_CHARS - 1] + "…"
    return text.replace("\n", " ")
