"""One station's receiver output as a byte stream: RTCM 3 interleaved with NMEA 0183.

Per epoch, in this order (common practice; ephemerides first so that a decoder knows the GLONASS
channels before the first MSM4, which carries none):

1. 1005 station reference every ``station_every_s`` seconds (and with the first epoch);
2. broadcast ephemerides: at the first epoch every current set, then one satellite per
   constellation per epoch in turn (1019 GPS, 1020 GLONASS, 1045 Galileo F/NAV, 1042 BeiDou), so each
   satellite is refreshed about every 30 s at 1 Hz;
3. MSM4 or MSM7 for each constellation (RTCM 10403.3 §3.5.12; multiple-message bit on all but the
   last), built by ``ionwarden.parsers`` from the epoch's :class:`ObsEpoch`;
4. on whole seconds: GGA, RMC and GST, and every ``gsv_every_s`` the GSV groups (one per
   constellation) (NMEA 0183 §6.3).

Epochs inside a scenario stream gap or receiver restart produce no bytes. Pure: the caller owns every file and socket.
"""

from __future__ import annotations

import datetime as _dt
import math
from typing import TYPE_CHECKING

import numpy as np

from ionwarden.parsers import (
    GgaFix,
    GlonassEphemeris,
    GpsTime,
    GstErrors,
    KeplerEphemeris,
    ObsEpoch,
    RmcFix,
    SatellitesInView,
    StationReference,
    encode_1005,
    encode_ephemeris,
    encode_gga,
    encode_gst,
    encode_gsv,
    encode_msm,
    encode_rmc,
    frame_rtcm,
    gps_to_utc,
)

if TYPE_CHECKING:
    from collections.abc import Iterator, Sequence

    from ._engine import Simulator
    from ._observe import SimBlock

__all__ = ["StreamComposer", "block_epochs", "epoch_of"]

#: NMEA talker per constellation for GSV (NMEA 0183 4.11: GP, GL, GA, GB).
_GSV_TALKER = {"G": "GP", "R": "GL", "E": "GA", "C": "GB"}
#: Invented geoid separation at the site (m): GGA reports height above mean sea level.
_GEOID_SEP_M = 47.6


