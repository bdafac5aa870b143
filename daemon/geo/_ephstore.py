"""Ephemeris store: keeps the newest broadcast ephemerides per satellite and picks the usable one.

Validity windows (SCIENCE.md §6, common practice), as |t − t_ref| limits around the reference time
(t_oe for Keplerian ephemerides, t_b for GLONASS): GPS/QZSS/NavIC 2 h (half the 4 h fit interval,
or half of ``fit_interval_h`` when larger), Galileo 2 h, BeiDou 1 h, GLONASS 15 min.

Per request, each satellite gets the stored set whose reference time is closest to t; it is used
if t lies in its window [ref − w, ref + w) and its health word is 0, otherwise the satellite is
counted under ``stale`` (window passed), ``future`` (window not reached) or ``unhealthy``;
``missing`` counts satellites with nothing stored. At ``add``, GPS/QZSS sets with
IODE ≠ IODC mod 256 (IS-GPS-200 §20.3.3.4.1, from memory for the clause) are refused as
``inconsistent``, and sets with non-finite fields or an impossible orbit as ``implausible``.

The selection is constant between "event" times (window edges and midpoints between candidates),
so ``select`` returns the cached :class:`EphemerisSelection` (same batches, no allocation) until t
leaves that interval, the satellite list changes, or an ephemeris is added. The last few
satellite lists are remembered (a satellite dropping out for an epoch costs no rebuild), and the
newest ``keep_per_sat`` sets per satellite are kept (bounded memory).
"""

from __future__ import annotations

import bisect
import datetime as _dt
import itertools
import math
from dataclasses import dataclass, field
from typing import Any, NamedTuple, TypeAlias

import numpy as np
import numpy.typing as npt

from ionwarden.parsers import (
    BDS_GPS_OFFSET_S,
    GPS_EPOCH,
    SECONDS_PER_WEEK,
    GlonassEphemeris,
    KeplerEphemeris,
    leap_seconds_at,
)

from ._glonass import GlonassBatch, resolve_glonass_tb
from ._kepler import KeplerBatch, orbit_constants
from ._nodes import OrbitNodes

__all__ = [
    "DEFAULT_KEEP_PER_SAT",
    "EphemerisSelection",
    "EphemerisStore",
    "EphemerisStoreStatistics",
]

Ephemeris: TypeAlias = KeplerEphemeris | GlonassEphemeris
_GLO = 1  # system index of GLONASS in parsers._signals.SYSTEMS
_GPS_LIKE = frozenset((0, 4))  # GPS, QZSS: IODE/IODC consistency applies
#: Half-width of the validity window (s) by system index (SCIENCE.md §6, common practice).
_WINDOW_S: dict[int, float] = {0: 7200.0, 1: 900.0, 2: 7200.0, 3: 3600.0, 4: 7200.0, 6: 7200.0}
#: Newest ephemerides kept per satellite (bounded memory).
DEFAULT_KEEP_PER_SAT = 3
_GLO_EPOCH_1996 = _dt.datetime(1996, 1, 1, tzinfo=_dt.UTC)  # N4 = 1 starts here (ICD Ed. 5.1 §4.5)
_MOSCOW_OFFSET_S = 10_800.0
_REASONS = ("stale", "future", "unhealthy", "missing")


@dataclass(frozen=True, slots=True, kw_only=True)
class EphemerisStoreStatistics:
    """Counters since creation. ``stale``/``future``/``unhealthy``/``missing`` count (request,
    satellite) pairs left without an ephemeris; ``inconsistent`` (IODE/IODC), ``implausible``
    (non-finite or physically impossible orbit) and ``duplicates`` count ``add`` calls refused;
    ``rebuilds`` counts selection rebuilds (cache misses)."""

    stored: int
    added: int
    duplicates: int
    inconsistent: int
    implausible: int
    stale: int
    future: int
    unhealthy: int
    missing: int
    rebuilds: int


@dataclass(frozen=True, slots=True, kw_only=True)
class EphemerisSelection:
    """Ephemerides chosen for the requested satellites (length m, request order).

    ``kepler`` rows serve request rows ``kepler_index``; ``glonass`` rows serve ``glonass_index``;
    ``valid[i]`` is False when satellite i has no usable ephemeris (its rows are absent).
    ``gather_index`` maps request rows into the stacked [Keplerian rows, GLONASS rows, one NaN
    row], so per-row results of both batches go back to request order in one indexing step.
    ``t_lo_s``/``t_hi_s`` bound the GPS times over which this choice stays the same.
    ``nodes`` caches exact states on a time grid for :func:`satellite_geometry`.
    """

    sat: npt.NDArray[np.int16]
    valid: npt.NDArray[np.bool_]
    kepler: KeplerBatch
    kepler_index: npt.NDArray[np.intp]
    glonass: GlonassBatch
    glonass_index: npt.NDArray[np.intp]
    gather_index: npt.NDArray[np.intp]
    t_lo_s: float
    t_hi_s: float
    nodes: OrbitNodes = field(default_factory=OrbitNodes, compare=False, repr=False)


