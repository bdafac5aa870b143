"""StepLane's gate (``[runtime] ack_priority_ms``): background steps (settles, slack work, the
status tick) wait while the publisher awaits the acknowledgements of what it just sent, each for
``hold_s`` at most, so that the broker gets a CPU before the deferred work and the PUBACKs are read
as they come. Urgent steps never wait for the gate, the order within each class is kept, and a
gate that stays shut delays background work, never loses it. The publisher's side
(``awaiting_acks``, ``on_acked``) runs against a private Mosquitto."""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Awaitable, Callable

import pytest

from ionwarden.daemon.config import MqttSettings
from ionwarden.daemon.outputs import MqttPublisher
from ionwarden.daemon.runtime import StepLane
from tests._mqtt_support import private_broker, unique_prefix
from tests._outputs_support import T0, make_snapshot

from .test_runtime_lane_handover import _order
from .test_runtime_machinery_oracle import OldStepLane


def _shut_lane() -> tuple[list[bool], StepLane, list[str], Callable[[str, bool], Awaitable[None]]]:
    """A lane whose gate is shut while ``shut[0]`` (holds of a minute), the log of the steps
    run, and a step: its turn (background or urgent), logged, done."""
    shut = [True]
    lane = StepLane(lambda: shut[0], hold_s=60.0)
    log: list[str] = []

    async def step(name: str, background: bool) -> None:
        await lane.turn(background=background)
        log.append(name)
        lane.done()

    return shut, lane, log, step


async def _spin(n: int = 8) -> None:
    for _ in range(n):
        await asyncio.sleep(0)


def test_background_step_waits_for_the_gate_and_urgent_steps_do_not() -> None:
    """With the gate shut, a background step queued behind an urgent one does not start when the
    lane frees, an urgent step arriving then takes the lane at once, and ``open()`` once the gate
    opens hands the lane to the background step."""

    async def main() -> list[str]:
        shut, lane, log, step = _shut_lane()

        await lane.turn()  # an urgent step holds the lane
        bg = asyncio.create_task(step("settle", True))
        await _spin()
        lane.done()
        await _spin()
        assert log == []  # held by the gate
        await asyncio.wait_for(step("urgent", False), 5)  # not held
        await _spin()
        assert log == ["urgent"]
        lane.open()  # an acknowledgement came, but others are still awaited
        await _spin()
        assert log == ["urgent"]
        shut[0] = False
        lane.open()
        await asyncio.wait_for(bg, 5)
        return log

    assert asyncio.run(main()) == ["urgent", "settle"]


@pytest.mark.parametrize("combined", [False, True])
def test_a_gate_that_stays_shut_holds_background_work_once_until_it_opens(
    combined: bool,
) -> None:
    """The gate never opens (a distant broker, or rates at which an acknowledgement is always
    awaited): the first background step runs after ``hold_s`` (counted from when the gate first
    held it back), the others without waiting, in order, with or without ``done_then_turn`` (a
    station's settle after its urgent step); once the gate has opened by itself, it holds a
    background step again."""
    hold = 0.02

    async def main() -> tuple[list[str], list[float], float]:
        shut = [True]
        lane = StepLane(lambda: shut[0], hold_s=hold)
        loop = asyncio.get_running_loop()
        log: list[str] = []
        at: list[float] = []

        async def station(name: str) -> None:
            await lane.turn()
            log.append(f"urgent {name}")
            if combined:
                await lane.done_then_turn(background=True)
            else:
                lane.done()
                await lane.turn(background=True)
            log.append(f"settle {name}")
            at.append(loop.time())
            lane.done()

        t0 = loop.time()
        await asyncio.wait_for(asyncio.gather(*(station(n) for n in "ABC")), 10)
        shut[0] = False
        lane.open()  # the publisher caught up: the gate opened by itself
        shut[0] = True
        t1 = loop.time()
        await asyncio.wait_for(station("D"), 10)
        return log, [t - t0 for t in at[:3]], at[3] - t1

    log, at, again = asyncio.run(main())
    assert log == ["urgent A", "urgent B", "urgent C", "settle A", "settle B", "settle C",
                   "urgent D", "settle D"]  # fmt: skip
    # (lower bounds only: how much later a timer fires is the host's)
    assert at[0] >= hold
    assert again >= hold


def test_a_free_lane_holds_a_new_background_step_while_the_gate_is_shut() -> None:
    """``turn(background=True)`` on a free lane waits while the gate is shut; an urgent step then
    goes first, and the background step runs once the gate opens."""

    async def main() -> list[str]:
        shut, lane, log, step = _shut_lane()

        bg = asyncio.create_task(step("status", True))
        await _spin()
        assert log == []
        await asyncio.wait_for(step("urgent", False), 5)
        shut[0] = False
        lane.open()
        await asyncio.wait_for(bg, 5)
        return log

    assert asyncio.run(main()) == ["urgent", "status"]


