"""The per-epoch fixed-cost shortcuts of task H7 equal the general code they replace.

Oracles (STYLE rule 23): ``np.errstate`` itself for ``_npfast.quiet_enter``/``quiet_exit``; the
dataclass's own ``__init__`` (``cls(**values)``) and the slot-descriptor constructor for
``daemon._records.fast_constructor``; the layout's own index arrays for the block's private copies,
and an estimator run through the general ``np.errstate`` decorator for the whole update. Inputs:
our invented scenario (tests/_estimator_synth.py) and arbitrary field values.
"""

from __future__ import annotations

import copy
import dataclasses
import pickle
import warnings
from typing import Any

import numpy as np
import pytest

from ionwarden.daemon._records import fast_constructor
from ionwarden.daemon.estimator import StationEstimator, StationSnapshot
from ionwarden.daemon.estimator._npfast import quiet_enter, quiet_exit
from ionwarden.daemon.estimator._snapshot import (
    SatelliteFigures,
    new_satellite_figures,
    new_snapshot,
)
from ionwarden.daemon.estimator._station import StationFigures, _new_station_figures

from ._estimator_synth import RX_ECEF, Scenario, generate

_OUTER = [
    {},
    {"under": "raise"},
    {"all": "raise"},
    {"divide": "warn", "invalid": "call", "call": lambda *a: None},
]
_BUFSIZE = [None, 16384]


@pytest.mark.parametrize("bufsize", _BUFSIZE)
@pytest.mark.parametrize("outer", _OUTER)
def test_quiet_enter_sets_the_error_state_of_np_errstate(
    outer: dict[str, Any], bufsize: int | None
) -> None:
    """Between quiet_enter and quiet_exit the error state (and error callback) is the one np.errstate(invalid, divide, over ignored) sets over the same outer state; quiet_exit restores the outer one, also when the outer state changed between two uses (source: np.errstate)."""
    with np.errstate(**outer):
        if bufsize is not None:
            np.setbufsize(bufsize)  # (the errstate context restores it)
        before = (np.geterr(), np.geterrcall(), np.getbufsize())
        for _ in range(3):  # the second and third use reuse the derived state
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                expect = (np.geterr(), np.geterrcall(), np.getbufsize())
            token = quiet_enter()
            try:
                got = (np.geterr(), np.geterrcall(), np.getbufsize())
            finally:
                quiet_exit(token)
            assert got == expect
            assert (np.geterr(), np.geterrcall(), np.getbufsize()) == before


def test_quiet_enter_silences_what_np_errstate_silences() -> None:
    """Inside quiet_enter, 0/0, 1/0 and overflow raise no warning even when the outer state raises on everything (source: np.errstate semantics)."""
    with np.errstate(all="raise"):
        token = quiet_enter()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error")
                out = np.array([0.0, 1.0, 1e308]) / np.array([0.0, 0.0, 1e-308])
        finally:
            quiet_exit(token)
        assert np.isnan(out[0])
        assert np.isinf(out[1])
        assert np.isinf(out[2])
        with pytest.raises(FloatingPointError):
            np.array([1.0]) / np.array([0.0])


def _values(cls: type) -> dict[str, Any]:
    return {f.name: object() for f in dataclasses.fields(cls)}


@pytest.mark.parametrize("cls", [SatelliteFigures, StationSnapshot, StationFigures])
def test_fast_constructor_builds_the_dataclass_init_object(cls: type) -> None:
    """The fast constructor's object has the type, fields (the same objects), equality, frozenness and pickle/copy behaviour of ``cls(**values)`` (source: the dataclass's own __init__)."""
    fast = {SatelliteFigures: new_satellite_figures, StationSnapshot: new_snapshot,
            StationFigures: _new_station_figures}[cls]  # fmt: skip
    values = {f.name: float(i) for i, f in enumerate(dataclasses.fields(cls))}
    got, expect = fast(**values), cls(**values)
    assert type(got) is cls
    assert got == expect
    assert copy.deepcopy(got) == expect
    assert pickle.loads(pickle.dumps(got)) == expect
    with pytest.raises(dataclasses.FrozenInstanceError):
        got.__setattr__(dataclasses.fields(cls)[0].name, 1.0)
    objs = _values(cls)
    got = fast(**objs)
    for name, value in objs.items():
        assert getattr(got, name) is value


