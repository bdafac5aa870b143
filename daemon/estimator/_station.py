"""Station-level figures from the per-satellite ones: weighted VTEC, ROTI summary, VTEC gradient.

Axes: ``m`` satellites above the elevation mask with a value. Weights sin²(el) (common practice:
low satellites carry more mapping error and multipath). The gradient is the slope of a weighted
least-squares plane VTEC = v0 + g_e·x + g_n·y over the pierce points, x/y their east/north offsets
from the station on the shell (km); it needs at least 4 pierce points.
"""

# size: ~440 lines keep the station figures, their kept selections and the plane fit in one place.
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ionwarden.daemon._records import fast_constructor
from ionwarden.daemon.geo import DEFAULT_EARTH_RADIUS_M

from ._npfast import count_nonzero as _count_nonzero

__all__ = [
    "GPS_L1_M_PER_TECU",
    "FitScratch",
    "SkyTerms",
    "StationFigures",
    "StationValues",
    "pierce_offsets_km",
    "station_figures",
    "station_values",
]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
#: L1 group delay of 1 TECU: 40.3·10¹⁶/(1575.42 MHz)² = 0.16237 m (SCIENCE.md §2, IS-GPS-200 L1).
GPS_L1_M_PER_TECU = 40.3e16 / 1575.42e6**2
_ZERO = np.array(0.0)
_NAN = np.array(np.nan)
#: Elevation masks (rad) as 0-d arrays (a Python float operand costs a conversion per call).
_MASKS: dict[float, npt.NDArray[np.float64]] = {}


@dataclass(frozen=True, slots=True)
class StationFigures:
    vtec_tecu: float
    roti_max: float
    roti_median: float
    rot_max_abs: float
    gradient_tecu_per_km: float
    gradient_mm_per_km: float
    gradient_azimuth_deg: float


_new_station_figures = fast_constructor(StationFigures)


class FitScratch:
    """Outputs of :func:`station_values`' numpy calls, kept by each estimator (a given output
    costs less than a new array and, for the weighted means, the ``[:, None]`` view): the sum
    of the weights (0-d), the weighted means of x, y, VTEC as a column (and flat: the
    matrix-vector product writes them), and the plane fit's 3 × 3 sums (and flat: one list).
    Per estimator, not per module: BLAS calls release the GIL. Copies and pickles are new
    scratch (a copied view would be an independent array; every buffer is written before it is
    read)."""

    __slots__ = ("flags", "means", "means_flat", "selection", "sums", "sums_flat", "w_sum")

    def __init__(self) -> None:
        self.w_sum = np.array(0.0)
        self.means = np.empty((3, 1))
        self.means_flat = self.means[:, 0]  # (contiguous)
        self.sums = np.empty((3, 3))
        self.sums_flat = self.sums.reshape(9)
        #: (2, m) "above the mask" and "VTEC finite" of the epoch, with its two rows.
        both = np.empty((2, 0), np.bool_)
        self.flags: tuple[npt.NDArray[np.bool_], ...] = (both, both[0], both[1])
        #: The selections of the last flags seen (None: none yet; see :meth:`select`).
        self.selection: _Selection | None = None

    def __reduce__(self) -> tuple[type[FitScratch], tuple[()]]:
        return FitScratch, ()

    def forget(self) -> None:
        """Drop the kept selection (the next :meth:`select` builds it again)."""
        self.selection = None

    def select(self, el_rad: F64, mask: F64, vtec: F64) -> _Selection:
        """The selections of the satellites above ``mask`` (rad, 0-d) and of those with a finite
        VTEC among them: the same object while those flags repeat, as they do epoch after epoch
        (the flags' bytes are the key: two calls and a comparison instead of the index arrays'
        four to six)."""
        m = el_rad.shape[0]
        flags = self.flags
        if flags[0].shape[1] != m:
            both = np.empty((2, m), np.bool_)
            self.flags = flags = (both, both[0], both[1])
        np.greater_equal(el_rad, mask, flags[1])
        np.isfinite(vtec, flags[2])
        key = flags[0].tobytes()
        sel = self.selection
        if sel is None or sel.key != key:
            self.selection = sel = _Selection(key, flags[1], flags[2])
        return sel


