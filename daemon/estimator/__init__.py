"""The rolling ionosphere estimator: pure, vectorised, time from the data (STYLE rules 21–23)."""

from ._snapshot import SatelliteFigures, StationSnapshot

__all__ = ["SatelliteFigures", "StationSnapshot"]
