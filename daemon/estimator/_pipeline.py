"""One station's synchronous pipeline: decoded messages (or raw bytes) in, snapshots out.

The daemon runtime and ``ionwarden process`` both use exactly this, so a capture processed offline
gives the figures the daemon would have published. Routing (table-driven by message type):

* :class:`ObsEpoch` → :meth:`StationEstimator.update` → :class:`StationSnapshot`;
* Keplerian / GLONASS ephemerides → the estimator's ephemeris store and satellite group delays;
* RTCM 1005/1006 station reference → receiver position (unless configured), then GGA as a last
  resort (precedence: config > 1005/1006 > GGA);
* assembled GSV groups (the stream decoder emits whole :class:`SatellitesInView`) → fallback
  elevations (flagged ``geometry_source="gsv"``);
* GGA (+ GST of the same second) → :class:`FixStatus`.

Everything else (RMC, GSA, proprietary RTCM, …) is ignored here. Pure: no clock, no I/O.
"""

from __future__ import annotations

import datetime as _dt
import math
from typing import TYPE_CHECKING, Any

import numpy as np

from ionwarden.daemon.geo import geodetic_to_ecef
from ionwarden.parsers import (
    GgaFix,
    GlonassEphemeris,
    GpsTime,
    GstErrors,
    KeplerEphemeris,
    NmeaFrame,
    ObsEpoch,
    RtcmFrame,
    SatellitesInView,
    StationReference,
    StreamDecoder,
    utc_to_gps,
)

from ._estimator import StationEstimator
from ._snapshot import FixStatus, StationSnapshot, new_fix_status

if TYPE_CHECKING:
    from collections.abc import Callable, Iterable, Mapping, Sequence

    import numpy.typing as npt

    from ionwarden.daemon.config import EstimatorSettings

__all__ = ["PipelineOutput", "StationPipeline"]

PipelineOutput = StationSnapshot | FixStatus
#: NMEA sentences still needed when ephemerides give every satellite's geometry.
_FIX_SENTENCES = frozenset({"GGA", "GST"})
#: ... and while some satellite has none: GSV elevations are the fallback. Nothing else is routed
#: (the decoder adds RMC/ZDA itself while it still needs the date).
_FALLBACK_SENTENCES = _FIX_SENTENCES | {"GSV"}
_SOURCE_RANK = {"config": 3, "rtcm": 2, "rinex": 2, "gga": 1, "": 0}
_DAY_BEFORE = _dt.timedelta(days=-1)
_DAY_AFTER = _dt.timedelta(days=1)
_HALF_DAY = _dt.timedelta(hours=12)
_MINUS_HALF_DAY = -_HALF_DAY