class _Selection:
    """Index arrays of one epoch's flags (rows of :meth:`FitScratch.select`), as the general path
    of :func:`station_values` computes them when no elevation is NaN: ``i_above`` the satellites
    at or above the mask (None: all), ``i_use`` those of them with a finite VTEC (None: all),
    ``n_use`` their number, and ``fit_flat`` (k, 3) the flat indices of their pierce-point
    columns in a (3, m) array (None with ``i_use``): ``xyv.take(fit_flat).T`` is
    ``np.asfortranarray(xyv.take(i_use, axis=1))``, the same values in the same memory order in
    one call. Private and writeable (``take`` copies a read-only index array)."""

    __slots__ = ("fit_flat", "i_above", "i_use", "key", "n_use")

    def __init__(
        self, key: bytes, above: npt.NDArray[np.bool_], fin: npt.NDArray[np.bool_]
    ) -> None:
        m = above.shape[0]
        self.key = key
        nz = above.nonzero()[0]
        n_above = nz.shape[0]
        self.i_above: Idx | None = None if n_above == m else nz
        if np.count_nonzero(fin) == m:
            self.i_use, self.n_use = self.i_above, n_above
        else:
            self.i_use = (fin & above).nonzero()[0]
            self.n_use = int(self.i_use.shape[0])
        self.fit_flat: Idx | None = None
        if self.i_use is not None:
            self.fit_flat = self.i_use[:, None] + m * np.arange(3, dtype=np.intp)


def pierce_offsets_km(
    lat_rad: float, lon_rad: float, ipp_lat_rad: F64, ipp_lon_rad: F64, shell_height_m: float
) -> tuple[F64, F64]:
    """East/north offsets (km) of pierce points from the station's zenith on the shell."""
    r_km = (DEFAULT_EARTH_RADIUS_M + shell_height_m) / 1000.0
    dlon = (ipp_lon_rad - lon_rad + np.pi) % (2.0 * np.pi) - np.pi
    return r_km * dlon * math.cos(lat_rad), r_km * (ipp_lat_rad - lat_rad)


class SkyTerms:
    """Per-epoch functions of the geometry with in-place operations and 0-d constants (a Python
    float operand costs a conversion per numpy call): the same operations, in the same order, as
    :func:`~ionwarden.daemon.geo.mapping_factor` and :func:`pierce_offsets_km` (bit-identical)."""

    def __init__(self, shell_height_m: float) -> None:
        r = DEFAULT_EARTH_RADIUS_M
        self._r = np.array(r)
        self._r_shell = np.array(r + shell_height_m)
        self._r_km = np.array((r + shell_height_m) / 1000.0)
        self._one = np.array(1.0)
        self._pi = np.array(np.pi)
        self._two_pi = np.array(2.0 * np.pi)
        self._lon = math.nan  # station (rad)
        self._lat = math.nan
        self._lon_lat = np.full((2, 1), np.nan)  # the same as a column
        self._cos_lat = np.array(np.nan)
        #: The station figures' scratch outputs (:func:`station_values`).
        self.scratch = FitScratch()

    def mapping(self, el_rad: F64) -> F64:
        """M(el) = 1/√(1 − (R·cos el/(R + h))²) (SCIENCE.md §6)."""
        s = np.cos(el_rad)
        s *= self._r
        s /= self._r_shell
        s *= s
        np.subtract(self._one, s, s)  # ``out`` positional: a keyword costs a parse per call
        np.sqrt(s, s)
        out: F64 = np.divide(self._one, s, s)
        return out

    def offsets(self, lat_rad: float, lon_rad: float, ipp_lat_lon: F64, out: F64) -> None:
        """East/north offsets (km) of the pierce points (rows lat, lon) into ``out`` (rows x,
        y)."""
        if not (self._lon == lon_rad and self._lat == lat_rad):
            self._lon, self._lat = lon_rad, lat_rad
            self._lon_lat = np.array([[lon_rad], [lat_rad]])
            self._cos_lat = np.array(math.cos(lat_rad))
        self.offsets_from(self._lon_lat, self._cos_lat, ipp_lat_lon, out)

    def offsets_from(self, lon_lat: F64, cos_lat: F64, ipp_lat_lon: F64, out: F64) -> None:
        """:meth:`offsets` from the station's (lon, lat) as a (2, 1) column and cos(lat) 0-d,
        or, for several stations' pierce points side by side (the batched tick), each column's
        station (lon, lat) as (2, n) rows and cos(lat) as a row: the same operations on each
        element."""
        np.subtract(ipp_lat_lon[::-1], lon_lat, out)  # rows lon, lat
        dlon = out[0]
        dlon += self._pi
        dlon %= self._two_pi
        dlon -= self._pi
        out *= self._r_km
        dlon *= cos_lat


