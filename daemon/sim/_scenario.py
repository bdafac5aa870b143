"""Scenario description: stations, ionosphere, events and output settings, all invented.

A :class:`Scenario` is a frozen value; :func:`build_scenario` makes the named ones. Times inside a
scenario are seconds from its start (``start``, a GPS time), so a scenario can be shortened with
``--duration`` without moving its events. Nothing here reads a clock.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field, replace

from ionwarden.parsers import GpsTime, utc_to_gps

__all__ = [
    "L2_BAND_MHZ",
    "SCENARIO_HELP",
    "BandOutage",
    "LossOfLock",
    "ReceiverRestart",
    "Scenario",
    "ScintillationWindow",
    "SlipEvent",
    "Station",
    "StormFront",
    "StreamGap",
    "build_scenario",
    "scenario_names",
]


#: The L2 band (MHz): GPS L2 1227.60 and GLONASS G2 1242.94–1248.63 (k = −7…+6).
L2_BAND_MHZ = (1215.0, 1254.0)


@dataclass(frozen=True, slots=True, kw_only=True)
class Station:
    """One invented receiver site (WGS 84 geodetic position)."""

    name: str
    station_id: int
    lat_deg: float
    lon_deg: float
    height_m: float


@dataclass(frozen=True, slots=True, kw_only=True)
class StormFront:
    """A travelling front of enhanced TEC: a tanh step that moves across the shell.

    The enhancement at a pierce point is ``amplitude_tecu · ½(1 + tanh(s / width_km))`` with ``s`` the
    distance (km) of the point behind the front line, which moves at ``speed_mps`` towards
    ``heading_deg`` (the direction of travel, clockwise from north) and crosses ``origin`` at
    ``t_cross_s``. The whole storm rises and decays with ``onset_s`` … ``end_s`` (ramp ``ramp_s``).
    Peak gradient is ``amplitude / (2 · width)`` TECU/km.
    """

    origin_lat_deg: float
    origin_lon_deg: float
    heading_deg: float
    speed_mps: float
    t_cross_s: float
    amplitude_tecu: float
    width_km: float
    onset_s: float
    end_s: float
    ramp_s: float = 900.0


@dataclass(frozen=True, slots=True, kw_only=True)
class ScintillationWindow:
    """Phase scintillation: fast STEC fluctuations (TECU rms) and C/N0 fading in a time window."""

    start_s: float
    end_s: float
    rms_tecu: float
    fade_db: float = 6.0
    #: Fraction of satellites affected (chosen by the scenario seed).
    fraction: float = 0.6


@dataclass(frozen=True, slots=True, kw_only=True)
class SlipEvent:
    """Cycle slip of ``cycles`` on the given signals (empty tuple = all signals) of one satellite.

    ``half_cycle`` adds half a cycle and raises the half-cycle flag for ``half_flag_s``;
    ``lock_reset`` False makes a silent slip (lock time keeps growing) for detector tests.
    ``sat`` of -1 picks the highest visible satellite at that time.
    """

    t_s: float
    sat: int
    cycles: int
    signals: tuple[str, ...] = ()
    half_cycle: bool = False
    lock_reset: bool = True
    half_flag_s: float = 20.0


@dataclass(frozen=True, slots=True, kw_only=True)
class LossOfLock:
    """All signals of one satellite (-1: highest visible) are lost for ``duration_s``."""

    t_s: float
    sat: int
    duration_s: float


@dataclass(frozen=True, slots=True, kw_only=True)
class BandOutage:
    """Interference on one frequency band for a time window: every signal whose carrier lies in
    ``[low_mhz, high_mhz]`` is hit (by frequency, not by RINEX band digit: BeiDou "2I" is B1I at
    1561 MHz, far from GPS L2). The default band, 1215–1254 MHz, holds GPS L2 and GLONASS G2.

    ``drop_db`` None means the signals are lost; otherwise C/N0 falls by that many dB.
    """

    start_s: float
    end_s: float
    low_mhz: float = L2_BAND_MHZ[0]
    high_mhz: float = L2_BAND_MHZ[1]
    drop_db: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class ReceiverRestart:
    """The receiver reboots: no data for ``duration_s``, then every arc and the clock start anew."""

    t_s: float
    duration_s: float


@dataclass(frozen=True, slots=True, kw_only=True)
class StreamGap:
    """The byte stream (and RINEX) carries nothing in the window; truth still lists the epochs."""

    start_s: float
    end_s: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Scenario:
    """Everything the simulator needs, except the output choices."""

    name: str
    start: GpsTime
    duration_s: float
    rate_hz: float
    seed: int
    stations: tuple[Station, ...]
    systems: str = "GREC"
    background_vtec_tecu: float = 8.0
    diurnal_vtec_tecu: float = 14.0
    storm: StormFront | None = None
    scintillation: tuple[ScintillationWindow, ...] = ()
    slips: tuple[SlipEvent, ...] = ()
    losses: tuple[LossOfLock, ...] = ()
    outages: tuple[BandOutage, ...] = ()
    restarts: tuple[ReceiverRestart, ...] = ()
    gaps: tuple[StreamGap, ...] = ()
    elevation_mask_deg: float = 5.0
    shell_height_m: float = 350_000.0
    second_order: bool = False
    description: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        if self.duration_s <= 0:
            raise ValueError(f"duration_s must be positive, got {self.duration_s}")
        if not 0.0 < self.rate_hz <= 20.0:
            raise ValueError(f"rate_hz must be in (0, 20], got {self.rate_hz}")
        if not self.stations:
            raise ValueError("a scenario needs at least one station")
        bad = set(self.systems) - set("GREC")
        if bad or not self.systems:
            raise ValueError(f"systems must be a subset of GREC, got {self.systems!r}")

    @property
    def n_epochs(self) -> int:
        return round(self.duration_s * self.rate_hz)

    @property
    def interval_s(self) -> float:
        return 1.0 / self.rate_hz


# --- Invented sites --------------------------------------------------------------------------
# "Harlowe Cut" is an invented road-cutting construction site in an invented county; the rovers
# are placed due east/north-east of it at the stated distances (km along the WGS 84 surface,
# spherical approximation, R = 6371 km).
_BASE = Station(name="HARC", station_id=41, lat_deg=48.6150, lon_deg=10.4230, height_m=512.0)


def _offset(name: str, sid: int, km_east: float, km_north: float) -> Station:
    lat = _BASE.lat_deg + math.degrees(km_north / 6371.0)
    lon = _BASE.lon_deg + math.degrees(km_east / (6371.0 * math.cos(math.radians(_BASE.lat_deg))))
    return Station(name=name, station_id=sid, lat_deg=lat, lon_deg=lon, height_m=480.0)


_START_UTC = _dt.datetime(2026, 3, 18, 12, 0, 0, tzinfo=_dt.UTC)

SCENARIO_HELP: dict[str, str] = {
    "quiet-day": "1 h, one station (HARC), mid-latitude quiet ionosphere with its diurnal cycle "
    "only",
    "storm-front": "2 h, HARC plus rovers at 10, 40 and 80 km; an afternoon front of +30 TECU sweeps "
    "east-north-east at 200 m/s with gradients up to ~120 mm/km, slips (7, 2500 and a silent 1 cycle) and a lock loss",
    "scintillation": "1 h, one station; two windows of phase scintillation (ROTI > 0.5 TECU/min) with "
    "C/N0 fading, a half-cycle slip",
    "band-outage": "1 h, one station; interference in the L2 band (GPS L2, GLONASS G2): C/N0 "
    "−20 dB, then L2 lost; a receiver restart and a stream gap",
    "two-stations-60km": "1 h, HARC and a rover 60 km north-east under a slow front: truth for "
    "between-station gradients",
    "demo": "the bundled demo (20 min from 13:30 UTC): HARC as a construction-site base while an "
    "afternoon front of +25 TECU crosses it, with the L2 band jammed (−18 dB, then lost)",
}


def scenario_names() -> tuple[str, ...]:
    return tuple(SCENARIO_HELP)


def build_scenario(
    name: str,
    *,
    seed: int = 1,
    duration_s: float | None = None,
    rate_hz: float | None = None,
) -> Scenario:
    """The named scenario, optionally with another seed, duration or rate (events keep their times)."""
    start = utc_to_gps(_START_UTC)
    base = Scenario(
        name=name,
        start=start,
        duration_s=3600.0,
        rate_hz=1.0,
        seed=seed,
        stations=(_BASE,),
        description=SCENARIO_HELP.get(name, ""),
    )
    if name == "quiet-day":
        sc = replace(base, duration_s=3600.0, background_vtec_tecu=6.0, diurnal_vtec_tecu=10.0)
    elif name == "storm-front":
        sc = replace(
            base,
            duration_s=7200.0,
            stations=(
                _BASE,
                _offset("HRV1", 42, 10.0, 0.0),
                _offset("HRV2", 43, 34.6, 20.0),
                _offset("HRV3", 44, 69.3, 40.0),
            ),
            storm=StormFront(
                origin_lat_deg=_BASE.lat_deg,
                origin_lon_deg=_BASE.lon_deg,
                heading_deg=65.0,
                speed_mps=200.0,
                t_cross_s=2400.0,
                amplitude_tecu=30.0,
                width_km=20.0,
                onset_s=300.0,
                end_s=6600.0,
            ),
            slips=(
                SlipEvent(t_s=900.0, sat=-1, cycles=7),
                SlipEvent(t_s=1500.0, sat=-1, cycles=2500, signals=("2W", "2C", "7Q", "7I")),
                # A silent one-cycle L1 slip (lock time keeps growing): only the data show it.
                SlipEvent(t_s=3000.0, sat=-1, cycles=1, signals=("1C",), lock_reset=False),
            ),
            losses=(LossOfLock(t_s=2000.0, sat=-1, duration_s=45.0),),
        )
    elif name == "scintillation":
        sc = replace(
            base,
            duration_s=3600.0,
            scintillation=(
                ScintillationWindow(start_s=600.0, end_s=1500.0, rms_tecu=0.8),
                ScintillationWindow(start_s=2400.0, end_s=3000.0, rms_tecu=1.5, fade_db=10.0),
            ),
            slips=(SlipEvent(t_s=1000.0, sat=-1, cycles=0, half_cycle=True, signals=("1C",)),),
        )
    elif name == "band-outage":
        sc = replace(
            base,
            duration_s=3600.0,
            outages=(
                BandOutage(start_s=600.0, end_s=1200.0, drop_db=20.0),
                BandOutage(start_s=1500.0, end_s=2100.0),
            ),
            restarts=(ReceiverRestart(t_s=2700.0, duration_s=30.0),),
            gaps=(StreamGap(start_s=3100.0, end_s=3130.0),),
        )
    elif name == "two-stations-60km":
        sc = replace(
            base,
            duration_s=3600.0,
            stations=(_BASE, _offset("HRV6", 46, 42.4, 42.4)),
            storm=StormFront(
                origin_lat_deg=_BASE.lat_deg,
                origin_lon_deg=_BASE.lon_deg,
                heading_deg=45.0,
                speed_mps=120.0,
                t_cross_s=1800.0,
                amplitude_tecu=15.0,
                width_km=40.0,
                onset_s=0.0,
                end_s=3600.0,
            ),
        )
    elif name == "demo":
        sc = replace(
            base,
            start=utc_to_gps(_START_UTC + _dt.timedelta(minutes=90)),
            duration_s=1200.0,
            storm=StormFront(
                origin_lat_deg=_BASE.lat_deg,
                origin_lon_deg=_BASE.lon_deg,
                heading_deg=70.0,
                speed_mps=150.0,
                t_cross_s=600.0,
                amplitude_tecu=25.0,
                width_km=25.0,
                onset_s=0.0,
                end_s=3000.0,
                ramp_s=300.0,
            ),
            outages=(
                BandOutage(start_s=780.0, end_s=900.0, drop_db=18.0),
                BandOutage(start_s=900.0, end_s=1020.0),
            ),
            slips=(SlipEvent(t_s=300.0, sat=-1, cycles=11),),
        )
    else:
        raise ValueError(f"unknown scenario {name!r}: choose one of {', '.join(SCENARIO_HELP)}")
    if duration_s is not None:
        sc = replace(sc, duration_s=float(duration_s))
    if rate_hz is not None:
        sc = replace(sc, rate_hz=float(rate_hz))
    return sc
