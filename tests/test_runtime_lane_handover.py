"""StepLane's direct hand-overs (``done()`` handing the lane straight to the next waiter, and
``done_then_turn``) against the lane that decided every hand-over in a callback of the next loop
iteration (the previous implementation, kept as an oracle in test_runtime_machinery_oracle.py):
the same steps in the same order for a burst, and the lane's promises kept when steps arrive
over several loop iterations."""

from __future__ import annotations

import asyncio
import random
from typing import Any

import pytest

from ionwarden.daemon.runtime import StepLane

from .test_runtime_machinery_oracle import OldStepLane


async def _order(
    lane_cls: Any, seed: int, *, combined: bool, stagger: bool, checks: list[str] | None = None
) -> list[str]:
    """Bursts of stations (urgent step, then for some a background step: with ``combined``,
    through ``done_then_turn``), background ticks among them, arriving together or (``stagger``)
    over a few loop iterations; the order in which the steps ran. ``checks`` collects breaches
    of the lane's promises: two steps in one loop iteration, a background step starting while an
    urgent step waits, urgent steps out of their order of arrival."""
    rnd = random.Random(seed)
    lane = lane_cls()
    log: list[str] = []
    loop = asyncio.get_running_loop()
    iteration = 0
    ran_in: set[int] = set()
    arrived: list[str] = []
    served: list[str] = []

    def count() -> None:
        nonlocal iteration
        iteration += 1
        loop.call_soon(count)

    def started(what: str) -> None:
        if checks is None:
            return
        if iteration in ran_in:
            checks.append(f"{what}: a second step in iteration {iteration}")
        ran_in.add(iteration)

    ticker = loop.call_soon(count)

    async def later(n: int) -> None:
        for _ in range(n):
            await asyncio.sleep(0)

    async def station(name: str, delay: int, deferred: bool) -> None:
        await later(delay)
        arrived.append(name)
        await lane.turn()
        served.append(name)
        try:
            started(f"urgent {name}")
            log.append(f"urgent {name}")
        except BaseException:  # pragma: no cover - the step does not fail
            lane.done()
            raise
        if not deferred:
            lane.done()
            return
        if combined:
            await lane.done_then_turn(background=True)
        else:
            lane.done()
            await lane.turn(background=True)
        try:
            started(f"background {name}")
            log.append(f"background {name}")
        finally:
            lane.done()

    async def tick(name: str, delay: int) -> None:
        await later(delay)
        await lane.turn(background=True)
        try:
            started(f"tick {name}")
            log.append(f"tick {name}")
        finally:
            lane.done()

    for burst in range(6):
        async with asyncio.TaskGroup() as tg:
            for i in range(rnd.randrange(1, 10)):
                tg.create_task(
                    station(
                        f"s{burst}.{i}", rnd.randrange(6) if stagger else 0, rnd.random() < 0.7
                    ),
                    name=f"daemon.estimate[s{i}]",
                )
            for k in range(rnd.randrange(3)):
                tg.create_task(
                    tick(f"{burst}.{k}", rnd.randrange(8) if stagger else 0),
                    name="daemon.status[all]",
                )
        log.append(f"end of burst {burst}")
        await later(3)
        assert lane.waiting == 0
    ticker.cancel()
    if checks is not None and served != arrived:
        checks.append("urgent steps out of their order of arrival")
    return log


@pytest.mark.parametrize("seed", range(20))
def test_step_lane_hands_on_a_burst_in_the_previous_order(seed: int) -> None:
    """StepLane serves the urgent and background steps (done() then turn(), or done_then_turn)
    of epochs arriving together in the same order as the lane that decided each hand-over in
    the next iteration's callback (equal to the previous implementation (oracle copy))."""
    old = asyncio.run(_order(OldStepLane, seed, combined=False, stagger=False))
    assert asyncio.run(_order(StepLane, seed, combined=False, stagger=False)) == old
    assert asyncio.run(_order(StepLane, seed, combined=True, stagger=False)) == old


@pytest.mark.parametrize("combined", [False, True], ids=["done-turn", "done_then_turn"])
@pytest.mark.parametrize("seed", range(20))
def test_step_lane_keeps_its_promises_with_staggered_arrivals(seed: int, combined: bool) -> None:
    """StepLane, with steps arriving over several loop iterations (where a faster hand-over
    changes which step finds the lane when: timing, not order), still runs one step per loop
    iteration and serves urgent steps first come first served (the promises of _lane.py's
    docstring; the classes' priority is the burst test's)."""
    checks: list[str] = []
    asyncio.run(_order(StepLane, seed, combined=combined, stagger=True, checks=checks))
    assert checks == []