def station_figures(
    *, el_rad: F64, sin_el: F64, el_known: bool, pts: F64, rot: F64, roti: F64, mask_rad: float
) -> StationFigures:
    """Station summary over satellites at or above ``mask_rad`` (:func:`station_values`)."""
    v = station_values(
        el_rad=el_rad, sin_el=sin_el, el_known=el_known, pts=pts, rot=rot, roti=roti,
        mask_rad=mask_rad, scratch=FitScratch(),
    )  # fmt: skip
    return _new_station_figures(
        vtec_tecu=v[0],
        roti_max=v[1],
        roti_median=v[2],
        rot_max_abs=v[3],
        gradient_tecu_per_km=v[4],
        gradient_mm_per_km=v[5],
        gradient_azimuth_deg=v[6],
    )


#: The fields of :class:`StationFigures`, in their order.
StationValues = tuple[float, float, float, float, float, float, float]


def station_values(  # noqa: PLR0917 - called positionally: a keyword costs ~600 instructions
    el_rad: F64, sin_el: F64, el_known: bool, pts: F64, rot: F64, roti: F64, mask_rad: float,
    scratch: FitScratch,
) -> StationValues:  # fmt: skip
    """Station summary over satellites at or above ``mask_rad`` (all when elevation is unknown):
    the fields of :class:`StationFigures` as a tuple (the estimator reads them once: building
    the record cost more than it saved).

    ``sin_el`` is sin(el_rad); ``el_known``: no elevation is NaN (and the pierce points are
    known); ``pts`` (3, m): pierce-point offsets x, y (km; x and y from the same pierce point)
    and VTEC of each satellite.
    """
    m = el_rad.shape[0]
    assert pts.shape == (3, m), (pts.shape, m)
    assert rot.shape == roti.shape == (m,), (rot.shape, roti.shape, m)
    mask = _MASKS.get(mask_rad)
    if mask is None:
        if len(_MASKS) >= 8:
            _MASKS.clear()
        _MASKS[mask_rad] = mask = np.array(mask_rad)
    if el_known and mask_rad >= 0.0:
        return _known_values(sin_el, pts, rot, roti, scratch.select(el_rad, mask, pts[2]), scratch)
    # Selections as index arrays (None: every satellite): a take costs a fraction of a boolean
    # subscript and gives the same values in the same order; nonzero() counts them too.
    above = el_rad >= mask
    nz = above.nonzero()[0]
    n_above = nz.shape[0]
    w = None  # weights of every satellite, if needed (else computed for the selected ones)
    if not (n_above or el_known or np.count_nonzero(np.isfinite(el_rad))):
        # No elevation known: every satellite counts, with weight 1.
        above = np.ones(m, np.bool_)
        n_above = m
        w = np.ones(m)
    elif not mask_rad >= 0.0:
        # sin(max(el, 0)) = max(sin el, 0) for el in [−90°, 90°]
        w = np.maximum(sin_el, _ZERO)
        w *= w
    # Else weights are read only above the mask (el in [0°, 90°]), where max(sin el, 0)² = sin²el
    # (−0.0² = +0.0): squared after selecting.
    i_above = None if n_above == m else nz

    # ``use``: above the mask with a finite VTEC; ``wu``, ``vu``: their weights and VTEC, the
    # VTEC a separate array (a dot product's rounding can depend on where its operands start,
    # so it stays the one the general path uses: ``vtec[use]``, or ``vtec`` if all are used).
    # The weights of the VTEC mean are the plane fit's too unless an x is NaN.
    vtec = pts[2]
    if el_known:  # pierce points of known elevations are finite: x, y are
        # ``use`` is ``above`` unless a VTEC is not finite, which one isfinite over all of them
        # tells: satellites with an unknown STEC (on the simulator's quiet day, three GLONASS
        # ones without a bias) have a NaN VTEC every epoch, and finding that out from a NaN
        # weighted sum, as before, cost that sum and its operands twice.
        fin = np.isfinite(vtec)
        if _count_nonzero(fin) == m:
            i_use, n_use = i_above, n_above
        else:
            np.logical_and(fin, above, fin)
            i_use = fin.nonzero()[0]
            n_use = i_use.shape[0]
        vu = vtec if i_use is None else vtec.take(i_use)
        wu = _weights(sin_el, w, i_use)
        wu_sum = np.add.reduce(wu, 0, None, out=scratch.w_sum)  # wu.sum(), 0-d (tested)
        dot = wu.dot(vu)  # ndarray.dot runs the BLAS call of ``@`` (tested)
        fit_is_use = True
    else:
        fin = np.isfinite(pts[::2])
        np.logical_and(fin, above, out=fin)  # rows: x finite, VTEC finite (use); above the mask
        use = fin[1]
        i_use = use.nonzero()[0]
        n_use = i_use.shape[0]
        fit_is_use = np.count_nonzero(fin) - n_use == n_above  # every x above the mask finite
        if n_use == m:
            i_use = None
        vu = vtec if i_use is None else vtec.take(i_use)
        wu = _weights(sin_el, w, i_use)
        wu_sum = np.add.reduce(wu, 0, None, out=scratch.w_sum)
        dot = wu.dot(vu)
    vtec_st = math.nan
    if n_use:  # Python floats divide as numpy's do, but raise on a zero sum: numpy's NaN then
        s_w = float(wu_sum)
        vtec_st = float(dot) / s_w if s_w else float(dot / wu_sum)
    roti_max, roti_med = _max_median(roti, i_above)
    rot_max = _max_abs(rot, i_above)

    g_t = g_mm = g_az = math.nan
    if fit_is_use:
        i_fit, n_fit = i_use, n_use
    else:
        i_fit = (use & fin[0]).nonzero()[0]
        n_fit = i_fit.shape[0]
    if n_fit >= 4:
        if i_fit is None:  # every satellite
            ge, gn = _plane_slopes(scratch, wu, pts, wu_sum)
        elif n_fit == n_use:  # fit is use: the weights and their sum of the VTEC mean
            ge, gn = _plane_slopes(scratch, wu, _columns(pts, i_fit), wu_sum, own=True)
        else:
            w_fit = _weights(sin_el, w, i_fit)
            ge, gn = _plane_slopes(scratch, w_fit, _columns(pts, i_fit), own=True)
        if math.isfinite(ge):
            g_t = math.hypot(ge, gn)
            g_mm = g_t * GPS_L1_M_PER_TECU * 1000.0
            g_az = math.degrees(math.atan2(ge, gn)) % 360.0
    return vtec_st, roti_max, roti_med, rot_max, g_t, g_mm, g_az