def test_fast_constructor_falls_back_to_descriptors_without_class_assignment() -> None:
    """Where the twin's __class__ cannot be set to the dataclass (another slot layout), the constructor sets each slot through its descriptor and gives the same object (source: the dataclass's own __init__)."""

    @dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
    class Odd:
        a: float
        b: float

    Odd.__slots__ = ("b", "a", "c")  # type: ignore[misc]  # the twin gets another layout
    build = fast_constructor(Odd)
    assert build.__name__ == "set_Odd"
    got = build(a=1.0, b=2.0)
    assert type(got) is Odd
    assert got == Odd(a=1.0, b=2.0)
    by_position = fast_constructor(Odd, positional=True)  # fields in field order
    assert by_position.__name__ == "set_Odd"
    got = by_position(1.0, 2.0)
    assert type(got) is Odd
    assert got == Odd(a=1.0, b=2.0)


@pytest.mark.parametrize("positional", [False, True])
def test_fast_constructor_takes_any_field_name_and_none(positional: bool) -> None:
    """Fields named like the generated code's locals of before (``o``, ``_cls``, ``_twin``,
    ``_new``) keep their own values, and a dataclass without fields builds too (source: the
    dataclass's own __init__); the generated code's own prefix is refused as a field name."""

    @dataclasses.dataclass(frozen=True, slots=True)
    class Clash:
        o: float
        _cls: float
        _twin: float
        _new: float

    @dataclasses.dataclass(frozen=True, slots=True)
    class Empty:
        pass

    build = fast_constructor(Clash, positional=positional)
    got = build(1.0, 2.0, 3.0, 4.0) if positional else build(o=1.0, _cls=2.0, _twin=3.0, _new=4.0)
    assert type(got) is Clash
    assert got == Clash(1.0, 2.0, 3.0, 4.0)
    empty = fast_constructor(Empty, positional=positional)()
    assert type(empty) is Empty
    assert empty == Empty()

    # (a class body would mangle the name: only make_dataclass can give a field this name)
    reserved = dataclasses.make_dataclass("Reserved", [("__iw_o", float)], frozen=True, slots=True)
    with pytest.raises(ValueError, match="reserved"):
        fast_constructor(reserved, positional=positional)


class _Decorated(StationEstimator):
    """The update as before H7: np.errstate as a decorator around ``_update``."""

    def update(self, epoch: Any) -> StationSnapshot:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return super().update(epoch)


def _bits(a: Any) -> Any:
    if isinstance(a, np.ndarray):
        return (a.dtype.str, a.shape, a.strides, a.tobytes())
    if isinstance(a, float):
        return np.float64(a).tobytes()
    if dataclasses.is_dataclass(a):
        return tuple(_bits(getattr(a, f.name)) for f in dataclasses.fields(a))
    if isinstance(a, dict):
        return sorted(a.items())
    return a


