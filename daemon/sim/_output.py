"""Drive a simulation into its sinks: byte streams, RINEX 3.04 files and truth tables.

One pass over the blocks writes everything that was asked for. Sinks are opened by the caller
(the CLI) and passed in; this module only formats and writes. No clock is read: the RINEX
"PGM / RUN BY / DATE" date is the scenario start.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import IO, TYPE_CHECKING

import numpy as np

from ionwarden.parsers import (
    GlonassEphemeris,
    KeplerEphemeris,
    RinexObsHeader,
    format_obs_epoch,
    format_obs_header,
    gps_to_utc,
    leap_seconds_at,
    write_rinex_nav,
)

from ._plan import SIGNAL_PLAN
from ._stream import StreamComposer, block_epochs
from ._truth import format_biases, format_gradients, format_truth

if TYPE_CHECKING:
    from collections.abc import Iterator

    from ._engine import Simulator

__all__ = ["SimSummary", "Sinks", "iter_stream", "nav_ephemerides", "rinex_header", "run_to_sinks"]


@dataclass(slots=True)
class Sinks:
    """Where each output goes (``None``: not written). Lists are per station."""

    streams: list[IO[bytes] | None] = field(default_factory=list)
    rinex_obs: list[IO[str] | None] = field(default_factory=list)
    rinex_nav: IO[str] | None = None
    truth: IO[str] | None = None
    biases: IO[str] | None = None
    gradients: IO[str] | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class SimSummary:
    epochs: int
    stream_bytes: tuple[int, ...]
    rinex_epochs: tuple[int, ...]
    nav_records: int


def rinex_header(sim: Simulator, station: int) -> RinexObsHeader:
    """RINEX 3.04 observation header of one simulated station (all planned signals)."""
    st = sim.scenario.stations[station]
    obs_types = {
        system: tuple(
            f"{kind}{spec.code}" for spec in SIGNAL_PLAN[system] for kind in ("C", "L", "D", "S")
        )
        for system in sim.scenario.systems
    }
    glo = {
        int(s): int(k)
        for s, k in zip(sim.sats.tolist(), sim.constellation.glo_channel.tolist(), strict=True)
        if s // 100 == 1
    }
    start = gps_to_utc(sim.scenario.start)
    x, y, z = (float(v) for v in sim.station_ecef(station))
    return RinexObsHeader(
        version=3.04,
        program="ionwarden simulate",
        run_by="ionwarden",
        date=start.strftime("%Y%m%d %H%M%S UTC"),
        marker_name=st.name,
        marker_type="GEODETIC",
        observer="simulated",
        agency="ionwarden (invented site)",
        receiver_number="SIM-0001",
        receiver_type="IONWARDEN SIMULATOR",
        receiver_version="1",
        antenna_number="0",
        antenna_type="SIMULATED NONE",
        approx_position_m=(x, y, z),
        obs_types=obs_types,
        interval_s=sim.scenario.interval_s,
        time_of_first_obs=sim.scenario.start,
        time_system="GPS",
        glonass_channels=glo,
        leap_seconds=leap_seconds_at(start),
        comments=(f"scenario {sim.scenario.name} seed {sim.scenario.seed} (invented data)",),
    )


def nav_ephemerides(sim: Simulator) -> list[KeplerEphemeris | GlonassEphemeris]:
    """Every ephemeris set in force during the scenario, by system then set."""
    t0 = sim.scenario.start.total_s
    t1 = t0 + sim.scenario.duration_s
    out: list[KeplerEphemeris | GlonassEphemeris] = []
    for series in sim.constellation.series.values():
        stops = np.append(series.start_gps_s[1:], math.inf)
        for k, ephs in enumerate(series.ephemerides):
            if series.start_gps_s[k] <= t1 and stops[k] > t0:
                out.extend(ephs)
    return out


def run_to_sinks(
    sim: Simulator, sinks: Sinks, *, msm_level: int = 4, nmea: bool = True
) -> SimSummary:
    """Run the whole scenario once, writing every requested output."""
    stations = sim.scenario.stations
    n_st = len(stations)
    streams = (sinks.streams + [None] * n_st)[:n_st]
    obs = (sinks.rinex_obs + [None] * n_st)[:n_st]
    composers = [
        StreamComposer(sim, i, msm_level=msm_level, nmea=nmea) if streams[i] else None
        for i in range(n_st)
    ]
    headers = [rinex_header(sim, i) if obs[i] else None for i in range(n_st)]
    sizes = [0] * n_st
    rinex_n = [0] * n_st
    for i, out in enumerate(obs):
        hdr = headers[i]
        if out is not None and hdr is not None:
            out.write(format_obs_header(hdr))
    first = True
    epochs = 0
    for blocks in sim.run():
        epochs += blocks[0].present.shape[0]
        for i, block in enumerate(blocks):
            comp = composers[i]
            sink = streams[i]
            if comp is not None and sink is not None:
                for e in range(block.present.shape[0]):
                    data = comp.epoch_bytes(block, e)
                    sink.write(data)
                    sizes[i] += len(data)
            out = obs[i]
            hdr = headers[i]
            if out is not None and hdr is not None:
                for epoch in block_epochs(block, stations[i].station_id):
                    out.write(format_obs_epoch(epoch, hdr.obs_types, time_system="GPS"))
                    rinex_n[i] += 1
            if sinks.truth is not None:
                sinks.truth.write(format_truth(block, stations[i].name, header=first and i == 0))
            if sinks.biases is not None and first:
                sig = sim.signals
                sinks.biases.write(
                    format_biases(
                        stations[i].name,
                        sat=sim.sats,
                        code=sig.code,
                        freq_hz=sig.freq_hz,
                        sat_bias_m=sig.sat_bias_m,
                        rx_bias_m=sim.rx_bias_m[i][sim.sats.astype(np.intp) // 100],
                        header=i == 0,
                    )
                )
        if sinks.gradients is not None:
            base = sim.station_ecef(0)
            for i in range(1, n_st):
                km = float(np.linalg.norm(sim.station_ecef(i) - base)) / 1000.0
                sinks.gradients.write(
                    format_gradients(
                        blocks[0],
                        blocks[i],
                        base_name=stations[0].name,
                        rover_name=stations[i].name,
                        baseline_km=km,
                        header=first and i == 1,
                    )
                )
        first = False
    nav_n = 0
    if sinks.rinex_nav is not None:
        nav_n = write_rinex_nav(
            sinks.rinex_nav,
            nav_ephemerides(sim),
            leap_seconds=leap_seconds_at(gps_to_utc(sim.scenario.start)),
            date=gps_to_utc(sim.scenario.start).strftime("%Y%m%d %H%M%S UTC"),
        )
    return SimSummary(
        epochs=epochs, stream_bytes=tuple(sizes), rinex_epochs=tuple(rinex_n), nav_records=nav_n
    )


def iter_stream(
    sim: Simulator,
    station: int = 0,
    *,
    msm_level: int = 4,
    nmea: bool = True,
    gsv_every_s: float = 1.0,
) -> Iterator[tuple[float, bytes]]:
    """(epoch time from the start in s, bytes) of one station, epoch by epoch (for servers)."""
    comp = StreamComposer(sim, station, msm_level=msm_level, nmea=nmea, gsv_every_s=gsv_every_s)
    start = sim.scenario.start.total_s
    for blocks in sim.run():
        block = blocks[station]
        for e in range(block.present.shape[0]):
            yield float(block.geometry.t_tag_s[e] - start), comp.epoch_bytes(block, e)
