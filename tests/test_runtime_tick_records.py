"""The status tick's records (a station's statistics, its queue's and framer's counters, the
exporter's snapshot), now built without the frozen ``__init__`` (``fast_constructor``), against
the previous code building them with the dataclasses' own constructors (verbatim copies kept here
as oracles): equal records of the same classes, still frozen."""

from __future__ import annotations

import asyncio
import dataclasses
from typing import Any

import pytest

from ionwarden.daemon.ingest import TcpSource
from ionwarden.daemon.outputs import DaemonSnapshot, IngestFigures, QueueFigures, StationFigures
from ionwarden.daemon.runtime import (
    BoundedQueue,
    DecoderCounts,
    FramingCore,
    Overflow,
    QueueStatistics,
    StationConfig,
    StationRunner,
    StationStatistics,
)
from ionwarden.daemon.runtime._app import build_daemon_snapshot
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions, StationBundle, _Running

from ._runtime_support import StandInCore, rtcm_frame


# -- oracles: the previous constructions (verbatim but for the names) ------------------------------
def old_queue_statistics(q: BoundedQueue[Any]) -> QueueStatistics:
    return QueueStatistics(
        stage=q._stage,
        station=q._station,
        policy=q.policy.value,
        capacity=q._maxsize,
        depth=len(q._items),
        peak=q._peak,
        put_total=q._put,
        dropped_total=q._dropped,
    )


def old_counts(a: DecoderCounts, core: FramingCore) -> DecoderCounts:
    s = core._framer.statistics()
    return DecoderCounts(
        frames_total=a.frames_total + s.rtcm_frames + s.nmea_frames,
        rtcm_frames_total=a.rtcm_frames_total + s.rtcm_frames,
        nmea_frames_total=a.nmea_frames_total + s.nmea_frames,
        crc_errors_total=a.crc_errors_total + s.crc_failures,
        checksum_errors_total=a.checksum_errors_total + s.nmea_checksum_failures,
        discarded_bytes_total=a.discarded_bytes_total + s.bytes_discarded,
        truncated_frames_total=a.truncated_frames_total + s.truncated_at_eof,
    )


def old_statistics(self: StationRunner) -> StationStatistics:
    return StationStatistics(
        station=self.name,
        state=self._state,
        detail=self._detail,
        connected=self._connected,
        bytes_total=self._bytes,
        connects_total=self._connects,
        reconnects_total=max(0, self._connects - 1),
        stalls_total=self._stalls,
        epochs_total=self._epochs,
        fixes_total=self._fixes,
        decode_errors_total=self._decode_errors,
        decoder=self.core.counts(),
        queue=old_queue_statistics(self.queue),
        last_data_monotonic_s=self._last_data,
        last_epoch_monotonic_s=self._last_epoch,
        latest=self._latest,
        latest_fix=self._latest_fix,
        progress_monotonic_s=self._progress,
        pipeline_errors_total=self._pipeline_errors,
        pipeline_resets_total=self._pipeline_resets,
    )


def old_build_daemon_snapshot(
    daemon: Daemon, started_s: float, stats: Any
) -> DaemonSnapshot:  # (publisher None)
    stations = []
    queues = []
    alarms: list[Any] = []
    for st in stats:
        d = st.decoder
        stations.append(
            StationFigures(
                station=st.station,
                snapshot=st.latest,
                fix=st.latest_fix,
                ingest=IngestFigures(
                    bytes_total=st.bytes_total,
                    frames_total=d.frames_total,
                    crc_errors_total=d.crc_errors_total + d.checksum_errors_total,
                    discarded_bytes_total=d.discarded_bytes_total,
                    reconnects_total=st.reconnects_total,
                    connected=st.connected,
                ),
                last_epoch_monotonic_s=st.last_epoch_monotonic_s,
                epochs_total=st.epochs_total,
                pipeline_errors_total=st.pipeline_errors_total,
                pipeline_resets_total=st.pipeline_resets_total,
            )
        )
        q = st.queue
        queues.append(
            QueueFigures(
                stage=q.stage,
                station=q.station,
                depth=q.depth,
                capacity=q.capacity,
                peak=q.peak,
                dropped_total=q.dropped_total,
            )
        )
    for a in daemon.station_alarms():
        alarms.extend(a.statuses())
    return DaemonSnapshot(
        stations=tuple(stations),
        alarms=tuple(alarms),
        queues=tuple(queues),
        mqtt=None,
        started_monotonic_s=started_s,
    )


def _same_frozen(new: object, old: object) -> None:
    assert type(new) is type(old)
    assert new == old
    first = dataclasses.fields(new)[0].name  # type: ignore[arg-type]
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(new, first, getattr(new, first))