def test_step_lane_done_then_turn_comes_back_an_iteration_sooner() -> None:
    """StepLane.done_then_turn gives a lone station its background step in the next loop
    iteration (the callback hand-over took two), still after a poll of I/O: not in the same
    iteration as its urgent step."""

    async def iterations(combined: bool) -> int:
        lane = StepLane()
        count = 0
        stop = False

        def counter() -> None:
            nonlocal count
            count += 1
            if not stop:
                asyncio.get_running_loop().call_soon(counter)

        await lane.turn()
        asyncio.get_running_loop().call_soon(counter)
        if combined:
            await lane.done_then_turn(background=True)
        else:
            lane.done()
            await lane.turn(background=True)
        stop = True
        lane.done()
        return count

    assert asyncio.run(iterations(combined=False)) == 2
    assert asyncio.run(iterations(combined=True)) == 1


async def _claimed_order(
    lane_cls: Any, seed: int, *, claim: bool, stagger: bool, checks: list[str] | None = None
) -> list[str]:
    """Bursts as in :func:`_order` (urgent step, then for some a background step through
    ``done_then_turn``, background ticks among them), each station's bytes arriving in a callback
    (as the TCP push does): with ``claim`` the callback claims the turn (``StepLane.claim``) and
    the task wakes up with it, else it wakes the task, which asks for its turn (``turn()``)."""
    rnd = random.Random(seed)
    lane = lane_cls()
    log: list[str] = []
    loop = asyncio.get_running_loop()
    iteration = 0
    ran_in: set[int] = set()
    arrived: list[str] = []
    served: list[str] = []

    def count() -> None:
        nonlocal iteration
        iteration += 1
        loop.call_soon(count)

    def started(what: str) -> None:
        if checks is None:
            return
        if iteration in ran_in:
            checks.append(f"{what}: a second step in iteration {iteration}")
        ran_in.add(iteration)

    ticker = loop.call_soon(count)

    async def later(n: int) -> None:
        for _ in range(n):
            await asyncio.sleep(0)

    async def station(name: str, delay: int, deferred: bool) -> None:
        fut: asyncio.Future[bool] = loop.create_future()

        def received() -> None:  # the I/O callback
            arrived.append(name)
            if claim:
                lane.claim(fut)
            else:
                fut.set_result(False)

        await later(delay)
        loop.call_soon(received)
        await fut
        if not claim:
            await lane.turn()
        served.append(name)
        started(f"urgent {name}")
        log.append(f"urgent {name}")
        if not deferred:
            lane.done()
            return
        if lane_cls is OldStepLane:  # (it had no done_then_turn)
            lane.done()
            await lane.turn(background=True)
        else:
            await lane.done_then_turn(background=True)
        try:
            started(f"background {name}")
            log.append(f"background {name}")
        finally:
            lane.done()

    async def tick(name: str, delay: int) -> None:
        await later(delay)
        await lane.turn(background=True)
        try:
            started(f"tick {name}")
            log.append(f"tick {name}")
        finally:
            lane.done()

    for burst in range(6):
        async with asyncio.TaskGroup() as tg:
            for i in range(rnd.randrange(1, 10)):
                tg.create_task(
                    station(
                        f"s{burst}.{i}", rnd.randrange(6) if stagger else 0, rnd.random() < 0.7
                    ),
                    name=f"daemon.estimate[s{i}]",
                )
            for k in range(rnd.randrange(3)):
                tg.create_task(
                    tick(f"{burst}.{k}", rnd.randrange(8) if stagger else 2),
                    name="daemon.status[all]",
                )
        log.append(f"end of burst {burst}")
        await later(3)
        assert lane.waiting == 0
    ticker.cancel()
    if checks is not None and served != arrived:
        checks.append("urgent steps out of their order of arrival")
    return log


@pytest.mark.parametrize("seed", range(20))
def test_step_lane_claimed_turns_serve_a_burst_in_the_previous_order(seed: int) -> None:
    """StepLane.claim (the turn asked for by the callback that queued a station's bytes) serves
    a burst's urgent and background steps in the same order as the station tasks asking for
    their turns themselves, on the lane that decided every hand-over in the next iteration's
    callback (equal to the previous implementation (oracle copy))."""
    old = asyncio.run(_claimed_order(OldStepLane, seed, claim=False, stagger=False))
    assert asyncio.run(_claimed_order(StepLane, seed, claim=False, stagger=False)) == old
    assert asyncio.run(_claimed_order(StepLane, seed, claim=True, stagger=False)) == old


@pytest.mark.parametrize("seed", range(20))
def test_step_lane_claimed_turns_keep_the_promises(seed: int) -> None:
    """StepLane.claim, with bytes arriving over several loop iterations (a claim may take a lane
    whose next step done() left to the next iteration), still runs one step per loop iteration
    and serves urgent steps first come first served."""
    checks: list[str] = []
    asyncio.run(_claimed_order(StepLane, seed, claim=True, stagger=True, checks=checks))
    assert checks == []
