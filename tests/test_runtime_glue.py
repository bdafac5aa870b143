"""Per-epoch runtime glue: the cheap frame counter the estimate loop reads around every chunk."""

from __future__ import annotations

from pathlib import Path

from ionwarden.daemon.runtime import FramingCore

DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"


def test_framing_core_frames_total_matches_counts():
    """FramingCore.frames_total() equals counts().frames_total through feeds, a broken stream,
    garbage and a reset (invented demo stream, daemon/data/demo.bin)."""
    data = DEMO.read_bytes()[:200_000]
    core = FramingCore()
    for i in range(0, len(data), 777):
        core.feed(data[i : i + 777])
        assert core.frames_total() == core.counts().frames_total
        if i % (777 * 50) == 0:
            core.end_stream()  # the connection broke: partial frame dropped, a new framer
            assert core.frames_total() == core.counts().frames_total
    core.feed(b"\xd3\x00\x05garbage$GPXXX*00\r\n")
    core.reset()
    core.feed(data[:5000])
    assert core.frames_total() == core.counts().frames_total > 0


def test_step_lane_runs_one_step_per_loop_iteration_in_arrival_order():
    """StepLane: steps that become ready together run one per event-loop iteration, first come
    first served, and a callback scheduled by a step runs before the next step (so I/O and the
    publisher get their turn between stations)."""
    import asyncio

    from ionwarden.daemon.runtime import StepLane

    log: list[str] = []

    async def main():
        lane = StepLane()
        start = asyncio.Event()

        async def station(name: str) -> None:
            await start.wait()
            await lane.turn()
            try:
                log.append(f"step {name}")
                asyncio.get_running_loop().call_soon(log.append, f"io after {name}")
            finally:
                lane.done()

        async with asyncio.TaskGroup() as tg:
            for name in "ABCD":
                tg.create_task(station(name), name=f"daemon.estimate[{name}]")
            await asyncio.sleep(0)
            start.set()
        assert lane.waiting == 0
        await lane.turn()  # free again: no wait
        lane.done()

    asyncio.run(main())
    steps = [x for x in log if x.startswith("step")]
    assert steps == ["step A", "step B", "step C", "step D"]
    for a, b in zip("ABC", "BCD", strict=True):
        assert log.index(f"io after {a}") < log.index(f"step {b}")


def test_step_lane_passes_on_when_a_waiter_is_cancelled():
    """StepLane never stays taken when a waiting step is cancelled, before or after its turn."""
    import asyncio

    from ionwarden.daemon.runtime import StepLane

    async def main():
        lane = StepLane()
        await lane.turn()  # held by "us"
        w1 = asyncio.get_running_loop().create_task(lane.turn(), name="daemon.estimate[w1]")
        w2 = asyncio.get_running_loop().create_task(lane.turn(), name="daemon.estimate[w2]")
        await asyncio.sleep(0)
        w1.cancel()  # cancelled while waiting
        lane.done()
        await asyncio.sleep(0)
        await asyncio.sleep(0)
        await w2  # w2 got the lane
        w3 = asyncio.get_running_loop().create_task(lane.turn(), name="daemon.estimate[w3]")
        await asyncio.sleep(0)
        lane.done()  # hand it to w3 (handed at once: its task resumes in the next iteration) ...
        w3.cancel()  # ... which is cancelled after being handed the lane, before it resumes
        for _ in range(3):
            await asyncio.sleep(0)
        assert w1.cancelled()
        async with asyncio.timeout(1):
            await lane.turn()  # free again
        lane.done()

    asyncio.run(main())


def test_step_lane_serves_urgent_steps_before_background_ones():
    """StepLane: a background step (a station's deferred receiver-bias fit) waits while urgent
    steps (other stations' bytes → snapshot → publish) are waiting, then runs; each class is
    first come first served, and a free lane is taken at once by either class."""
    import asyncio

    from ionwarden.daemon.runtime import StepLane

    log: list[str] = []

    async def main():
        lane = StepLane()
        await lane.turn(background=True)  # free: taken at once
        lane.done()
        await asyncio.sleep(0)
        start = asyncio.Event()

        async def station(name: str) -> None:
            await start.wait()
            await lane.turn()
            try:
                log.append(f"urgent {name}")
            finally:
                lane.done()
            await lane.turn(background=True)
            try:
                log.append(f"background {name}")
            finally:
                lane.done()

        async with asyncio.TaskGroup() as tg:
            for name in "ABC":
                tg.create_task(station(name), name=f"daemon.estimate[{name}]")
            await asyncio.sleep(0)
            start.set()
        assert lane.waiting == 0

    asyncio.run(main())
    assert log == ["urgent A", "urgent B", "urgent C", "background A", "background B",
                   "background C"]  # fmt: skip
