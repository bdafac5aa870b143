"""The order of a burst's urgent work: each station decoded and estimated in turn (as the daemon
runs it now) against all stations decoded first, then all estimated (the hand-over a batched
tick needs; DEVELOPERS.md "What would reach the line").

    .venv/bin/python bench/bench_burst_order.py [--stations N] [--bursts B] [--sleep S]

N stations (``FramingCore`` + ``StationPipeline(defer=True, slack=True)``, as the daemon builds
them) take the simulator's invented quiet-day stream past ``--warm-up`` seconds (the steady state
past the 5-min ROTI window). Then bursts alternate between the two orders, each after ``--sleep``
seconds (0.5: as the daemon lives at 1 Hz, its caches gone cold meanwhile; 0: back to back), and
the time from the first station's ``feed`` to the last station's estimate is taken. The settles
and the slack work run after each burst, untimed. Both orders do the same work on the same
stations: "phased" only holds each station's epoch (its route swapped for one that keeps it)
until every station's frames are decoded, then routes the held epochs in station order. No
publishing: what this measures is the interpreter's and numpy's cost of the order alone. (In the
daemon, end to end, the order alone did not move the p99: DEVELOPERS.md, "What would reach the
line".)

Figures depend on the machine and on other load (shared dev boxes: note contention).
"""

from __future__ import annotations

import argparse
import gc
import statistics
import time
from typing import Any

from ionwarden.daemon.estimator import StationPipeline
from ionwarden.daemon.estimator._tick import TickBatch
from ionwarden.daemon.runtime import FramingCore
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream


def _stations(n: int, chunks: list[bytes], warm_up: int, start: Any) -> list[FramingCore]:
    cores = []
    for i in range(n):
        pipe = StationPipeline(f"ST{i:02d}", reference_time=start, defer=True, slack=True)
        cores.append(FramingCore(consumer=pipe, defer=True))
    for chunk in chunks[:warm_up]:
        for core in cores:
            core.feed(chunk)
            core.settle()
            core.settle_slack()
    return cores


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--stations", type=int, default=10, help="stations (default 10: a worker's)")
    ap.add_argument("--bursts", type=int, default=60, help="bursts of each order (default 60)")
    ap.add_argument("--sleep", type=float, default=0.5, help="seconds before each burst")
    ap.add_argument("--warm-up", type=int, default=330, help="seconds of stream first (330)")
    ap.add_argument(
        "--batched",
        action="store_true",
        help="a third order: all decoded first, then every estimate as one TickBatch tick",
    )
    args = ap.parse_args()

    sc = build_scenario("quiet-day", duration_s=args.warm_up + 3 * args.bursts + 5.0)
    chunks = [data for _, data in iter_stream(Simulator(sc), 0)]
    cores = _stations(args.stations, chunks, args.warm_up, sc.start)
    pipes: list[StationPipeline] = [c._consumer for c in cores]  # type: ignore[misc]
    held: list[Any] = [None] * len(pipes)
    routes = []  # (epoch type, the station's own route)
    for p in pipes:
        key = next(k for k, v in p._routes.items() if getattr(v, "__name__", "") == "_on_epoch")
        routes.append((key, p._routes[key]))

    def holder(i: int) -> Any:
        def hold(epoch: object) -> None:
            held[i] = epoch

        return hold

    holders = [holder(i) for i in range(len(pipes))]
    orders = ("interleaved", "phased", "batched") if args.batched else ("interleaved", "phased")
    times: dict[str, list[float]] = {o: [] for o in orders}
    tick = TickBatch()
    gc.disable()  # (a collection inside one timed burst would count against its order)
    k = args.warm_up
    for b in range(len(orders) * args.bursts):
        order = orders[b % len(orders)]
        chunk = chunks[k]
        k += 1
        time.sleep(args.sleep)
        if order == "interleaved":
            t0 = time.perf_counter()
            for core in cores:
                core.feed(chunk)
            t1 = time.perf_counter()
        else:
            for p, hold, (key, _) in zip(pipes, holders, routes, strict=True):
                p._routes[key] = hold
            t0 = time.perf_counter()
            for core in cores:
                core.feed(chunk)
            if order == "phased":
                for epoch, (_, route) in zip(held, routes, strict=True):
                    route(epoch)
            else:  # the held epochs as one tick, then what routing each does besides
                snaps = tick.update([(p.estimator, e) for p, e in zip(pipes, held, strict=True)])
                for p, e, s in zip(pipes, held, snaps, strict=True):
                    p.finish_epoch(e, s)
            t1 = time.perf_counter()
            for p, (key, route) in zip(pipes, routes, strict=True):
                p._routes[key] = route
        times[order].append((t1 - t0) * 1e3)
        for core in cores:
            core.settle()
        for core in cores:
            core.settle_slack()
    print(
        f"{args.stations} stations, {args.bursts} bursts of each order, {args.sleep} s before each "
        f"(steady state past {args.warm_up} s of the simulator's quiet day):"
    )
    for order, v in times.items():
        v.sort()
        print(
            f"  {order:<11}  median {statistics.median(v):.2f} ms  p90 {v[int(0.9 * len(v))]:.2f} ms"
            f"  min {v[0]:.2f} ms"
        )

    if args.batched:
        print(
            f"  (tick: {tick.served_batched} station-epochs by the shared core, "
            f"{tick.served_alone} by their own paths)"
        )


if __name__ == "__main__":
    main()