def epoch_of(block: SimBlock, e: int, station_id: int) -> ObsEpoch:
    """The :class:`ObsEpoch` of epoch ``e`` of a block (cells in satellite, then slot order)."""
    si, ki = np.nonzero(block.present[e])
    n = si.shape[0]
    return ObsEpoch(
        time=GpsTime(int(block.geometry.week[e]), float(block.geometry.tow_s[e])),
        station_id=station_id,
        sat=block.sat[si].astype(np.int16),
        sig=block.code[si, ki].astype(np.uint16),
        pseudorange_m=block.pseudorange_m[e, si, ki],
        phase_cycles=block.phase_cycles[e, si, ki],
        range_rate_mps=block.range_rate_mps[e, si, ki],
        cn0_dbhz=block.cn0_dbhz[e, si, ki].astype(np.float32),
        lock_time_s=block.lock_time_s[e, si, ki].astype(np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=block.half_cycle[e, si, ki],
        lli=block.lli[e, si, ki],
        freq_hz=block.freq_hz[si, ki],
        sources=("simulator",),
        _validate=False,
    )


def block_epochs(block: SimBlock, station_id: int, *, gaps: bool = True) -> Iterator[ObsEpoch]:
    """Epochs of a block (those inside stream gaps are skipped when ``gaps``)."""
    for e in range(block.present.shape[0]):
        if gaps and not block.in_stream[e]:
            continue
        yield epoch_of(block, e, station_id)


class StreamComposer:
    """Builds the byte stream of one station, epoch by epoch (keeps the ephemeris rotation)."""

    def __init__(
        self,
        sim: Simulator,
        station: int,
        *,
        msm_level: int = 4,
        nmea: bool = True,
        station_every_s: float = 10.0,
        gsv_every_s: float = 1.0,
    ) -> None:
        if msm_level not in (4, 7):
            raise ValueError(f"msm_level must be 4 or 7, got {msm_level}")
        self._sim = sim
        self._station = sim.scenario.stations[station]
        self._msm_level = msm_level
        self._nmea = nmea
        self._station_every_s = station_every_s
        self._gsv_every_s = gsv_every_s
        self._started = False
        self._turn = dict.fromkeys(sim.constellation.series, 0)
        #: Encoded ephemeris frames by (system, set, satellite): each set is encoded once.
        self._eph_frames: dict[tuple[str, int, int], bytes] = {}
        x, y, z = (float(v) for v in sim.station_ecef(station))
        self._ref = frame_rtcm(
            encode_1005(
                StationReference(
                    message=1005,
                    station_id=self._station.station_id,
                    itrf_year=0,
                    gps=True,
                    glonass=True,
                    galileo=True,
                    non_physical=False,
                    single_oscillator=True,
                    quarter_cycle=0,
                    x_m=x,
                    y_m=y,
                    z_m=z,
                )
            )
        )
        self.frames_written = 0

    def _ephemerides(self, t_gps_s: float) -> list[bytes]:
        out: list[bytes] = []
        for system, series in self._sim.constellation.series.items():
            k = series.set_index(t_gps_s)
            ephs: Sequence[KeplerEphemeris | GlonassEphemeris] = series.ephemerides[k]
            if not self._started:
                chosen = range(len(ephs))
            else:
                i = self._turn[system] % len(ephs)
                self._turn[system] = i + 1
                chosen = range(i, i + 1)
            for j in chosen:
                key = (system, k, j)
                frame = self._eph_frames.get(key)
                if frame is None:
                    frame = self._eph_frames[key] = frame_rtcm(encode_ephemeris(ephs[j]))
                out.append(frame)
        return out

    def _nmea_sentences(self, block: SimBlock, e: int, time: GpsTime, *, gsv: bool) -> list[bytes]:
        utc = gps_to_utc(time)
        st = self._station
        g = block.geometry
        pres = block.present[e]
        used = int(pres.any(axis=1).sum())
        hdop = 0.6 + 6.0 / max(used, 1)
        t = _dt.time(utc.hour, utc.minute, utc.second, utc.microsecond)
        out = [
            encode_gga(
                GgaFix(
                    talker="GN",
                    time_utc=t,
                    lat_deg=st.lat_deg,
                    lon_deg=st.lon_deg,
                    quality=1 if used >= 4 else 0,
                    n_sats_used=min(used, 99),
                    hdop=hdop,
                    alt_msl_m=st.height_m - _GEOID_SEP_M,
                    geoid_sep_m=_GEOID_SEP_M,
                    dgps_age_s=math.nan,
                    dgps_station=None,
                )
            ),
            encode_rmc(
                RmcFix(
                    talker="GN",
                    time_utc=t,
                    date_utc=utc.date(),
                    valid=used >= 4,
                    lat_deg=st.lat_deg,
                    lon_deg=st.lon_deg,
                    speed_mps=0.0,
                    course_deg=math.nan,
                    mag_var_deg=math.nan,
                    mode="A",
                    nav_status="",
                )
            ),
        ]
        sys_idx = block.sat // 100
        for system, talker in _GSV_TALKER.items():
            if not gsv or system not in self._sim.scenario.systems:
                continue
            cols = np.flatnonzero((sys_idx == "GREC".index(system)) & pres.any(axis=1))
            out.extend(
                encode_gsv(
                    SatellitesInView(
                        talker=talker,
                        system=system,
                        signal_id=None,
                        band=0,
                        n_in_view=int(cols.size),
                        sat=block.sat[cols].astype(np.int16),
                        elevation_deg=np.degrees(g.el_rad[e, cols]),
                        azimuth_deg=np.degrees(g.az_rad[e, cols]),
                        cn0_dbhz=block.cn0_dbhz[e, cols, 0].astype(np.float64),
                    )
                )
            )
        sigma = 0.4 * hdop
        out.append(
            encode_gst(
                GstErrors(
                    talker="GN",
                    time_utc=t,
                    rms_m=1.2 * sigma,
                    major_m=sigma,
                    minor_m=0.8 * sigma,
                    orient_deg=35.0,
                    lat_sigma_m=0.9 * sigma,
                    lon_sigma_m=0.85 * sigma,
                    alt_sigma_m=1.6 * sigma,
                )
            )
        )
        return out

    def epoch_bytes(self, block: SimBlock, e: int) -> bytes:
        """Everything the receiver sends for epoch ``e`` of ``block`` (b"" inside a stream gap)."""
        if not block.in_stream[e]:
            return b""
        rel = float(block.geometry.epoch_index[e]) / self._sim.scenario.rate_hz
        if any(r.t_s <= rel < r.t_s + r.duration_s for r in self._sim.scenario.restarts):
            return b""  # a rebooting receiver sends nothing at all
        epoch = epoch_of(block, e, self._station.station_id)
        t = epoch.time.total_s
        parts: list[bytes] = []
        if not self._started or _on_grid(rel, self._station_every_s):
            parts.append(self._ref)
        parts.extend(self._ephemerides(t))
        parts.extend(encode_msm(epoch, level=self._msm_level, station_id=self._station.station_id))
        self._started = True
        self.frames_written += len(parts)
        if self._nmea and _on_grid(rel, 1.0):
            gsv = _on_grid(rel, self._gsv_every_s)
            parts.extend(self._nmea_sentences(block, e, epoch.time, gsv=gsv))
        return b"".join(parts)


def _on_grid(rel_s: float, step_s: float) -> bool:
    r = rel_s % step_s
    return r < 1e-6 or step_s - r < 1e-6
