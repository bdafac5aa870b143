"""The alarms' lean paths (issue 8) give the results of the paths they replace.

Oracles (STYLE rule 23): for the usable cells, the general comparisons
(``_ReferenceBaseline.cells`` in tests/test_alarms_fastpaths.py); for the statuses' constructor,
the previous ``StationAlarms.statuses`` kept verbatim below (golden behaviour of our own previous
code: ``AlarmStatus(...)`` per alarm). Inputs: invented cells with every kind of unusable value,
and the simulator's storm-front, scintillation and band-outage streams through the real estimator
pipeline."""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
import pytest

from ionwarden.daemon.alarms import (
    AlarmState,
    AlarmStatus,
    Cn0Baseline,
    StationAlarms,
    _engine,
)
from ionwarden.daemon.alarms._engine import UNITS
from ionwarden.daemon.config import AlarmSettings, Cn0BaselineSettings, ThresholdAlarm
from ionwarden.daemon.estimator import StationPipeline, StationSnapshot
from ionwarden.daemon.sim import Simulator, build_scenario, iter_stream
from ionwarden.parsers import signal_code
from tests.test_alarms_fastpaths import _ReferenceBaseline


@functools.cache
def scenario_snapshots() -> dict[str, list[StationSnapshot]]:
    """The simulator's invented streams through the estimator pipeline: storm-front (two
    stations, the front's onset at 300 s), scintillation (its first window from 600 s) and
    band-outage (L2 down 20 dB from 600 s)."""
    out: dict[str, list[StationSnapshot]] = {}
    for name, duration_s, n_stations in (
        ("storm-front", 660.0, 2),
        ("scintillation", 840.0, 1),
        ("band-outage", 840.0, 1),
    ):
        sc = build_scenario(name, duration_s=duration_s)
        for i, station in enumerate(sc.stations[:n_stations]):
            pipe = StationPipeline(station.name, reference_time=sc.start)
            snaps = out.setdefault(f"{name}/{station.name}", [])
            for _, data in iter_stream(Simulator(sc), i):
                snaps += [x for x in pipe.feed(data) if isinstance(x, StationSnapshot)]
    return out


#: Quick alarms (short holds, a baseline warm after 20 epochs) so that the streams raise and
#: clear CN0, ROTI and gradient alarms within minutes.
_TOUCHY = AlarmSettings(
    cn0_baseline=Cn0BaselineSettings(min_samples=20, time_constant_s=300.0),
    cn0_drop=ThresholdAlarm(raise_at=2.0, clear_at=1.0, raise_after_s=3.0, clear_after_s=5.0),
    roti=ThresholdAlarm(raise_at=0.3, clear_at=0.1, raise_after_s=5.0, clear_after_s=10.0),
    gradient=ThresholdAlarm(raise_at=10.0, clear_at=5.0, raise_after_s=5.0, clear_after_s=10.0),
    roti_statistic="max",
)


def _statuses_previous(eng: StationAlarms) -> tuple[AlarmStatus, ...]:
    """StationAlarms.statuses as it was (verbatim)."""
    return tuple(
        AlarmStatus(
            station=eng.station,
            alarm=a.key,
            kind=a.kind,
            band=a.band,
            severity=a.severity,
            state=AlarmState.ACTIVE if a.machine.active else AlarmState.NORMAL,
            pending=a.machine.pending,
            value=a.value,
            unit=UNITS[a.kind],
            raise_at=a.machine.raise_at,
            clear_at=a.machine.clear_at,
            since=a.since,
        )
        for a in eng._alarms.values()
    )


def _same(a: object, b: object) -> bool:
    """Equal, type included; floats bit for bit (NaN equals NaN, −0.0 differs from 0.0)."""
    if isinstance(a, float) and isinstance(b, float):
        return (math.isnan(a) and math.isnan(b)) or (
            a == b and math.copysign(1.0, a) == math.copysign(1.0, b)
        )
    return type(a) is type(b) and a == b


def _same_records(xs, ys) -> bool:
    return len(xs) == len(ys) and all(
        type(x) is type(y)
        and all(_same(getattr(x, f.name), getattr(y, f.name)) for f in dataclasses.fields(x))
        for x, y in zip(xs, ys, strict=True)
    )


