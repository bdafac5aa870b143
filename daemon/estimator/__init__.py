"""The rolling ionosphere estimator: pure, vectorised, time from the data (STYLE rules 21–23)."""

from ._estimator import StationEstimator
from ._pairs import IonoCoefficients, PairTable, band_delays_s, iono_coefficients
from ._pipeline import PipelineOutput, StationPipeline
from ._snapshot import FixStatus, SatelliteFigures, StationSnapshot

__all__ = [
    "FixStatus",
    "IonoCoefficients",
    "PairTable",
    "PipelineOutput",
    "SatelliteFigures",
    "StationEstimator",
    "StationPipeline",
    "StationSnapshot",
    "band_delays_s",
    "iono_coefficients",
]
