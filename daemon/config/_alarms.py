"""The ``[alarms]`` section: thresholds with hysteresis and hold times.

Default thresholds and their origin are documented in docs/alarms.md; values marked "ours" are an
engineering choice for a mid-latitude station, to be tuned to the site.
"""

from __future__ import annotations

from typing import Literal, Self

from pydantic import Field, model_validator

from ._base import Section

__all__ = ["AlarmSettings", "Cn0BaselineSettings", "ThresholdAlarm"]


class ThresholdAlarm(Section):
    """A level alarm: raised when the value stays ≥ ``raise_at`` for ``raise_after_s``, cleared when
    it stays < ``clear_at`` for ``clear_after_s``."""

    enabled: bool = True
    raise_at: float
    clear_at: float
    raise_after_s: float = Field(default=60.0, ge=0.0)
    clear_after_s: float = Field(default=300.0, ge=0.0)
    severity: Literal["advisory", "warning", "severe"] = "warning"

    @model_validator(mode="after")
    def _hysteresis(self) -> Self:
        if self.clear_at > self.raise_at:
            raise ValueError(
                f"clear_at ({self.clear_at}) must not be above raise_at ({self.raise_at})"
            )
        return self


class Cn0BaselineSettings(Section):
    """The station's own C/N0-versus-elevation baseline per band (CN0-drop alarm input)."""

    bin_deg: float = Field(default=5.0, gt=0.0, le=30.0, description="Elevation bin width.")
    time_constant_s: float = Field(default=3600.0, gt=0.0, description="Moving-mean time constant.")
    min_samples: int = Field(default=120, ge=1, description="Epochs before a bin is trusted.")
    min_cells: int = Field(default=3, ge=1, description="Signals of a band needed to judge it.")


class AlarmSettings(Section):
    """Default thresholds and their origin are documented in docs/alarms.md."""

    # ROTI classes 0.25 / 0.5 TECU/min (Pi et al. 1997 scale as usually quoted; from memory).
    roti: ThresholdAlarm = ThresholdAlarm(raise_at=0.5, clear_at=0.25)
    #: Which station ROTI figure the ROTI alarm watches: the median over satellites (default) or
    #: the worst satellite. On the simulator's quiet-day stream the max sits near 0.3 TECU/min
    #: (above the 0.25 clear level, so a max-based alarm never clears) while the median is ~0.13.
    roti_statistic: Literal["max", "median"] = "median"
    # Largest |ROT| over satellites, TECU/min (30 s differences); ours.
    rot: ThresholdAlarm = ThresholdAlarm(
        raise_at=2.0, clear_at=1.0, raise_after_s=30.0, clear_after_s=120.0
    )
    # Station VTEC, TECU: site and solar-cycle dependent; ours, set it from your own climatology.
    vtec: ThresholdAlarm = ThresholdAlarm(raise_at=80.0, clear_at=70.0, severity="advisory")
    # Station VTEC gradient, mm/km of L1 delay: quiet mid-latitude is a few mm/km (common practice).
    gradient: ThresholdAlarm = ThresholdAlarm(raise_at=50.0, clear_at=20.0)
    # Fraction of satellites above the mask with only one band.
    dual_frequency_loss: ThresholdAlarm = ThresholdAlarm(
        raise_at=0.3, clear_at=0.1, raise_after_s=30.0, clear_after_s=120.0
    )
    stall_after_s: float = Field(
        default=30.0, gt=0.0, description="No valid epoch for this long → stream stall."
    )
    # Mean C/N0 drop of a band against the baseline, dB; ours (6 dB = a quarter of the power).
    cn0_drop: ThresholdAlarm = ThresholdAlarm(
        raise_at=6.0, clear_at=3.0, raise_after_s=10.0, clear_after_s=60.0, severity="severe"
    )
    cn0_baseline: Cn0BaselineSettings = Cn0BaselineSettings()
    # GGA fix quality outside the accepted set (NMEA 0183 GGA quality indicator).
    fix_quality: ThresholdAlarm = ThresholdAlarm(
        raise_at=0.5, clear_at=0.5, raise_after_s=10.0, clear_after_s=30.0
    )
    #: GGA qualities that count as healthy (1 GPS, 2 DGPS, 3 PPS, 4 RTK fixed, 5 RTK float).
    fix_accepted_qualities: frozenset[int] = frozenset({1, 2, 3, 4, 5})
    # GGA HDOP; ours (above ~4 is commonly called poor geometry: from memory).
    fix_hdop: ThresholdAlarm = ThresholdAlarm(
        raise_at=4.0, clear_at=2.5, raise_after_s=30.0, clear_after_s=60.0, severity="advisory"
    )
    # GST horizontal 1-σ, m (hypot of latitude and longitude σ); ours, for a standalone receiver.
    fix_sigma: ThresholdAlarm = ThresholdAlarm(
        raise_at=5.0, clear_at=2.0, raise_after_s=30.0, clear_after_s=60.0, severity="advisory"
    )