def test_statuses_equal_previous_code():
    """StationAlarms.statuses gives AlarmStatus objects equal, field by field and in type, to
    the previous code's, before and after alarms exist, raise, hold and clear."""
    eng = StationAlarms("HARC", _TOUCHY)
    assert _same_records(eng.statuses(), _statuses_previous(eng))
    states = set()
    for snap in scenario_snapshots()["band-outage/HARC"]:
        eng.observe_snapshot(snap)
        new, old = eng.statuses(), _statuses_previous(eng)
        assert _same_records(new, old)
        assert [hash(x) for x in new if not math.isnan(x.value)] == [
            hash(x) for x in old if not math.isnan(x.value)
        ]
        states |= {(x.alarm, x.state, x.pending) for x in new}
        eng.settle()
    assert ("cn0-drop-g2", AlarmState.ACTIVE, False) in states
    assert ("cn0-drop-g2", AlarmState.NORMAL, True) in states  # a raise being held


def test_new_status_builds_a_real_alarm_status():
    """_new_status gives an AlarmStatus (frozen: assignment refused) equal to the constructor's."""
    fields = {
        "station": "HARC",
        "alarm": "cn0-drop-g2",
        "kind": _engine.AlarmKind.CN0_DROP,
        "band": "G2",
        "severity": _engine.Severity.SEVERE,
        "state": AlarmState.ACTIVE,
        "pending": True,
        "value": -0.0,
        "unit": "dB",
        "raise_at": 6.0,
        "clear_at": 3.0,
        "since": None,
    }
    built = _engine._new_status(**fields)
    assert type(built) is AlarmStatus
    assert built == AlarmStatus(**fields)
    assert repr(built) == repr(AlarmStatus(**fields))
    with pytest.raises(dataclasses.FrozenInstanceError):
        built.value = 1.0  # type: ignore[misc]


def _edge_cells(rng: np.random.Generator, n_epochs: int):
    """Invented cells: mostly usable, now and then one or more cells with an elevation of −0.0,
    0.0, negative, NaN (either sign), ±∞, and C/N0 of 0.0, −0.0, negative, NaN, ±∞, the smallest
    subnormal and the largest float32; sometimes byte-swapped or float32 elevations or strided
    arrays."""
    codes = np.array([signal_code(c) for c in ("1C", "2W", "5Q")], np.uint16)
    n = 30
    sat = rng.choice(np.r_[1:33, 101:125, 201:237], n).astype(np.int16)
    sig = rng.choice(codes, n).astype(np.uint16)
    el_bad = [-0.0, 0.0, -1.0, np.nan, -np.nan, np.inf, -np.inf, 90.0, 1e6]
    cn0_bad = [0.0, -0.0, -1.0, np.nan, -np.nan, np.inf, -np.inf, 1e-45, 3.4028235e38]
    for i in range(n_epochs):
        el = rng.uniform(0.0, 90.0, n)
        cn0 = rng.uniform(25.0, 55.0, n).astype(np.float32)
        if rng.random() < 0.4:
            for _ in range(int(rng.integers(1, 3))):
                el[int(rng.integers(0, n))] = rng.choice(el_bad)
        if rng.random() < 0.4:
            cn0[int(rng.integers(0, n))] = np.float32(rng.choice(cn0_bad))
        kind = i % 7
        if kind == 1:
            el = el.astype(el.dtype.newbyteorder())
        elif kind == 2:
            cn0 = cn0.astype(cn0.dtype.newbyteorder())
        elif kind == 3:
            el = el.astype(np.float32)
        elif kind == 4:  # strided views of the same values
            el = np.repeat(el, 2)[::2]
            cn0 = np.repeat(cn0, 2)[::2]
        yield sat, sig, el, cn0, float(i)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_cn0_cells_equal_general_comparisons(seed):
    """Cn0Baseline.cells gives the cells of the general comparisons, bit for bit, and then the
    same drops and baseline."""
    rng = np.random.default_rng(seed)
    kw = {"bin_deg": 5.0, "time_constant_s": 300.0, "min_samples": 3}
    fast = Cn0Baseline(**kw)
    ref = _ReferenceBaseline(**kw)
    n_unusable = 0
    for sat, sig, el, cn0, t in _edge_cells(rng, 300):
        a = fast.cells(sat, sig, el, cn0)
        b = ref.cells(sat, sig, el, cn0)
        n_unusable += a.flat.shape[0] < el.shape[0]
        assert a.key.tobytes() == b[0].tobytes()
        assert a.flat.tobytes() == b[1].tobytes()
        assert a.cn0.tobytes() == b[2].tobytes()
        assert (
            fast.drop_db_cells(a, min_cells=2).tobytes()
            == ref.drop_db_cells(b, min_cells=2).tobytes()
        )
        fast.learn_cells(a, t)
        ref.learn_cells(b, t)
        assert fast._mean.tobytes() == ref.mean.tobytes()
    assert 50 < n_unusable < 290