@dataclass(frozen=True, slots=True)
class _Entry:
    ref_gps_s: float  # t_oe (or resolved t_b) as continuous GPS seconds; NaN: resolve at select
    window_s: float
    healthy: bool
    eph: Ephemeris
    serial: int  # unique per stored ephemeris: keys the cached batches


class SelectionMark(NamedTuple):
    """:meth:`EphemerisStore.mark`: reject counts (as ``_REASONS``), rebuilds, selection cache."""

    rejects: tuple[int, ...]
    rebuilds: int
    selections: dict[bytes, Any]


#: Selections and batches kept for recently requested satellite sets (a satellite that drops out
#: for an epoch and comes back should not cost two rebuilds).
_CACHE_SIZE = 8


def _lru_put(cache: dict[Any, Any], key: object, value: object) -> None:
    cache.pop(key, None)
    cache[key] = value
    while len(cache) > _CACHE_SIZE:
        del cache[next(iter(cache))]


def _glonass_ref(eph: GlonassEphemeris, t_received_gps_s: float | None) -> float:
    """t_b as GPS seconds from N4/N_T (ICD Ed. 5.1 §4.5) or the reception time; NaN if neither."""
    if eph.four_year > 0 and eph.day_number > 0:
        day = _GLO_EPOCH_1996 + _dt.timedelta(days=(eph.four_year - 1) * 1461 + eph.day_number - 1)
        utc = day + _dt.timedelta(seconds=eph.tb_s - _MOSCOW_OFFSET_S)
        return (utc - GPS_EPOCH).total_seconds() + leap_seconds_at(utc)
    if t_received_gps_s is None:
        return math.nan
    return resolve_glonass_tb(eph.tb_s, t_received_gps_s)