@pytest.mark.parametrize("policy", list(Overflow))
def test_queue_statistics_as_before(policy: Overflow) -> None:
    """BoundedQueue.statistics() after puts, drops and gets (equal to the previous construction
    (oracle copy))."""
    q: BoundedQueue[int] = BoundedQueue(3, policy, stage="estimator", station="st")
    _same_frozen(q.statistics(), old_queue_statistics(q))
    for i in range(5):
        if policy is Overflow.WAIT and q.qsize() == 3:
            q.get_nowait()
        q.put_nowait(i)
        _same_frozen(q.statistics(), old_queue_statistics(q))


def test_station_statistics_counts_and_snapshot_as_before() -> None:
    """A station's statistics, its framer counts and the exporter's snapshot, after chunks with
    epochs, junk and a broken stream (equal to the previous construction (oracle copy))."""

    async def main() -> None:
        cores: list[StandInCore] = []

        def factory(_cfg: StationConfig) -> StationBundle:
            cores.append(StandInCore())
            return StationBundle(core=cores[-1], produces_epochs=True)

        cfgs = tuple(
            StationConfig(name=n, source=TcpSource(host="127.0.0.1", port=1)) for n in ("a", "b")
        )
        daemon = Daemon(DaemonOptions(stations=cfgs), factory=factory)
        runners = []
        for cfg in cfgs:
            bundle = factory(cfg)
            runner = StationRunner(cfg, bundle.core, emit=lambda _o: None)
            daemon._stations[cfg.name] = _Running(runner=runner, bundle=bundle, alarms=None)
            runners.append(runner)
        chunks = [
            rtcm_frame(1077, b"\x01\x02") + b"junk" + rtcm_frame(1005, b"\x00" * 17),
            b"\xd3\x00\x05garbage" + rtcm_frame(1077, b"\x03"),
            rtcm_frame(1077)[:5],
        ]
        for k, chunk in enumerate(chunks):
            for i, runner in enumerate(runners):
                runner.queue.put_nowait((float(k), chunk))
                runner.queue.get_nowait()
                runner._step(chunk, float(k))
                if i == 1 and k == 1:
                    runner._step(None, None)  # the stream broke: the partial frame is counted
                runner._connects += k
            for runner in runners:
                core = runner.core
                assert isinstance(core, StandInCore)
                _same_frozen(core.counts(), old_counts(core._inner._done, core._inner))
                _same_frozen(runner.statistics(), old_statistics(runner))
                _same_frozen(runner.statistics().queue, old_queue_statistics(runner.queue))
            stats = daemon.statistics()
            assert stats == tuple(old_statistics(r) for r in runners)
            snap = build_daemon_snapshot(daemon, None, 12.5, stats)
            old = old_build_daemon_snapshot(daemon, 12.5, stats)
            _same_frozen(snap, old)
            for new_fig, old_fig in zip(snap.stations, old.stations, strict=True):
                _same_frozen(new_fig, old_fig)
                _same_frozen(new_fig.ingest, old_fig.ingest)
            for new_q, old_q in zip(snap.queues, old.queues, strict=True):
                _same_frozen(new_q, old_q)
        last = daemon.statistics()
        assert all(s.decoder.frames_total and s.decoder.discarded_bytes_total for s in last)
        assert last[1].reconnects_total

    asyncio.run(main())


def test_framer_totals_are_its_statistics_counters() -> None:
    """Framer.totals() (what the tick's DecoderCounts read) holds the counters of
    Framer.statistics(), in the order it documents, after frames, junk, an empty frame, a bad
    checksum and a truncated frame at the end of the stream."""
    from ionwarden.parsers._framer import Framer

    framer = Framer()
    bad = bytearray(rtcm_frame(1077, b"\x05"))
    bad[-1] ^= 0xFF  # a CRC failure
    framer.feed(rtcm_frame(1077, b"\x01") + b"junk" + rtcm_frame(1005, b"\x00" * 17))
    framer.feed(b"$GPGGA,1*00\r\n" + bytes(bad) + b"\xd3\x00\x00\x47\xea\x4b")
    framer.feed(rtcm_frame(1077, b"\x02")[:6])
    framer.feed(b"")
    s = framer.statistics()
    expected = (
        s.rtcm_frames,
        s.nmea_frames,
        s.rtcm_empty_frames,
        s.crc_failures,
        s.nmea_checksum_failures,
        s.truncated_at_eof,
        s.bytes_discarded,
        s.bytes_total,
    )
    assert framer.totals() == expected
    assert all(expected[i] for i in (0, 3, 5, 6, 7))  # (not all 0)