def _known_values(  # noqa: PLR0917 - the per-epoch path: positional
    sin_el: F64, pts: F64, rot: F64, roti: F64, sel: _Selection, scratch: FitScratch
) -> StationValues:
    """:func:`station_values` when no elevation is NaN and the mask is not negative (weights
    sin²el of the selected satellites): its ``el_known`` path with the selections ``sel`` kept
    while they repeat, the same operations on the same operands otherwise."""
    i_use, n_use = sel.i_use, sel.n_use
    vtec = pts[2]
    vu = vtec if i_use is None else vtec.take(i_use)
    wu = _weights(sin_el, None, i_use)
    wu_sum = np.add.reduce(wu, 0, None, out=scratch.w_sum)  # wu.sum(), 0-d (tested)
    dot = wu.dot(vu)  # ndarray.dot runs the BLAS call of ``@`` (tested)
    vtec_st = math.nan
    if n_use:  # Python floats divide as numpy's do, but raise on a zero sum: numpy's NaN then
        s_w = float(wu_sum)
        vtec_st = float(dot) / s_w if s_w else float(dot / wu_sum)
    i_above = sel.i_above
    roti_max, roti_med = _max_median(roti, i_above)
    rot_max = _max_abs(rot, i_above)
    g_t = g_mm = g_az = math.nan
    if n_use >= 4:
        if sel.fit_flat is None:  # every satellite
            ge, gn = _plane_slopes(scratch, wu, pts, wu_sum)
        else:  # the weights and their sum of the VTEC mean; the columns in Fortran order
            ge, gn = _plane_slopes(scratch, wu, pts.take(sel.fit_flat).T, wu_sum, True)
        if math.isfinite(ge):
            g_t = math.hypot(ge, gn)
            g_mm = g_t * GPS_L1_M_PER_TECU * 1000.0
            g_az = math.degrees(math.atan2(ge, gn)) % 360.0
    return vtec_st, roti_max, roti_med, rot_max, g_t, g_mm, g_az


