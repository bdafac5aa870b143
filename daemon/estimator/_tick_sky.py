"""The batched tick's sky terms and geometry rows over the joined columns of its stations
(``_tick``): the operations of each station's own path (``Geometry.lookup``'s cached path,
``SkyTerms``, ``StationEstimator._post``) element by element, a column's station position or
time since its orbits a row where that path has a 0-d array, so the same bits
(tests/test_estimator_tick.py)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ._geometry import Cached, Geometry
from ._npfast import count_nonzero as _count_nonzero

if TYPE_CHECKING:
    from ionwarden.parsers import ObsEpoch

    from ._estimator import StationEstimator, _Pre, _Sky
    from ._tick import _Side

__all__ = ["JointGeometry", "joint_sky"]

F64 = npt.NDArray[np.float64]
_ZERO = np.array(0.0)


def joint_sky(
    side: _Side,
    ests: tuple[StationEstimator, ...],
    pres: list[_Pre],
    stec: F64,
) -> list[_Sky | None]:
    """Each station's sky terms (``StationEstimator._post``), computed over the joined columns
    with the operations of ``SkyTerms.mapping``, ``SkyTerms.offsets``, the VTEC and the degrees,
    element by element the same (a column's station position a row instead of a 0-d array);
    None for each when a station has single-frequency satellites or cells out of range (each
    then computes its own)."""
    if not all(p[0].all_dual and p[0].cells_in_range for p in pres):
        return [None] * len(pres)
    d = side.el.shape[0]
    sky = ests[0]._sky  # (its constants are the settings', alike)
    mapping = sky.mapping(side.el)
    geo = np.concatenate([p[1] for p in pres], axis=1)  # el, az, pierce lat, lon (rad)
    pts = np.empty((3, d))
    lon_lat, cos_lat = side.positions()
    sky.offsets_from(lon_lat, cos_lat, geo[2:4], pts[:2])
    vtec = np.divide(stec, mapping, pts[2])
    up = side.el > _ZERO
    if _count_nonzero(up) != d:
        vtec[~up] = np.nan
    deg = np.degrees(geo)
    skies: list[_Sky | None] = []
    for est, o in zip(ests, side.offs, strict=True):
        row0 = deg[0, o]
        blk = est._blk
        assert blk is not None
        # (the station figures' input in C order, as the station's own path makes it)
        skies.append((mapping[o], pts[:, o].copy(), deg[:, o], row0.take(blk.cell_pos)))
    return skies


class JointGeometry:
    """The stations' geometry caches joined (kept while the same caches are used: each
    station's changes at its 30-s refresh)."""

    def __init__(self) -> None:
        #: Whose caches, their rows, rates, orbit times per column, each station's columns.
        self._keep: list[Cached] = []
        self._rows = self._rates = self._t = np.empty(0)
        self._offs: list[slice] = []

    def rows(
        self,
        live: list[tuple[int, StationEstimator, ObsEpoch, float]],
        cached: list[Cached | None],
    ) -> tuple[F64, F64, list[slice]] | None:
        """Every station's geometry rows at the tick's time from its cache (``Geometry.cached``)
        as one (4, D) array, the sin of its elevations and each station's columns: the
        operations of ``Geometry.lookup``'s cached path element by element (a column's time
        since its orbits a row instead of a 0-d array), so the same bits. None when a station
        is not on that path, or the times differ (each then looks its rows up)."""
        if len(live) < 2 or any(c is None for c in cached):
            return None
        t = live[0][3]
        if not all(x[3] == t for x in live):
            return None
        keep = self._keep
        if len(keep) != len(cached) or any(a is not b for a, b in zip(keep, cached, strict=True)):
            sames = [c for c in cached if c is not None]
            widths = [c[3].shape[1] for c in sames]
            self._rates = np.concatenate([c[4] for c in sames], axis=1)
            self._rows = np.concatenate([c[3] for c in sames], axis=1)
            self._t = np.repeat(np.array([c[2] for c in sames]), widths)
            offs, at = [], 0
            for w in widths:
                offs.append(slice(at, at + w))
                at += w
            self._offs = offs
            self._keep = sames
        geo = Geometry.extrapolate(self._rates, np.subtract(t, self._t), self._rows)
        return geo, np.sin(geo[0]), self._offs
