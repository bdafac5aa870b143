"""The rolling ionosphere estimator: pure, vectorised, time from the data (STYLE rules 21–23)."""

from ._snapshot import FixStatus, SatelliteFigures, StationSnapshot

__all__ = ["FixStatus", "SatelliteFigures", "StationSnapshot"]
