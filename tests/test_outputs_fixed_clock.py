"""The publisher reads its clock for alarm transitions only when there are some (issue 8: most
epochs have none). Inputs: invented transitions from an invented storm (tests/_outputs_support.py);
frozen clock (STYLE rule 25)."""

from __future__ import annotations

import datetime as dt

from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.config import AlarmSettings, MqttSettings, ThresholdAlarm
from ionwarden.daemon.outputs import MqttPublisher
from tests._outputs_support import T0, make_snapshot

_NOW = dt.datetime(2026, 12, 2, 12, 0, 0, tzinfo=dt.UTC)


def _publisher(calls: list[int]) -> MqttPublisher:
    def clock() -> dt.datetime:
        calls.append(1)
        return _NOW

    return MqttPublisher(MqttSettings(topic_prefix="iwtest/clock"), clock=clock)


def test_publisher_transitions_without_any_do_not_read_the_clock():
    """MqttPublisher.publish_transitions_nowait queues nothing and reads no clock for none
    (a list or an empty generator)."""
    calls: list[int] = []
    pub = _publisher(calls)
    pub.publish_transitions_nowait([])
    pub.publish_transitions_nowait(x for x in ())
    assert calls == []
    assert pub.statistics().buffered_alarm == 0


def test_publisher_transitions_read_the_clock_once_per_call():
    """MqttPublisher.publish_transitions_nowait reads the clock once for several transitions
    and stamps every retained alarm state with that time."""
    eng = StationAlarms(
        "ALPHA",
        AlarmSettings(
            roti=ThresholdAlarm(raise_at=0.5, clear_at=0.25, raise_after_s=0.0),
            vtec=ThresholdAlarm(raise_at=30.0, clear_at=25.0, raise_after_s=0.0),
        ),
    )
    trs = eng.observe_snapshot(make_snapshot(t=T0, roti=1.0, vtec=40.0))
    assert len(trs) == 2
    calls: list[int] = []
    pub = _publisher(calls)
    pub.publish_transitions_nowait(trs)
    assert calls == [1]
    states = [m for m in pub._buffer._alarm if "/alarm/" in m.topic.value]
    assert len(states) == 2
    assert all(b'"time_utc":"2026-12-02T12:00:00.000Z"' in m.payload for m in states)