def test_a_cancelled_held_background_step_does_not_jam_the_lane() -> None:
    """A background step cancelled while the gate holds it: the next one is served when the gate
    opens, and the lane is free afterwards."""

    async def main() -> tuple[list[str], bool]:
        shut = [True]
        lane = StepLane(lambda: shut[0], hold_s=60.0)
        log: list[str] = []

        async def step(name: str) -> None:
            await lane.turn(background=True)
            log.append(name)
            lane.done()

        first = asyncio.create_task(step("first"))
        second = asyncio.create_task(step("second"))
        await _spin()
        first.cancel()
        await _spin()
        shut[0] = False
        lane.open()
        await asyncio.wait_for(second, 5)
        await _spin()
        return log, lane._busy

    log, busy = asyncio.run(main())
    assert log == ["second"]
    assert not busy


def test_a_hold_whose_steps_were_all_cancelled_does_not_disable_the_gate() -> None:
    """Every background step the gate held is cancelled (a station stopped) and the gate opens:
    the next background step, once the gate is shut again, is held again (for ``hold_s``), not
    let through by the old hold's clock."""
    hold = 0.05

    async def main() -> tuple[list[str], float]:
        shut, lane, log, step = _shut_lane()
        lane.hold_s = hold
        loop = asyncio.get_running_loop()
        gone = asyncio.create_task(step("gone", True))
        await _spin()
        gone.cancel()
        await _spin()
        shut[0] = False
        lane.open()  # the publisher caught up
        await asyncio.sleep(2 * hold)  # (the old hold would have run out by now)
        shut[0] = True
        t0 = loop.time()
        await asyncio.wait_for(step("next", True), 5)
        return log, loop.time() - t0

    log, waited = asyncio.run(main())
    assert log == ["next"]
    assert waited >= hold  # (a lower bound: how much later a timer fires is the host's)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("stagger", [False, True])
def test_an_open_gate_serves_steps_in_the_order_of_the_lane_without_one(
    seed: int, stagger: bool
) -> None:
    """A gate that is always open changes nothing: bursts of urgent and background steps, together
    or staggered, run in the order of the lane without a gate (together: that of the previous
    lane, the oracle, too), and the lane keeps its promises."""
    gated = functools.partial(StepLane, lambda: False, 0.005)
    checks: list[str] = []
    got = asyncio.run(_order(gated, seed, combined=True, stagger=stagger, checks=checks))
    assert checks == []
    assert got == asyncio.run(_order(StepLane, seed, combined=True, stagger=stagger))
    if not stagger:  # (the oracle has no done_then_turn: the same order by done() and turn())
        assert got == asyncio.run(_order(OldStepLane, seed, combined=False, stagger=False))


@pytest.mark.integration
def test_background_step_runs_after_the_summaries_puback(tmp_path) -> None:
    """The gate of the daemon, against a private Mosquitto: a summary published, then a
    background step asks for the lane; it runs once the summary's PUBACK is read (the publisher
    then awaits nothing: ``awaiting_acks`` is False when it starts), not when the lane frees."""
    prefix = unique_prefix()
    with private_broker(tmp_path) as brk:
        cfg = MqttSettings(host="127.0.0.1", port=brk.port, topic_prefix=prefix, timeout_s=5.0)

        async def main() -> tuple[bool, bool, int]:
            pub = MqttPublisher(cfg)
            lane = StepLane(pub.awaiting_acks, hold_s=30.0)
            pub.on_acked = lane.open
            seen: list[bool] = []
            async with asyncio.TaskGroup() as tg:
                task = tg.create_task(pub.run(), name="daemon.output[mqtt]")
                await asyncio.wait_for(pub.wait_connected(), 10)
                for _ in range(1000):  # the session live (its client set), its "online" status
                    if pub._live is not None and not pub._inflight:  # acknowledged
                        break
                    await asyncio.sleep(0.01)
                await lane.turn()  # the urgent step: its summary leaves on the socket
                pub.publish_snapshot_nowait(make_snapshot("ALPHA", T0))
                sent = pub.awaiting_acks()

                async def settle() -> None:
                    await lane.turn(background=True)
                    seen.append(pub.awaiting_acks())
                    lane.done()

                bg = tg.create_task(settle())
                await asyncio.sleep(0)
                lane.done()
                await asyncio.wait_for(bg, 10)
                published = pub.statistics().published_total
                pub.stop()
                await asyncio.wait_for(task, 10)
            return sent, seen[0], published

        sent, awaiting_at_settle, published = asyncio.run(main())
    assert sent  # the summary was in flight when the urgent step ended
    assert not awaiting_at_settle  # the background step ran after its PUBACK
    assert published >= 2  # the daemon's "online" status and the summary