class EphemerisStore:
    """Newest broadcast ephemerides per satellite with per-epoch selection (see module doc)."""

    def __init__(self, *, keep_per_sat: int = DEFAULT_KEEP_PER_SAT) -> None:
        if keep_per_sat < 1:
            raise ValueError("keep_per_sat must be ≥ 1")
        self._keep = keep_per_sat
        self._by_sat: dict[int, list[_Entry]] = {}
        self._generation = 0
        self._counts = dict.fromkeys(
            (*_REASONS, "added", "duplicates", "inconsistent", "implausible"), 0
        )
        self._rebuilds = 0
        self._serial = 0
        # sats bytes → (selection, generation, reject counts per _REASONS)
        self._selections: dict[bytes, tuple[EphemerisSelection, int, tuple[int, ...]]] = {}
        self._kepler_batches: dict[tuple[int, ...], KeplerBatch] = {}
        self._glonass_batches: dict[tuple[int, ...], GlonassBatch] = {}

    def add(self, eph: Ephemeris, *, t_received_gps_s: float | None = None) -> bool:
        """Store ``eph``; False if it is a duplicate or refused. ``t_received_gps_s`` places a
        GLONASS t_b (time of day) in time when N4/N_T are unknown."""
        sys_index = eph.sat // 100
        if not _plausible(eph):
            self._counts["implausible"] += 1
            return False
        if isinstance(eph, KeplerEphemeris):
            orbit_constants(eph.sat)  # ValueError for a system without a Keplerian orbit
            if sys_index in _GPS_LIKE and eph.iode != eph.iodc % 256:
                self._counts["inconsistent"] += 1
                return False
            shift = BDS_GPS_OFFSET_S if eph.time_system == "BDT" else 0.0
            ref = eph.week * SECONDS_PER_WEEK + eph.toe_s + shift
            window = _WINDOW_S[sys_index]
            if sys_index in _GPS_LIKE and eph.fit_interval_h * 1800.0 > window:
                window = eph.fit_interval_h * 1800.0
        elif sys_index == _GLO:
            ref = _glonass_ref(eph, t_received_gps_s)
            window = _WINDOW_S[_GLO]
        else:
            raise ValueError(f"satellite {eph.sat}: not a GLONASS ephemeris")
        entries = self._by_sat.setdefault(eph.sat, [])
        self._serial += 1
        entry = _Entry(ref, window, eph.health == 0, eph, self._serial)
        for k, old in enumerate(entries):
            if _same(old, eph, ref):
                if isinstance(eph, GlonassEphemeris) and old.eph != eph:
                    entries[k] = entry  # newer upload for the same t_b
                    self._generation += 1
                    return True
                self._counts["duplicates"] += 1
                return False
        entries.append(entry)
        entries.sort(key=lambda x: -math.inf if math.isnan(x.ref_gps_s) else x.ref_gps_s)
        del entries[: max(0, len(entries) - self._keep)]
        self._counts["added"] += 1
        self._generation += 1
        return True

    @property
    def generation(self) -> int:
        """Bumped whenever the stored ephemerides change (a selection made before is stale)."""
        return self._generation

    def mark(self) -> SelectionMark:
        """What :meth:`select` changes (its counters, the selection cache), for :meth:`take_back`."""
        return SelectionMark(
            tuple(self._counts[r] for r in _REASONS), self._rebuilds, dict(self._selections)
        )

    def take_back(self, before: SelectionMark, after: SelectionMark) -> None:
        """Undo the selections made between two marks (a speculative evaluation whose result was
        not used): their counts, and the selection cache as it was; ephemerides added since stay."""
        for k, name in enumerate(_REASONS):
            self._counts[name] -= after.rejects[k] - before.rejects[k]
        self._rebuilds -= after.rebuilds - before.rebuilds
        self._selections = dict(before.selections)

    def statistics(self) -> EphemerisStoreStatistics:
        c = self._counts
        return EphemerisStoreStatistics(
            stored=sum(len(v) for v in self._by_sat.values()),
            added=c["added"],
            duplicates=c["duplicates"],
            inconsistent=c["inconsistent"],
            implausible=c["implausible"],
            stale=c["stale"],
            future=c["future"],
            unhealthy=c["unhealthy"],
            missing=c["missing"],
            rebuilds=self._rebuilds,
        )

    def select(self, sat_ids: npt.ArrayLike, t_gps_s: float) -> EphemerisSelection:
        """Usable ephemeris per satellite at GPS time ``t_gps_s`` (see module doc)."""
        sats = np.asarray(sat_ids, dtype=np.int16)
        assert sats.ndim == 1, sats.shape
        key = sats.tobytes()
        hit = self._selections.get(key)
        if hit is not None:
            cached, generation, rejects = hit
            if generation == self._generation and cached.t_lo_s <= t_gps_s < cached.t_hi_s:
                for name, count in zip(_REASONS, rejects, strict=True):
                    self._counts[name] += count
                return cached
        return self._rebuild(sats, t_gps_s, key)

    def _rebuild(self, sats: npt.NDArray[np.int16], t: float, key: bytes) -> EphemerisSelection:
        self._rebuilds += 1
        rejects = dict.fromkeys(_REASONS, 0)
        lo, hi = -math.inf, math.inf
        valid = np.zeros(sats.shape[0], dtype=np.bool_)
        kep: list[tuple[int, KeplerEphemeris]] = []
        kep_idx: list[int] = []
        glo: list[tuple[int, GlonassEphemeris]] = []
        glo_idx: list[int] = []
        for i, sat in enumerate(sats.tolist()):
            entries = self._by_sat.get(sat, [])
            if not entries:
                rejects["missing"] += 1
                continue
            refs = [
                resolve_glonass_tb(e.eph.tb_s, t)
                if math.isnan(e.ref_gps_s) and isinstance(e.eph, GlonassEphemeris)
                else e.ref_gps_s
                for e in entries
            ]
            order = sorted(range(len(entries)), key=refs.__getitem__)  # stable: re-uploads last
            rs = [refs[k] for k in order]
            # Closest reference time, decided by the midpoints between neighbours (a tie goes to
            # the later set); windows are half-open [ref − w, ref + w) so that the selection is
            # constant on every [event, next event) interval.
            mids = [(a + b) / 2 for a, b in itertools.pairwise(rs)]
            best = bisect.bisect_right(mids, t)
            entry = entries[order[best]]
            ref = rs[best]
            events = [*mids, *(r - entry.window_s for r in rs), *(r + entry.window_s for r in rs)]
            lo = max([lo, *(x for x in events if x <= t)])
            hi = min([hi, *(x for x in events if x > t)])
            if t < ref - entry.window_s:
                rejects["future"] += 1
            elif t >= ref + entry.window_s:
                rejects["stale"] += 1
            elif not entry.healthy:
                rejects["unhealthy"] += 1
            elif isinstance(entry.eph, KeplerEphemeris):
                valid[i] = True
                kep.append((entry.serial, entry.eph))
                kep_idx.append(i)
            elif isinstance(entry.eph, GlonassEphemeris):
                valid[i] = True
                glo.append((entry.serial, entry.eph))
                glo_idx.append(i)
        if any(math.isnan(e.ref_gps_s) for v in self._by_sat.values() for e in v):
            # Some t_b were resolved against t itself: look again within the hour.
            hi = min(hi, t + 3600.0)
        gather = np.full(sats.shape[0], len(kep) + len(glo), dtype=np.intp)
        gather[kep_idx] = np.arange(len(kep))
        gather[glo_idx] = len(kep) + np.arange(len(glo))
        selection = EphemerisSelection(
            sat=sats.copy(),
            valid=valid,
            kepler=self._kepler_batch(kep),
            kepler_index=np.asarray(kep_idx, dtype=np.intp),
            glonass=self._glonass_batch(glo),
            glonass_index=np.asarray(glo_idx, dtype=np.intp),
            gather_index=gather,
            t_lo_s=lo,
            t_hi_s=hi,
        )
        counts = tuple(rejects[name] for name in _REASONS)
        for name, count in zip(_REASONS, counts, strict=True):
            self._counts[name] += count
        _lru_put(self._selections, key, (selection, self._generation, counts))
        return selection

    def _kepler_batch(self, chosen: list[tuple[int, KeplerEphemeris]]) -> KeplerBatch:
        key = tuple(serial for serial, _ in chosen)
        batch = self._kepler_batches.get(key)
        if batch is None:
            batch = KeplerBatch.from_ephemerides([eph for _, eph in chosen])
        _lru_put(self._kepler_batches, key, batch)
        return batch

    def _glonass_batch(self, chosen: list[tuple[int, GlonassEphemeris]]) -> GlonassBatch:
        # Reusing a GLONASS batch also keeps its RK4 node table.
        key = tuple(serial for serial, _ in chosen)
        batch = self._glonass_batches.get(key)
        if batch is None:
            batch = GlonassBatch.from_ephemerides([eph for _, eph in chosen])
        _lru_put(self._glonass_batches, key, batch)
        return batch