class StationPipeline:
    """Routes one receiver's decoded messages to its estimator (see module doc)."""

    def __init__(
        self,
        station: str,
        settings: EstimatorSettings | None = None,
        *,
        position_ecef_m: npt.ArrayLike | None = None,
        reference_time: GpsTime | None = None,
        ephemerides_per_sat: int = 3,
        defer: bool = False,
        slack: bool = False,
    ) -> None:
        """``reference_time`` helps the byte decoder place MSM times of week (the daemon passes
        its clock's reading at start; offline processing leaves it None).

        ``defer`` (the daemon sets it): what the snapshot of an epoch does not depend on — the
        estimator's periodic receiver-bias fit and the messages after a chunk's last epoch (its
        GGA/GST, ephemerides sent after the observations) — waits for :meth:`settle`, which the
        runtime calls once other stations' snapshots are out; the next feed settles first if
        it was not called. The figures are the same bit for bit either way, only the order of
        work within the second changes (tests/test_pipeline_settle.py).

        ``slack`` (with ``defer``; the daemon sets it): of that work, :meth:`settle` does the
        messages only and leaves the heavy part that may wait longer — the receiver-bias fit and
        the orbits evaluated ahead — to :meth:`settle_slack`, which the runtime calls midway to
        the next epoch (:meth:`slack_after_s`), away from the bursts of all stations' epochs.
        The same figures again: every estimator entry that changes what a pending fit reads
        settles it first (``StationEstimator``'s ``defer_fit``), and orbits evaluated ahead are
        used only while still valid (tests/test_pipeline_slack.py)."""
        self.station = station
        self.estimator = StationEstimator(
            settings, station=station, ephemerides_per_sat=ephemerides_per_sat, defer_fit=defer
        )
        self._defer = defer
        self._slack = defer and slack
        self._deferred: list[object] = []
        #: Set by the daemon for its batched tick (``hold``, :meth:`take_held`).
        self.hold = False
        #: The last epoch of a chunk, routed and not estimated yet (``hold``).
        self._held: ObsEpoch | None = None
        #: Outputs of held epochs estimated by an entry that returns none (a checkpoint's
        #: ``state_dict``), for the next entry that returns outputs.
        self._stash: list[PipelineOutput] = []
        # NmeaOther has no route here: checked and counted, never built
        self.decoder = StreamDecoder(reference_time, emit_nmea_other=False)
        self.decoder.nmea_wanted = _FALLBACK_SENTENCES  # the sentences routed below
        self._position_source = ""
        self._last_t: GpsTime | None = None
        self._gga: GgaFix | None = None
        self._gga_time: GpsTime | None = None
        self._gst: GstErrors | None = None
        self.counters: dict[str, int] = {"messages": 0, "ignored": 0, "positions_rejected": 0}
        if position_ecef_m is not None:
            self.set_position(position_ecef_m, "config")
        self._routes: dict[type, Callable[[Any], PipelineOutput | None]] = {
            ObsEpoch: self._on_epoch,
            KeplerEphemeris: self._on_ephemeris,
            GlonassEphemeris: self._on_ephemeris,
            StationReference: self._on_station,
            SatellitesInView: self._on_gsv,
            GgaFix: self._on_gga,
            GstErrors: self._on_gst,
        }

    # -- entry points ---------------------------------------------------------------------------
    def feed(self, data: bytes | bytearray | memoryview) -> list[PipelineOutput]:
        """Decode stream bytes (RTCM 3 and/or NMEA) and route them; ``b""`` ends the stream."""
        return self._route(self.decoder.feed(data))

    def feed_frames(self, frames: Sequence[RtcmFrame | NmeaFrame]) -> list[PipelineOutput]:
        """Route frames already split and checked by the runtime's framer (the runtime's
        ``FrameConsumer`` protocol), decoded without re-framing; ``feed(b"")`` still ends the
        stream."""
        return self._route(self.decoder.feed_frames(frames))

    def unsettled(self) -> bool:
        """Work deferred by ``defer`` is pending (see :meth:`settle`; with ``slack``, what
        :meth:`settle_slack` does is not counted here but by :meth:`slack_after_s`)."""
        return (
            bool(self._deferred)
            or self._held is not None
            or bool(self._stash)
            or (not self._slack and self.estimator.unsettled())
        )

    def settle(self) -> list[PipelineOutput]:
        """Do the deferred work (in the order it would have run undeferred) and return the
        outputs it produces (fix reports of the deferred GGA/GST); then evaluate the orbits the
        next epoch will refresh, if it does (``StationEstimator.prefetch``). With ``slack`` the
        receiver-bias fit and that evaluation are left to :meth:`settle_slack`."""
        out = self._settle_deferred()
        if not self._slack:
            self.estimator.prefetch()
        return out

    def slack_after_s(self) -> float | None:
        """With ``slack``: how long after its epoch :meth:`settle_slack`'s work may wait (None:
        none waits, or no ``slack``)."""
        return self.estimator.slack_after_s() if self._slack else None

    def settle_slack(self) -> list[PipelineOutput]:
        """Do all deferred work: :meth:`settle`'s, then the receiver-bias fit and the orbits
        evaluated ahead for the next epoch."""
        out = self._settle_deferred()  # (nothing when nothing is deferred, held or stashed)
        self.estimator.settle()
        self.estimator.prefetch()
        return out

    def _settle_deferred(self) -> list[PipelineOutput]:
        out = self._release() if self._held is not None or self._stash else []
        if not self._slack:  # (with slack the fit waits: an entry that changes what it reads
            self.estimator.settle()  # settles it first)
        rest, self._deferred = self._deferred, []
        if rest:
            out += self.handle(rest)
        return out

    # -- the daemon's batched tick ------------------------------------------------------------------
    @property
    def holding(self) -> bool:
        """An epoch is held for the tick (``hold``)."""
        return self._held is not None

    def take_held(self) -> ObsEpoch | None:
        """The held epoch (``hold``), for the tick to estimate; the tick hands the snapshot back
        through :meth:`finish_epoch` before any other entry of this pipeline."""
        epoch, self._held = self._held, None
        return epoch

    def finish_epoch(self, epoch: ObsEpoch, snap: StationSnapshot) -> StationSnapshot:
        """What routing ``epoch`` does besides its estimate (``snap``), which is returned."""
        self._last_t = epoch.time
        # GSV elevations are only a fallback: while every satellite has ephemeris geometry, parse
        # just the sentences we route (GGA/GST), which saves most of the NMEA cost per second.
        self.decoder.nmea_wanted = (
            _FIX_SENTENCES if snap.geometry_source == "ephemeris" else _FALLBACK_SENTENCES
        )
        return snap

    def _release(self) -> list[PipelineOutput]:
        """Outputs stashed, then the held epoch estimated alone: whatever comes after it in the
        stream (the next messages, the settle, a checkpoint) sees the estimator after it, and
        its snapshot goes out before theirs."""
        out, self._stash = self._stash, []
        epoch, self._held = self._held, None
        if epoch is not None:
            out.append(self.finish_epoch(epoch, self.estimator.update(epoch)))
        return out

    def _route(self, messages: Sequence[object]) -> list[PipelineOutput]:
        if not self._defer:
            return self.handle(messages)
        k = len(messages)
        while k and type(messages[k - 1]) is not ObsEpoch:
            k -= 1
        if k and self.hold:  # the last epoch waits for the tick (take_held)
            out = self.handle(messages[: k - 1])  # (it releases an epoch still held first)
            self.counters["messages"] += 1
            self._held = messages[k - 1]  # type: ignore[assignment]  # (an ObsEpoch)
            if k < len(messages):
                self._deferred = list(messages[k:])
            return out
        if k == 0 or k == len(messages):  # no epoch, or nothing after it: nothing to hold back
            return self.handle(messages)
        out = self.handle(messages[:k])
        self._deferred = list(messages[k:])
        return out

    def state_dict(self) -> dict[str, Any]:
        """The estimator's persistent state (see :meth:`StationEstimator.state_dict`)."""
        if self._held is not None:
            self._stash = self._release()
        return self.estimator.state_dict()

    def load_state_dict(self, state: Mapping[str, Any]) -> None:
        if self._held is not None:
            self._stash = self._release()
        self.estimator.load_state(dict(state))

    def handle(self, messages: Iterable[object]) -> list[PipelineOutput]:
        """Route already-decoded messages; returns the snapshots and fix reports they produce
        (after those of any deferred work, which comes first)."""
        out: list[PipelineOutput] = (
            self._settle_deferred()
            if self._deferred or self._held is not None or self._stash
            else []
        )
        # handle_one, inlined (one call less per message): the same counts, routes and order.
        counters, routes = self.counters, self._routes
        for msg in messages:
            counters["messages"] += 1
            route = routes.get(type(msg))
            if route is None:
                counters["ignored"] += 1
                continue
            res = route(msg)
            if res is not None:
                out.append(res)
        return out

    def handle_one(self, msg: object) -> PipelineOutput | None:
        self.counters["messages"] += 1
        route = self._routes.get(type(msg))
        if route is None:
            self.counters["ignored"] += 1
            return None
        return route(msg)

    # -- routes ---------------------------------------------------------------------------------
    def _on_epoch(self, epoch: ObsEpoch) -> StationSnapshot:
        return self.finish_epoch(epoch, self.estimator.update(epoch))

    def _on_ephemeris(self, eph: KeplerEphemeris | GlonassEphemeris) -> None:
        self.estimator.add_ephemeris(eph)

    def _on_station(self, ref: StationReference) -> None:
        self.set_position((ref.x_m, ref.y_m, ref.z_m), "rtcm")

    def _on_gsv(self, group: SatellitesInView) -> None:
        if self._last_t is not None:  # GSV has no time of its own: date it by the last epoch
            self.estimator.set_gsv(self._last_t, group.sat, group.elevation_deg, group.azimuth_deg)

    def _on_gga(self, gga: GgaFix) -> FixStatus:
        self._gga = gga
        self._gga_time = self._utc_time(gga.time_utc)
        if (
            _SOURCE_RANK["gga"]
            >= _SOURCE_RANK[self._position_source]  # else set_position ignores it
            and gga.quality > 0
            and math.isfinite(gga.lat_deg)
            and math.isfinite(gga.lon_deg)
        ):
            h = (gga.alt_msl_m if math.isfinite(gga.alt_msl_m) else 0.0) + (
                gga.geoid_sep_m if math.isfinite(gga.geoid_sep_m) else 0.0
            )
            ecef = geodetic_to_ecef(np.radians(gga.lat_deg), np.radians(gga.lon_deg), h)
            self.set_position(ecef, "gga")
        return self._fix(gst_ok=self._gst is not None and self._gst.time_utc == gga.time_utc)

    def _on_gst(self, gst: GstErrors) -> FixStatus | None:
        self._gst = gst
        if self._gga is None or self._gga.time_utc != gst.time_utc:
            return None
        return self._fix(gst_ok=True)

    # -- helpers --------------------------------------------------------------------------------
    def _fix(self, *, gst_ok: bool) -> FixStatus:
        gga = self._gga
        assert gga is not None
        gst = self._gst if gst_ok else None
        return new_fix_status(  # FixStatus(…) with every field, built cheaper (_records)
            station=self.station,
            time=self._gga_time,
            quality=gga.quality,
            n_sats_used=gga.n_sats_used or 0,
            hdop=gga.hdop,
            sigma_lat_m=gst.lat_sigma_m if gst else math.nan,
            sigma_lon_m=gst.lon_sigma_m if gst else math.nan,
            sigma_alt_m=gst.alt_sigma_m if gst else math.nan,
        )

    def _utc_time(self, tod: _dt.time | None) -> GpsTime | None:
        """GPS time of a GGA time of day, dated from the last epoch (None until one arrived)."""
        if tod is None or self._last_t is None:
            return None
        ref = self._last_t.to_utc()
        cand = _dt.datetime.combine(ref.date(), tod, tzinfo=_dt.UTC)
        # The nearest calendar day to the last epoch (midnight rollover either way); the first of
        # equally near ones in the order day before, day, day after. With d = cand − ref, where
        # −1 d < d < 1 d (same date): the day before is nearest when d ≥ 12 h (a tie keeps it),
        # the day after when d < −12 h, else the day itself (exact timedelta comparisons; the
        # min() over the three candidates' |gaps| they replace: tests/test_pipeline_fix_fast.py).
        d = cand - ref
        if d >= _HALF_DAY:
            cand += _DAY_BEFORE
        elif d < _MINUS_HALF_DAY:
            cand += _DAY_AFTER
        return utc_to_gps(cand)

    def set_position(self, ecef: npt.ArrayLike, source: str) -> None:
        """Receiver position (ECEF m) from ``source`` ("config", "rtcm", "rinex" header or
        "gga"); ignored when a source of higher precedence already gave one."""
        if _SOURCE_RANK[source] < _SOURCE_RANK[self._position_source]:
            return
        try:
            self.estimator.set_receiver_position(ecef, source)
        except ValueError:
            self.counters["positions_rejected"] += 1
            return
        self._position_source = source

    @property
    def position_source(self) -> str:
        """Where the receiver position came from: "config", "rtcm", "gga" or "" (unknown)."""
        return self._position_source