def test_estimator_update_equals_the_errstate_decorated_update_bit_for_bit() -> None:
    """Every snapshot field (values, NaN, dtype, shape, strides, counters) of the estimator with the fixed-cost shortcuts equals one run under a plain np.errstate, outer error state raising on everything (source: the general path; inputs: our invented scenario with slips and outages)."""
    sc = Scenario(
        n_sats=8, duration_s=360.0, slips=[(1, 150, 1, 0), (2, 300, 0, 1)],
        outages=[(0, "2W", 200, 260), (0, "5Q", 200, 260), (3, "5Q", 100, 340)], seed=7,
    )  # fmt: skip
    tr = generate(sc)
    a, b = StationEstimator(), _Decorated()
    for est in (a, b):
        est.set_receiver_position(RX_ECEF, "config")
    n_single = 0
    with np.errstate(all="raise"):
        for ti, ep in enumerate(tr.epochs):
            for est in (a, b):
                est.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
            sa, sb = a.update(ep), b.update(ep)
            assert _bits(sa) == _bits(sb)
            n_single += not a.cells.layout(ep).all_dual
    assert n_single >= 60
    blk = a._blk
    assert blk is not None
    for name in ("i12", "i12_2", "cell_pos"):
        own, lay_arr = getattr(blk, name), getattr(blk.lay, name)
        assert own.dtype == lay_arr.dtype
        assert own.shape == lay_arr.shape
        assert np.array_equal(own, lay_arr)
        assert not np.shares_memory(own, lay_arr)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_arc_common_path_row_updates_equal_the_stacked_products(seed: int) -> None:
    """The slip tests' common path (every arc continues), now updating the scatters, GF rate, MW mean and GF level one 1-d row at a time, gives the bits of the stacked (3, 2, 1)-weight product it replaced: var·(1 − w) + (w·res)·res, rate + (b·res_GF)/dt, mean + (1·res_MW)/(n + 1), prediction + level weight·res_GF (source: the replaced code, STYLE rule 23; inputs: random states)."""
    from ionwarden.daemon.estimator._arcs import ArcBlock, ArcState, SlipThresholds
    from ionwarden.daemon.estimator._state import (
        DT,
        GF_LEVEL,
        GF_PRED,
        GF_RATE,
        GF_VAR,
        LAST_T,
        LOCK1,
        LT2,
        LWL,
        MW_MEAN,
        MW_VAR,
        NROW,
        RANK,
        N,
    )  # fmt: skip

    rng = np.random.default_rng(seed)
    d = 37
    th = SlipThresholds()
    g = rng.normal(size=(NROW, d))
    g[N] = rng.integers(2, 500, d).astype(np.float64)
    g[LAST_T] = 99.0 - rng.integers(0, 3, d)
    g[GF_VAR] = rng.uniform(1e-6, 1e-4, d)
    g[MW_VAR] = rng.uniform(1e-3, 0.2, d)
    g[LWL] = 0.86
    g[RANK : LT2 + 1] = 0.0
    g[LOCK1 : LT2 + 1] = 1.0
    state = ArcState(th)
    state.prepare_block(g)
    t = np.array(100.0)
    pred = g[GF_RATE] * (t - g[LAST_T]) + g[GF_LEVEL]
    gf_mw = np.stack((pred + rng.normal(0.0, 1e-4, d), g[MW_MEAN] + rng.normal(0.0, 1e-2, d)))
    cur = g[RANK : LT2 + 1].copy()
    before = g.copy()
    b = ArcBlock(g)
    new, reason = state.detect(
        b, t=t, gf_mw=gf_mw, el_rad=np.full(d, 0.5), el_known=True, cur=cur, lli_lost=None,
        gap_s=10.0, all_tracked=True, no_new=np.zeros(d, np.bool_),
    )  # fmt: skip
    assert reason is None  # the common path ran
    assert not new.any()
    # The replaced code: one (3, 2, d) product, then (2, d) operations on strided rows.
    weights = np.array([[[th.ema_weight]] * 2, [[th.rate_weight], [1.0]], [[th.level_weight]] * 2])
    res = gf_mw - np.stack((g[GF_PRED], before[MW_MEAN]))
    prod = np.multiply(res, weights)
    var = before[GF_VAR : MW_VAR + 1] * np.array(1.0 - th.ema_weight)
    sq = prod[0]
    sq *= res
    var += sq
    n = before[N] + 1.0
    x = prod[1]
    x /= np.stack((g[DT], n))
    expect = {
        "var": var, "n": n, "rate": before[GF_RATE] + x[0], "mw_mean": before[MW_MEAN] + x[1],
        "level": g[GF_PRED] + prod[2, 0],
    }  # fmt: skip
    got = {"var": g[GF_VAR : MW_VAR + 1], "n": g[N], "rate": g[GF_RATE], "mw_mean": g[MW_MEAN],
           "level": g[GF_LEVEL]}  # fmt: skip
    for name, value in expect.items():
        assert got[name].tobytes() == value.tobytes(), name


def test_quiet_enter_falls_back_to_np_errstate(monkeypatch: pytest.MonkeyPatch) -> None:
    """Without numpy 2's private error-state handles (numpy 1.x, or changed internals) the pair
    enters and leaves a public np.errstate: the same state inside, the outer one restored after
    (source: np.errstate)."""
    from ionwarden.daemon.estimator import _npfast

    monkeypatch.setattr(_npfast, "_var", None)
    with np.errstate(all="raise"):
        outer = np.geterr()
        token = quiet_enter()
        try:
            inside = np.geterr()
            np.divide(np.ones(1), np.zeros(1))  # no FloatingPointError: divide is ignored
        finally:
            _npfast._errstate_exit(token)
        assert np.geterr() == outer
    with np.errstate(all="raise"), np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        assert inside == np.geterr()
