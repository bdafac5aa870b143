"""The MQTT outbound buffer and the debouncer under arbitrary sequences (hypothesis)."""

from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from ionwarden.daemon.alarms import Debouncer
from ionwarden.daemon.outputs import OutboundBuffer, OutboundMessage, Topic
from tests._outputs_support import class_message

TOPIC = Topic("p/ALPHA/summary")

# An operation: ("put", class) or ("ack", None); class 0 alarm, 1 summary, 2 bulk.
OPS = st.lists(
    st.one_of(st.tuples(st.just("put"), st.integers(0, 2)), st.tuples(st.just("ack"), st.none())),
    max_size=200,
)


@given(ops=OPS, alarm_bound=st.integers(1, 8), epoch_bound=st.integers(1, 8))
def test_buffer_is_bounded_ordered_and_counts_every_drop(ops, alarm_bound, epoch_bound):
    """OutboundBuffer stays within its bounds, sends alarm class first, then summaries, then bulk,
    each in order, and every queued message is sent, still queued, or counted as dropped."""
    buf = OutboundBuffer(alarm_bound=alarm_bound, epoch_bound=epoch_bound)
    sent: list[OutboundMessage] = []
    put: list[OutboundMessage] = []
    for n, (op, klass) in enumerate(ops):
        if op == "put":
            msg = class_message(TOPIC, n, klass)
            put.append(msg)
            buf.put_nowait(msg)
        else:
            msg = buf.peek()
            if msg is not None:
                if buf.alarm_depth:
                    assert msg.alarm_class
                elif msg.bulk:
                    assert not buf._epoch  # no summary waits behind satellites/health
                buf.pop(msg)
                sent.append(msg)
        assert buf.alarm_depth <= alarm_bound
        assert buf.epoch_depth <= 2 * epoch_bound
    queued = len(buf)
    assert len(put) == len(sent) + queued + buf.dropped_alarm + buf.dropped_epoch
    for klass in ((True, False), (False, False), (False, True)):
        order = [int(m.payload) for m in sent if (m.alarm_class, m.bulk) == klass]
        assert order == sorted(order)


@given(
    values=st.lists(st.floats(-1.0, 3.0) | st.just(float("nan")), min_size=1, max_size=300),
    raise_after=st.sampled_from([0.0, 1.0, 5.0]),
    clear_after=st.sampled_from([0.0, 2.0, 10.0]),
)
def test_debouncer_transitions_respect_thresholds_and_holds(values, raise_after, clear_after):
    """Debouncer only raises on a value ≥ raise_at held raise_after_s, only clears on a value
    < clear_at held clear_after_s (1 s samples)."""
    d = Debouncer(raise_at=1.0, clear_at=0.5, raise_after_s=raise_after, clear_after_s=clear_after)
    for t, v in enumerate(values):
        was = d.active
        if d.step(v, float(t)):
            hold = raise_after if d.active else clear_after
            window = values[max(0, t - int(hold)) : t + 1]
            if d.active:
                assert not was
                assert all(x >= 1.0 for x in window)
            else:
                assert was
                assert all(x < 0.5 for x in window)