#: Keplerian fields that must be finite (group delays and accuracy may be NaN = unknown).
_KEPLER_FINITE = (
    "toe_s", "toc_s", "sqrt_a", "e", "i0", "omega0", "omega", "m0", "delta_n", "idot",
    "omega_dot", "cuc", "cus", "crc", "crs", "cic", "cis", "af0", "af1", "af2",
)  # fmt: skip
_GLONASS_FINITE = (
    "tb_s", "x_m", "y_m", "z_m", "vx_mps", "vy_mps", "vz_mps",
    "ax_mps2", "ay_mps2", "az_mps2", "tau_n_s", "gamma_n",
)  # fmt: skip
#: √A bounds (√m): every GNSS orbit in use lies between MEO (GPS √A ≈ 5154) and GEO (≈ 6493).
_SQRT_A_RANGE = (4000.0, 7500.0)
#: GLONASS orbit radius bounds (m) around the nominal 25,510 km.
_GLO_RADIUS_RANGE = (2.0e7, 3.0e7)


def _plausible(eph: Ephemeris) -> bool:
    """Finite fields and an orbit a GNSS satellite can have (decoder or bit errors otherwise)."""
    if isinstance(eph, KeplerEphemeris):
        if not all(math.isfinite(getattr(eph, name)) for name in _KEPLER_FINITE):
            return False
        return _SQRT_A_RANGE[0] < eph.sqrt_a < _SQRT_A_RANGE[1] and 0.0 <= eph.e < 0.5
    if not all(math.isfinite(getattr(eph, name)) for name in _GLONASS_FINITE):
        return False
    radius = math.sqrt(eph.x_m**2 + eph.y_m**2 + eph.z_m**2)
    return _GLO_RADIUS_RANGE[0] < radius < _GLO_RADIUS_RANGE[1]


def _same(old: _Entry, eph: Ephemeris, ref: float) -> bool:
    """Dedupe key: satellite + reference time + issue of data (t_b for GLONASS)."""
    o = old.eph
    if isinstance(o, KeplerEphemeris) and isinstance(eph, KeplerEphemeris):
        return (o.week, o.toe_s, o.iode) == (eph.week, eph.toe_s, eph.iode)
    if isinstance(o, GlonassEphemeris) and isinstance(eph, GlonassEphemeris):
        same_ref = (math.isnan(ref) and math.isnan(old.ref_gps_s)) or ref == old.ref_gps_s
        return o.tb_s == eph.tb_s and same_ref
    return False
