"""The ``[estimator]`` section: how the rolling ionosphere estimator works."""

from __future__ import annotations

from pydantic import Field

from ._base import Section

__all__ = ["EstimatorSettings"]


class EstimatorSettings(Section):
    """Estimator parameters (defaults: SCIENCE.md §5–§9, common practice)."""

    shell_height_km: float = Field(
        default=350.0,
        gt=50.0,
        lt=2000.0,
        description="Thin-shell height for pierce points and mapping.",
    )
    elevation_mask_deg: float = Field(
        default=15.0,
        ge=0.0,
        lt=90.0,
        description="Satellites below are tracked but excluded from station figures.",
    )
    rot_interval_s: float = Field(
        default=30.0, gt=0.0, description="ROT difference interval (sliding)."
    )
    roti_window_s: float = Field(
        default=300.0, gt=0.0, description="ROTI standard-deviation window."
    )
    hatch_window_s: float = Field(
        default=100.0, gt=0.0, description="Hatch smoothing window of the iono-free code."
    )
    max_gap_s: float = Field(
        default=15.0, gt=0.0, description="A data gap longer than this starts a new arc."
    )
    #: Frequency pairs per system in order of preference, as "band1-band2" RINEX codes; an
    #: attribute "x" matches any tracking mode of that band.
    pairs: dict[str, list[str]] = Field(
        default_factory=lambda: {
            "G": ["1C-2W", "1C-2L", "1C-2S", "1C-2X", "1C-5Q", "1C-5X"],
            "J": ["1C-2L", "1C-2X", "1C-5Q", "1C-5X"],
            "E": ["1C-5Q", "1C-5X", "1B-5Q", "1X-5X", "1C-7Q", "1X-7X", "1B-7I"],
            "C": ["2I-6I", "2I-7I", "1P-5P", "1X-5X"],
            "R": ["1C-2C", "1C-2P", "1P-2P"],
        }
    )
    #: Satellite differential code biases overriding the broadcast group delays, ns, by satellite
    #: ("G07") and pair ("1C-2W"): the band-1 minus band-2 code delay (the usual sign of published
    #: DCB products, e.g. C1C−C2W), so the satellite part of K·(P2 − P1) is −K·c·DCB.
    satellite_dcb_ns: dict[str, dict[str, float]] = Field(default_factory=dict)
    gap_samples: float = Field(
        default=3.5,
        gt=1.0,
        description="A gap longer than this many sampling intervals also starts a new arc (whichever of this and max_gap_s is longer).",
    )
    slip_mw_k_sigma: float = Field(
        default=5.0,
        gt=0.0,
        description="Melbourne–Wübbena slip test: jump beyond this many running σ.",
    )
    slip_gf_floor_m: float = Field(
        default=0.015,
        gt=0.0,
        description="Geometry-free slip test floor at 1 s sampling in the zenith (m); grows with interval and at low elevation.",
    )
    geometry_refresh_s: float = Field(
        default=30.0,
        gt=0.0,
        description="Recompute orbit geometry when older than this (data time); extrapolated linearly in between. A new broadcast ephemeris takes effect at the next recompute, which waits while new ones arrive (up to twice this).",
    )
    roti_sample_s: float = Field(
        default=1.0,
        gt=0.0,
        description="ROT samples entering ROTI are taken at most once per this interval.",
    )
    roti_min_samples: int = Field(
        default=5, ge=2, description="ROTI needs at least this many ROT samples in its window."
    )
    receiver_bias_memory_s: float = Field(
        default=43_200.0,
        gt=0.0,
        description="Time constant of the receiver-bias estimate's exponential forgetting.",
    )
    receiver_bias_update_s: float = Field(
        default=30.0,
        gt=0.0,
        description="The receiver-bias least squares takes one epoch every this many seconds.",
    )
    receiver_bias_min_arc_s: float = Field(
        default=120.0,
        ge=0.0,
        description="Satellites enter the receiver-bias fit after this long in their arc (levelling has settled).",
    )