def _max_median(roti: F64, idx: Idx | None) -> tuple[float, float]:
    """Largest and median finite ``roti`` of the satellites ``idx`` (all if None).

    Sorted before the non-finite values are dropped (NaN sorts last): the finite values come out
    in the order the filter-then-sort of the general path gives (values equal as floats are equal
    bit for bit, once no zero can be −0.0 beside +0.0); otherwise that general path runs.
    """
    if idx is None:
        r = np.sort(roti)
    else:
        r = roti.take(idx)
        r.sort()
    n = r.size
    if n and not (math.isfinite(r.item(0)) and math.isfinite(r.item(n - 1))):
        if math.isnan(r.item(0)):  # NaN sorts last: all are NaN (the ROT lag is filling)
            return math.nan, math.nan
        n = int(r.searchsorted(_NAN))  # (the method: np.searchsorted wraps it)
        r = r[:n]
        if n and not (r.item(0) > 0.0 and math.isfinite(r.item(n - 1))):
            r = roti if idx is None else roti.take(idx)  # the selection, in satellite order
            r = r[np.isfinite(r)]
            r.sort()  # a copy already
            n = r.size
    if not n:
        return math.nan, math.nan
    return r.item(n - 1), 0.5 * (r.item((n - 1) // 2) + r.item(n // 2))


def _max_abs(rot: F64, idx: Idx | None) -> float:
    """Largest |rot| of the satellites ``idx`` (all if None), NaN ignored (NaN if all are): the
    value of ``np.fmax.reduce(np.abs(…))``, read off the sorted values (NaN sorts last) as the
    larger magnitude of the smallest and the largest (a maximum is exact; abs() of a Python
    float leaves no −0.0, as np.abs does not)."""
    r = np.sort(rot) if idx is None else rot.take(idx)
    if idx is not None:
        r.sort()
    n = r.size
    if not n:
        return math.nan
    top = r.item(n - 1)
    if math.isnan(top):  # the largest value is the one before the first NaN
        if math.isnan(r.item(0)):  # NaN sorts last: all are NaN
            return math.nan
        n = int(r.searchsorted(_NAN))
        if not n:
            return math.nan
        top = r.item(n - 1)
    return max(abs(r.item(0)), abs(top))


def _weights(sin_el: F64, w: F64 | None, idx: Idx | None) -> F64:
    """The weights ``w`` (sin²el if None) of the satellites ``idx`` (all if None): a new array
    unless ``w`` is given and ``idx`` is None."""
    if w is not None:
        return w if idx is None else w.take(idx)
    if idx is None:
        return np.multiply(sin_el, sin_el)
    out = sin_el.take(idx)
    out *= out
    return out


def _columns(xyv: F64, idx: Idx) -> F64:
    """``xyv[:, idx]``, a new array in NumPy's memory order for it (Fortran: a (k, 3) block
    seen transposed; the BLAS calls of the plane fit, and so their rounding, depend on it)."""
    out: F64 = np.asfortranarray(xyv.take(idx, axis=1))
    return out


def _plane_slopes(
    scratch: FitScratch, w: F64, xyv: F64, w_sum: npt.NDArray[np.float64] | None = None,
    own: bool = False,
) -> tuple[float, float]:  # fmt: skip
    """Slopes (∂v/∂x, ∂v/∂y) of the weighted least-squares plane v = c + gx·x + gy·y through
    the points ``xyv`` (rows x, y, v) with weights ``w`` (``w_sum``: their sum, if known;
    ``own``: ``xyv`` is a scratch copy, centred in place); the means and sums go to ``scratch``.

    Centred on the weighted means, the normal equations reduce to 2 × 2, solved in closed form;
    NaN when the points lie (nearly) on one line.
    """
    mean = scratch.means_flat
    xyv.dot(w, mean)  # ndarray.dot: the BLAS calls of ``@`` (tested), into ``mean``
    mean /= np.add.reduce(w) if w_sum is None else w_sum
    col = scratch.means  # ``mean`` as a column
    c = np.subtract(xyv, col, xyv) if own else np.subtract(xyv, col)
    (c * w).dot(c.T, scratch.sums)
    sxx, sxy, sxv, _, syy, syv, _, _, _ = scratch.sums_flat.tolist()
    det = sxx * syy - sxy * sxy
    if not det > 1e-9 * sxx * syy:
        return math.nan, math.nan
    return (syy * sxv - sxy * syv) / det, (sxx * syv - sxy * sxv) / det
