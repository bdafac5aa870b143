"""Where each satellite is in the sky: broadcast ephemerides first, NMEA GSV as a flagged fallback.

Axes: ``S`` satellite slots (``MAX_SAT_ID``); angles in radians inside, degrees only at the edges
(GSV input). Elevation changes by less than 0.01° per second, so a satellite's geometry is
recomputed from its orbit only when it is older than ``refresh_s`` (all satellites of the epoch
in one vectorised call) and in between extrapolated linearly from the per-slot cache (rates from
the last two refreshes). While the satellites repeat and all of them were refreshed together,
their cached rows and rates are kept as (4, m) arrays, so an epoch costs two operations plus the
angle wraps; satellites without an orbit stay NaN rows of that cache as long as none of them has
a GSV elevation to fall back to.

Orbits are re-evaluated only in an epoch before which the ephemeris store did not change (since
the previous epoch's lookup), so that a station's deferred step can evaluate them ahead
(:meth:`Geometry.prefetch`) with the store the epoch will use: a new broadcast set does not force
a re-evaluation in the epoch it arrives with (a satellite with rows keeps them until its next
refresh; one without rows gets them at the first such epoch), and a refresh that falls due while
new sets arrive waits for one, ``_POSTPONE_MAX`` × ``refresh_s`` at most. Satellites never
evaluated (start-up, rising) and a moved receiver are evaluated at once.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from ionwarden.daemon.geo import EphemerisStore, ecef_to_geodetic, pierce_point, satellite_geometry

if TYPE_CHECKING:
    from ionwarden.daemon.geo._ephstore import SelectionMark
    from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris

__all__ = ["Cached", "Geometry"]

F64 = npt.NDArray[np.float64]
Idx = npt.NDArray[np.intp]
#: :meth:`Geometry.cached`: (sats, version, orbit time (s), rows, rates per second, all known,
#: source).
Cached = tuple[Idx, int, float, F64, F64, bool, str]
Mask = npt.NDArray[np.bool_]
#: A GSV elevation older than this is not used (s of data time): receivers send GSV every epoch.
GSV_MAX_AGE_S = 30.0
_TWO_PI = 2.0 * np.pi
#: Step of the second orbit evaluation that gives a cold satellite its extrapolation rate (s).
_RATE_STEP_S = 10.0
#: A refresh postponed while new ephemerides arrive runs anyway once the rows are this many
#: ``refresh_s`` old (our choice: the demo's elevations moved ≤ 0.006° against the old rule).
_POSTPONE_MAX = 2.0
_TWO_PI_0D = np.array(_TWO_PI)
_PI_0D = np.array(np.pi)


#: What :meth:`Geometry.prefetch` computed: (sats, t, inputs, (m, 4) rows, store marks before,
#: between the rows' evaluation and the rates' (a second one for cold satellites) and after,
#: (4, m) rate rows for the refresh, the version they were computed at).
_Ahead = tuple[
    Idx, float, tuple[int, int], F64, "SelectionMark", "SelectionMark", "SelectionMark", F64, int
]


class Geometry:
    """Per-satellite elevation/azimuth cache fed by orbits (preferred) or GSV (fallback)."""

    def __init__(
        self, n_slots: int, refresh_s: float, *, shell_m: float, keep_per_sat: int = 3
    ) -> None:
        self.refresh_s = float(refresh_s)
        self.shell_m = shell_m
        #: Cached orbit geometry per slot: rows el, az, pierce-point lat, lon (rad) at
        #: ``t_orbit``, and their rates (rad/s) from the last two refreshes; (4, S).
        self.geo = np.full((4, n_slots), np.nan)
        self.rate = np.zeros((4, n_slots))
        self.t_orbit = np.full(n_slots, np.nan)
        self.gsv_el = np.full(n_slots, np.nan)
        self.gsv_az = np.full(n_slots, np.nan)
        self.gsv_t = np.full(n_slots, np.nan)
        self.rx_ecef: F64 | None = None
        self.rx_source = ""
        self.lat_rad = math.nan
        self.lon_rad = math.nan
        self.store = EphemerisStore(keep_per_sat=keep_per_sat)
        self.has_ephemeris = False
        self.counters: dict[str, int] = {}
        #: Bumped whenever ``geo``, ``rate``, ``t_orbit`` or the receiver change.
        self.version = 0
        #: Whether the last :meth:`lookup` had orbit geometry for every satellite (no NaN, no
        #: GSV fallback).
        self.all_known = False
        #: (sats, version, t_orbit, geo rows, rates, all_known, source) of the last satellites
        #: seen when all were refreshed at one time and none fell back to GSV (module doc).
        self._same: Cached | None = None
        #: Bumped when the receiver position is set: with the store's generation, the inputs of
        #: an orbit evaluation besides the satellites and the time.
        self._rx_version = 0
        #: Orbit rows computed ahead (:meth:`prefetch`): (sats, t, inputs, rows, store marks
        #: before, between and after, and the refresh's rate rows with the version they were
        #: computed at).
        self._ahead: _Ahead | None = None
        #: Satellites without rows at their last refresh that have an ephemeris since: refreshed
        #: at the next epoch before which the store did not change; their number.
        self._want = np.zeros(n_slots, np.bool_)
        self._wants = 0
        #: The store's generation at the last epoch's lookup (see the module doc).
        self._gen_seen = -1

    # -- inputs ---------------------------------------------------------------------------------
    def set_receiver_position(self, ecef_m: npt.ArrayLike, source: str) -> None:
        xyz = np.asarray(ecef_m, dtype=np.float64).reshape(3)
        if not np.isfinite(xyz).all() or float(np.linalg.norm(xyz)) < 6.0e6:
            raise ValueError(f"receiver position from {source} is not near the Earth's surface")
        if (
            self.rx_ecef is not None
            and source == self.rx_source
            and np.array_equal(xyz, self.rx_ecef)
        ):
            # The same position again (RTCM 1005/1006 repeat every few seconds): nothing changes,
            # so the cached geometry stays (a new version would rebuild it the next epoch).
            return
        moved = self.rx_ecef is None or float(np.linalg.norm(xyz - self.rx_ecef)) > 100.0
        self.rx_ecef = xyz
        self.rx_source = source
        lat, lon, _ = ecef_to_geodetic(xyz)
        self.lat_rad, self.lon_rad = float(lat), float(lon)
        self.version += 1
        self._rx_version += 1
        if moved:
            self.t_orbit.fill(np.nan)

    def set_gsv(
        self, t_s: float, sats: npt.ArrayLike, el_deg: npt.ArrayLike, az_deg: npt.ArrayLike
    ) -> None:
        s = np.asarray(sats, dtype=np.intp)
        e = np.asarray(el_deg, dtype=np.float64)
        a = np.asarray(az_deg, dtype=np.float64)
        assert s.shape == e.shape == a.shape, (s.shape, e.shape, a.shape)
        keep = (s >= 0) & (s < self.t_orbit.shape[0]) & np.isfinite(e)
        s, e, a = s[keep], e[keep], a[keep]
        self.gsv_el[s] = np.radians(e)
        self.gsv_az[s] = np.radians(np.where(np.isfinite(a), a, np.nan))
        self.gsv_t[s] = t_s
        self.version += 1

    def add_ephemeris(self, eph: KeplerEphemeris | GlonassEphemeris, t_s: float | None) -> None:
        """Store a broadcast ephemeris (``t_s``: data time of reception, places GLONASS t_b)."""
        try:
            added = self.store.add(eph, t_received_gps_s=t_s)
        except ValueError:
            self.counters["ephemerides_unusable"] = self.counters.get("ephemerides_unusable", 0) + 1
            return
        if added:
            self.has_ephemeris = True
            sat = eph.sat
            # A satellite with rows keeps them until its next refresh (the module doc); one
            # refreshed without rows asks for one.
            if math.isnan(self.geo[0, sat]) and not math.isnan(self.t_orbit[sat]):
                self._want[sat] = True
                self._wants += 1

    # -- lookup ---------------------------------------------------------------------------------
    def lookup(self, sats: Idx, t_s: float) -> tuple[F64, str]:
        """Rows (el, az, pierce-point lat, lon) in radians, shape (4, m), for the satellites at
        ``t_s`` (NaN where unknown) and the source: "ephemeris", "gsv", "ephemeris+gsv" or
        "none".

        Orbit geometry is recomputed for all ``sats`` at once when the last refresh is older
        than ``refresh_s`` or a satellite has no cached value yet (one vectorised call; the
        ephemeris store's selection cache then hits for the unchanged satellite list).
        """
        same = self.cached(sats, t_s)
        if same is not None:
            # The operations of the general case below, with one dt for all satellites.
            return self.extrapolate(same[4], np.array(t_s - same[2]), same[3]), same[6]
        dt = t_s - self.t_orbit.take(sats)
        orbits = self.rx_ecef is not None and self.has_ephemeris
        m = sats.shape[0]
        if orbits and self._due(sats, dt):
            if self._refresh_now(dt):
                self._refresh(sats, t_s)
                dt = t_s - self.t_orbit.take(sats)
            elif self._ahead is not None:
                self._rows_unused()  # evaluated ahead for a refresh postponed
        self._gen_seen = self.store.generation
        # Linear extrapolation from the last refresh: second-order error < 0.001° over 30 s.
        geo = self.rate.take(sats, axis=1)
        geo *= dt
        geo += self.geo.take(sats, axis=1)
        el, az, lat, lon = geo
        have = ~np.isnan(el)
        source = "ephemeris"
        self.all_known = all_known = np.count_nonzero(have) == m
        cacheable = orbits and m and not sats.flags.writeable
        if not (m and all_known):
            gsv_t = self.gsv_t[sats]
            gsv_ok = ~have & (np.abs(t_s - gsv_t) <= GSV_MAX_AGE_S)
            source = "ephemeris" if have.any() else "none"
            if gsv_ok.any():
                g = sats[gsv_ok]
                el[gsv_ok] = self.gsv_el[g]
                az[gsv_ok] = self.gsv_az[g]
                if math.isfinite(self.lat_rad):
                    lat[gsv_ok], lon[gsv_ok] = pierce_point(
                        self.lat_rad, self.lon_rad, az[gsv_ok], el[gsv_ok], self.shell_m
                    )
                source = "gsv" if not have.any() else "ephemeris+gsv"
                cacheable = False
            elif cacheable:  # the NaN rows stay NaN until a GSV elevation (a new version) comes
                cacheable = bool(np.isnan(gsv_t[~have]).all())
        if cacheable:
            t_orbit = self.t_orbit[sats]
            if np.count_nonzero(t_orbit == t_orbit[0]) == m:
                self._same = (sats, self.version, float(t_orbit[0]), self.geo[:, sats],
                              self.rate[:, sats], all_known, source)  # fmt: skip
        self._wrap(geo)
        return geo, source

    def cached(self, sats: Idx, t_s: float) -> Cached | None:
        """The cached rows :meth:`lookup` of ``sats`` at ``t_s`` extrapolates from, when it
        does: (sats, version, their orbit time (s), rows, rates per second, all known, source),
        its bookkeeping done (``all_known`` set, rows evaluated ahead for a refresh that does not
        come dropped); None when :meth:`lookup` takes another path. The rows at ``t_s`` are then
        ``wrap(rates · (t_s − orbit time) + rows)``."""
        if self._ahead is not None and not self.refresh_due(sats, t_s):
            self._rows_unused()  # evaluated ahead for a refresh that does not come
        same = self._same
        if (
            same is not None
            and same[0] is sats
            and same[1] == self.version
            and abs(t_s - same[2]) <= self.refresh_s
            and not self._wants
        ):
            self.all_known = same[5]
            self._gen_seen = self.store.generation
            return same
        return None

    @staticmethod
    def extrapolate(rates: F64, dt_s: F64, rows: F64) -> F64:
        """Rows ``rates · dt_s + rows``, wrapped (a new array): :meth:`cached`'s rows at a time
        ``dt_s`` (0-d, or a row per column) after their orbits."""
        geo = np.multiply(rates, dt_s)
        geo += rows
        Geometry._wrap(geo)
        return geo

    @staticmethod
    def _wrap(geo: F64) -> None:
        """Azimuth to [0, 2π), longitude to [−π, π), in place.

        A row at a time: ``geo[1::2] %= …`` (one call) costs more, as NumPy iterates over the
        strided rows and then assigns them back to themselves."""
        az = geo[1]
        lon = geo[3]
        lon += _PI_0D
        az %= _TWO_PI_0D
        lon %= _TWO_PI_0D
        lon -= _PI_0D

    # -- orbit evaluation ahead of time ---------------------------------------------------------
    def refresh_due(self, sats: Idx, t_s: float) -> bool:
        """Whether :meth:`lookup` of ``sats`` at ``t_s`` would re-evaluate the orbits now, if the
        ephemeris store does not change before it."""
        if self.rx_ecef is None or not self.has_ephemeris or not sats.shape[0]:
            return False
        same = self._same
        if same is not None and same[0] is sats and same[1] == self.version and not self._wants:
            return abs(t_s - same[2]) > self.refresh_s
        return self._due(sats, t_s - self.t_orbit.take(sats))

    def _due(self, sats: Idx, dt: F64) -> bool:
        """Rows older than ``refresh_s`` (``dt``: ages, NaN if never evaluated), or asked for."""
        if np.count_nonzero(np.abs(dt) <= self.refresh_s) < sats.shape[0]:
            return True
        if self._wants:
            if np.count_nonzero(self._want.take(sats)):
                return True
            self._want.fill(False)  # (asked by satellites gone: they are refreshed on return)
            self._wants = 0
        return False

    def _refresh_now(self, dt: F64) -> bool:
        """A due refresh runs now if the store did not change since the last epoch, a satellite
        was never evaluated (or the receiver moved) or the rows are ``_POSTPONE_MAX`` ×
        ``refresh_s`` old (the module doc)."""
        if self.store.generation == self._gen_seen:
            return True
        age = np.abs(dt)
        return bool(np.isnan(age).any() or age.max() > _POSTPONE_MAX * self.refresh_s)

    def prefetch(self, sats: Idx, t_s: float) -> None:
        """Evaluate now the orbit rows a refresh of ``sats`` at ``t_s`` will need (the daemon
        does this in a station's deferred step, so the second that refreshes does not pay for
        it). Used only if nothing they depend on changed meanwhile (receiver position, stored
        ephemerides); otherwise they are evaluated again then and the store's counters are set
        back as if this never ran: the results are the same bit for bit either way."""
        if self.rx_ecef is None or not self.has_ephemeris:
            return
        if self._ahead is not None:
            self._rows_unused()
        if not self._refresh_now(t_s - self.t_orbit.take(sats)):
            return  # a set stored since the last epoch: it waits for a quiet one (module doc)
        before = self.store.mark()
        rows = self._evaluate(sats, t_s)
        mid = self.store.mark()
        rate = self._refresh_rates(sats, t_s, rows)
        after = self.store.mark()
        self._ahead = (sats, t_s, self._inputs(), rows, before, mid, after, rate, self.version)

    def _inputs(self) -> tuple[int, int]:
        return (self._rx_version, self.store.generation)

    def _take_ahead(self, sats: Idx, t_s: float) -> _Ahead | None:
        """What :meth:`prefetch` computed, taken for a refresh of ``sats`` at ``t_s`` when it is
        still valid (None, and dropped, otherwise)."""
        ahead = self._ahead
        if ahead is None:
            return None
        if ahead[0] is sats and ahead[1] == t_s and ahead[2] == self._inputs():
            self._ahead = None
            return ahead
        self._rows_unused()
        return None

    def _rows_unused(self) -> None:
        """Drop the rows evaluated ahead, taking back what evaluating them did to the store (no
        selection ran since: every orbit evaluation comes through here first)."""
        ahead, self._ahead = self._ahead, None
        if ahead is not None:
            self.store.take_back(ahead[4], ahead[6])

    def _evaluate(self, sats: Idx, t_s: float) -> F64:
        assert self.rx_ecef is not None
        sg = satellite_geometry(t_s, self.rx_ecef, sats, self.store)
        ok = sg.valid
        new = np.full((sats.shape[0], 4), np.nan)
        new[ok, 0] = sg.el_rad[ok]
        new[ok, 1] = sg.az_rad[ok]
        new[ok, 2], new[ok, 3] = pierce_point(
            self.lat_rad, self.lon_rad, sg.az_rad[ok], sg.el_rad[ok], self.shell_m
        )
        return new

    @staticmethod
    def _rate(new: F64, old: F64, span: F64) -> F64:
        """(m, 4) rates (rad/s) between two row sets ``span`` (m, 1) seconds apart."""
        with np.errstate(invalid="ignore", divide="ignore"):
            diff = new - old
            diff[:, 1] = (diff[:, 1] + np.pi) % _TWO_PI - np.pi  # azimuth and longitude wrap
            diff[:, 3] = (diff[:, 3] + np.pi) % _TWO_PI - np.pi
            rate: F64 = diff / span
        return rate

    def _rates(self, sats: Idx, t_s: float, new: F64) -> tuple[F64, Mask, Mask]:
        """Rates (m, 4) from the cached rows to ``new`` at ``t_s``, whether each is usable (m, 1:
        the cached rows are recent) and which satellites are cold (m: no usable previous rows
        but an orbit now)."""
        span = (t_s - self.t_orbit[sats])[:, None]
        old = self.geo[:, sats].T
        rate = self._rate(new, old, span)
        usable = (span > 0.0) & (span < 4.0 * self.refresh_s) & ~np.isnan(old[:, :1])
        return rate, usable, ~usable[:, 0] & ~np.isnan(new[:, 0])

    def _refresh_rates(self, sats: Idx, t_s: float, new: F64) -> F64:
        """The (4, m) rates a refresh of ``sats`` at ``t_s`` to rows ``new`` stores, from the
        cache as it stands; a satellite without usable previous rows (start, rising, a first
        usable ephemeris) from a second evaluation ``_RATE_STEP_S`` later (else rate 0: up to
        ~0.25° of elevation off at 30 s)."""
        rate, usable, cold = self._rates(sats, t_s, new)
        if np.count_nonzero(cold):
            # All of ``sats``, not only the cold ones: the ephemeris selection (and its orbit
            # node tables) is cached per satellite list; a subset would build new ones (~6 ms).
            later = self._evaluate(sats, t_s + _RATE_STEP_S)[cold]
            step = np.full((later.shape[0], 1), _RATE_STEP_S)
            rate[cold] = self._rate(later, new[cold], step)
            usable[cold] = True
        rows: F64 = np.where(usable & ~np.isnan(rate), rate, 0.0).T
        return rows

    def _refresh(self, sats: Idx, t_s: float) -> None:
        """Orbit rows of ``sats`` (NaN without a usable ephemeris) and their rates
        (:meth:`_refresh_rates`), from :meth:`prefetch` when still valid."""
        ahead = self._take_ahead(sats, t_s)
        if ahead is None:
            new = self._evaluate(sats, t_s)
            self.rate[:, sats] = self._refresh_rates(sats, t_s, new)
        elif ahead[8] == self.version:
            new = ahead[3]
            self.rate[:, sats] = ahead[7]  # computed ahead from the cache as it still is
        else:  # the cache changed since (GSV): the rates again, as if the rows were new now
            new = ahead[3]
            self.store.take_back(ahead[5], ahead[6])
            self.rate[:, sats] = self._refresh_rates(sats, t_s, new)
        if self._wants:
            self._want[sats] = False
            self._wants = int(np.count_nonzero(self._want))
        self.geo[:, sats] = new.T
        self.t_orbit[sats] = t_s
        self.version += 1
