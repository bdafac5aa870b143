"""The producers' per-epoch shortcuts (``outputs/_producers.py``, ``outputs/_buffer.py``): the
outbound message's fast constructor against the dataclass's own ``__init__``, and the per-station
satellites schedule against the rule it replaced, written out here as the oracle."""

from __future__ import annotations

import copy
import dataclasses
import pickle

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.config import MqttSettings
from ionwarden.daemon.outputs import MqttPublisher, OutboundMessage, Topic
from ionwarden.daemon.outputs._buffer import new_outbound_message
from tests._outputs_support import T0, make_snapshot


def test_new_outbound_message_builds_the_dataclass_init_object():
    """new_outbound_message(**fields) has the type, fields, equality, frozenness, pickle and copy
    behaviour of OutboundMessage(**fields) (source: the dataclass's own __init__, the oracle)."""
    values = {
        "topic": Topic("p/ALPHA/summary"),
        "payload": b'{"x":1}',
        "qos": 1,
        "retain": False,
        "expiry_s": 60,
        "alarm_class": False,
        "bulk": False,
        "queued_s": 12.5,
        "origin_s": None,
        "station": "ALPHA",
    }
    assert {f.name for f in dataclasses.fields(OutboundMessage)} == set(values)
    got, expect = new_outbound_message(**values), OutboundMessage(**values)
    assert type(got) is OutboundMessage
    assert got == expect
    assert all(getattr(got, k) is v for k, v in values.items())
    assert copy.deepcopy(got) == expect
    assert pickle.loads(pickle.dumps(got)) == expect
    with pytest.raises(dataclasses.FrozenInstanceError):
        got.qos = 0  # type: ignore[misc]


def _oracle_due(times: list[tuple[str, float]], interval: float) -> list[bool]:
    """Whether each (station, t) epoch queues a satellites message, by the rule as it was written
    before the per-station routes (dicts of last and due time per station; the oracle)."""
    last_s: dict[str, float] = {}
    due_s: dict[str, float] = {}
    out = []
    for station, t in times:
        last, due = last_s.get(station), due_s.get(station)
        if last is None or due is None or t >= due or t < last:
            last_s[station] = t
            gap = interval
            if due is None:
                gap += len(due_s) % max(int(gap), 1)
            due_s[station] = t + gap
            out.append(True)
        else:
            out.append(False)
    return out


@settings(max_examples=60, deadline=None)
@given(
    steps=st.lists(st.tuples(st.integers(0, 3), st.integers(-20, 30)), min_size=1, max_size=60),
    interval=st.sampled_from([0.0, 0.5, 1.0, 3.0, 10.0]),
)
def test_satellites_schedule_equals_the_rule_it_replaced(steps, interval):
    """publish_snapshot_nowait queues a satellites message at exactly the epochs the previous
    rule did (first epoch, then once due, again at once after time went backwards; stations
    staggered), for interleaved stations with arbitrary time steps (oracle: _oracle_due)."""
    pub = MqttPublisher(MqttSettings(topic_prefix="p", satellites_interval_s=interval))
    clock = dict.fromkeys(range(4), 0)
    times: list[tuple[str, float]] = []
    queued: list[bool] = []
    for k, step in steps:
        clock[k] = max(clock[k] + step, -1000)
        station = f"ST{k}"
        t = T0 + float(clock[k])
        before = pub._buffer.epoch_depth
        pub.publish_snapshot_nowait(make_snapshot(station, t))
        queued.append(pub._buffer.epoch_depth - before == 2)
        times.append((station, t.total_s))
    assert queued == _oracle_due(times, interval)
