"""``ionwarden simulate``: generate an invented scenario's receiver stream, RINEX files and truth."""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import sys
import textwrap
from pathlib import Path
from typing import IO, TYPE_CHECKING

from ionwarden.daemon.errors import ConfigError

from ._common import die

if TYPE_CHECKING:
    from collections.abc import Callable, Iterator

    from ionwarden.daemon.sim import Simulator

__all__ = ["add_parser", "run"]

_LOG = logging.getLogger("ionwarden.daemon.cli")
#: Scenario field named in a validation message → the option that sets it.
_FIELD_OPTIONS = {"duration_s": "--duration", "rate_hz": "--rate", "systems": "--systems"}


def _epilog() -> str:
    from ionwarden.daemon.sim import SCENARIO_HELP  # noqa: PLC0415 - keep `--help` of others light

    lines = ["scenarios (all invented; times from 2026-03-18 12:00 UTC):"]
    for name, text in SCENARIO_HELP.items():
        lines += textwrap.wrap(
            text, width=98, initial_indent=f"  {name:<18} ", subsequent_indent=" " * 21
        )
    lines += [
        "",
        "outputs: --out FILE writes the RTCM 3 + NMEA stream (one file per station, named",
        "FILE with -STATION before the suffix when there are several; '-' sends the first",
        "station, or --station, to stdout); --rinex DIR writes RINEX 3.04 <STATION>.rnx per",
        "station and nav.rnx; --truth FILE writes the truth table plus FILE-biases.csv and,",
        "with several stations, FILE-gradients.csv. --serve tcp|ntrip serves on loopback for",
        "ingest tests (NTRIP: one mount per station, named after it, unless --station picks",
        "one, served as --mount) and stops after --clients connections.",
        "Same scenario + seed + options gives byte-identical output.",
    ]
    return "\n".join(lines)


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    from ionwarden.daemon.sim import scenario_names  # noqa: PLC0415

    p = sub.add_parser(
        "simulate",
        help="generate an invented scenario's receiver stream, RINEX and truth",
        description="Simulate GNSS observations (GPS, GLONASS, Galileo, BeiDou) at invented "
        "sites under an invented ionosphere, with the truth to check an estimator against.",
        epilog=_epilog(),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--scenario", default="quiet-day", choices=scenario_names(), help="scenario")
    p.add_argument("--seed", type=int, default=1, help="random seed (default 1)")
    p.add_argument("--duration", type=float, default=None, help="seconds (default: scenario's)")
    p.add_argument("--rate", type=float, default=None, help="epochs per second (default 1)")
    p.add_argument("--systems", default=None, help="subset of GREC (default GREC)")
    p.add_argument("--second-order", action="store_true", help="add the 2nd-order iono term")
    p.add_argument("--out", default=None, help="stream file, '-' for stdout")
    p.add_argument("--station", default=None, help="only this station (stream/serve outputs)")
    p.add_argument("--msm", type=int, choices=(4, 7), default=7, help="MSM level (default 7)")
    p.add_argument("--no-nmea", action="store_true", help="RTCM only, no NMEA sentences")
    p.add_argument("--rinex", default=None, metavar="DIR", help="write RINEX 3.04 files here")
    p.add_argument("--truth", default=None, metavar="FILE", help="write the truth CSV here")
    p.add_argument("--serve", choices=("tcp", "ntrip"), default=None, help="serve on loopback")
    p.add_argument("--host", default="127.0.0.1", help="loopback address to bind (serve)")
    p.add_argument("--port", type=int, default=0, help="port (serve; 0 = any free port)")
    p.add_argument("--speed", type=float, default=1.0, help="× real time (serve; 0 = flat out)")
    p.add_argument("--clients", type=int, default=1, help="connections to serve, then stop")
    p.add_argument("--mount", default="SIM", help="NTRIP mount point name")
    p.add_argument("--idle-timeout", type=float, default=60.0, help="stop if nobody connects (s)")


def _build(args: argparse.Namespace) -> Simulator:
    from dataclasses import replace  # noqa: PLC0415

    from ionwarden.daemon.sim import Simulator, build_scenario  # noqa: PLC0415

    try:
        sc = build_scenario(
            args.scenario, seed=args.seed, duration_s=args.duration, rate_hz=args.rate
        )
        if args.systems is not None:
            sc = replace(sc, systems=args.systems.upper())
        if args.second_order:
            sc = replace(sc, second_order=True)
    except ValueError as exc:
        text = str(exc)
        option = next((o for f, o in _FIELD_OPTIONS.items() if text.startswith(f)), "--scenario")
        raise ConfigError(option, text) from exc
    return Simulator(sc)


def _station_index(sim: Simulator, name: str | None) -> int | None:
    if name is None:
        return None
    names = [s.name for s in sim.scenario.stations]
    if name not in names:
        raise ConfigError("--station", f"{name!r} is not in this scenario ({', '.join(names)})")
    return names.index(name)


def _stream_path(out: str, station: str, several: bool) -> Path:
    p = Path(out)
    return p.with_name(f"{p.stem}-{station}{p.suffix}") if several else p


def _serve(args: argparse.Namespace, sim: Simulator, station: int | None) -> int:
    from ionwarden.daemon.sim import ServeOptions, iter_stream, serve_ntrip, serve_tcp  # noqa: PLC0415

    opts = ServeOptions(
        host=args.host,
        port=args.port,
        speed=max(args.speed, 0.0),
        max_clients=args.clients,
        idle_timeout_s=args.idle_timeout,
        mount=args.mount,
    )

    def factory_for(index: int) -> Callable[[], Iterator[tuple[float, bytes]]]:
        def factory() -> Iterator[tuple[float, bytes]]:
            return iter_stream(sim, index, msm_level=args.msm, nmea=not args.no_nmea)

        return factory

    if args.serve == "ntrip":
        stations = sim.scenario.stations
        if station is None and len(stations) > 1:  # one mount per station, named after it
            mounts = {st.name: factory_for(i) for i, st in enumerate(stations)}
            sent = asyncio.run(serve_ntrip(mounts, opts))
        else:
            sent = asyncio.run(serve_ntrip(factory_for(station or 0), opts))
    else:
        sent = asyncio.run(serve_tcp(factory_for(station or 0), opts))
    _LOG.info("simulate: served %d bytes", sent)
    return 0


def _files(args: argparse.Namespace, sim: Simulator, only: int | None) -> int:
    from ionwarden.daemon.sim import Sinks, run_to_sinks  # noqa: PLC0415

    stations = sim.scenario.stations
    with contextlib.ExitStack() as stack:
        sinks = Sinks()
        chosen = [only] if only is not None else list(range(len(stations)))
        streams: list[IO[bytes] | None] = [None] * len(stations)
        if args.out == "-":
            streams[chosen[0]] = sys.stdout.buffer
        elif args.out is not None:
            for i in chosen:
                path = _stream_path(args.out, stations[i].name, len(chosen) > 1)
                path.parent.mkdir(parents=True, exist_ok=True)
                streams[i] = stack.enter_context(path.open("wb"))
        sinks.streams = streams
        if args.rinex is not None:
            d = Path(args.rinex)
            d.mkdir(parents=True, exist_ok=True)
            sinks.rinex_obs = [
                stack.enter_context((d / f"{st.name}.rnx").open("w", encoding="ascii"))
                for st in stations
            ]
            sinks.rinex_nav = stack.enter_context((d / "nav.rnx").open("w", encoding="ascii"))
        if args.truth is not None:
            tp = Path(args.truth)
            tp.parent.mkdir(parents=True, exist_ok=True)
            sinks.truth = stack.enter_context(tp.open("w", encoding="utf-8"))
            sinks.biases = stack.enter_context(
                tp.with_name(f"{tp.stem}-biases.csv").open("w", encoding="utf-8")
            )
            if len(stations) > 1:
                sinks.gradients = stack.enter_context(
                    tp.with_name(f"{tp.stem}-gradients.csv").open("w", encoding="utf-8")
                )
        summary = run_to_sinks(sim, sinks, msm_level=args.msm, nmea=not args.no_nmea)
    _LOG.info(
        "simulate: %s, %d epochs, stream bytes %s, RINEX epochs %s, %d nav records",
        sim.scenario.name,
        summary.epochs,
        summary.stream_bytes,
        summary.rinex_epochs,
        summary.nav_records,
    )
    return 0


def run(args: argparse.Namespace) -> int:
    try:
        sim = _build(args)
        only = _station_index(sim, args.station)
        if args.serve is not None:
            return _serve(args, sim, only)
        if args.out is None and args.rinex is None and args.truth is None:
            return die("simulate: nothing to write: give --out, --rinex, --truth or --serve")
        return _files(args, sim, only)
    except ConfigError as exc:
        return die(f"simulate: {exc}")
    except OSError as exc:
        return die(f"simulate: {exc}", 1)
