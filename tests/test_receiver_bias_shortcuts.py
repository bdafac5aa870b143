"""Shortcuts of the receiver-bias fit (daemon/estimator/_rxbias.py, _biases.py): the same-arcs path
of ``same_ids`` (re-levelling and levelling increments without the id matching) gives the general
path's result bit for bit. No computed value is checked against a reference here: the general
path is the oracle (its own values are tested in test_receiver_bias.py and the oracle tests)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationPipeline, _biases, _rxbias
from ionwarden.daemon.estimator._rxbias import ReceiverBias, same_ids
from ionwarden.daemon.sim import Simulator, block_epochs, build_scenario, nav_ephemerides

_FIELDS = ("normal", "rhs", "bias", "sigma", "vtec_coef", "arc_offset", "_arc_id", "_arc_h",
           "_arc_n", "_arc_r", "_arc_var", "_arc_lev")  # fmt: skip


def _general_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """Disable the same-arcs shortcut in both modules (the general id matching runs instead)."""
    monkeypatch.setattr(_rxbias, "same_ids", lambda known, ids: False)
    monkeypatch.setattr(_biases, "same_ids", lambda known, ids: False)


def _assert_same(a: ReceiverBias, b: ReceiverBias) -> None:
    for f in _FIELDS:
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f, strict=True)
    assert (a.sq_res, a.dof) == (b.sq_res, b.dof)


def test_same_ids_only_for_equal_sequences():
    """same_ids is true for the same ids in the same order only."""
    a = np.array([4, 7, 9], np.int64)
    assert same_ids(a, a.copy())
    assert not same_ids(a, a[::-1].copy())
    assert not same_ids(a, a[:2].copy())
    assert not same_ids(np.zeros(0, np.int64), a)


def _feed(rb: ReceiverBias, n: int) -> list[np.ndarray]:
    """Invented epochs (9 satellites, 3 groups): arcs mostly continue, one closes and one opens
    now and then, one arc without a levelling variance (the solve's gather branch) at times."""
    rng = np.random.default_rng(11)
    m = 9
    az = rng.uniform(0.0, 2 * np.pi, m)
    el0 = rng.uniform(0.3, 1.2, m)
    group = np.array([0, 1, 2] * 3, np.intp)
    arc = np.arange(m, dtype=np.int64)
    level = rng.normal(0.0, 2.0, m)
    out = []
    for e in range(n):
        if e % 7 == 6:  # an arc closes and a new one opens at the end (order changes)
            k = int(rng.integers(m))
            keep = np.delete(np.arange(m), k)
            arc = np.append(arc[keep], arc.max() + 1)
            level = np.append(level[keep], rng.normal(0.0, 2.0))
            az, el0, group = az[np.r_[keep, k]], el0[np.r_[keep, k]], group[np.r_[keep, k]]
        level = level + rng.normal(0.0, 0.2, m) / (e + 1)
        el = np.clip(el0 + 0.01 * e * np.cos(az), 0.25, 1.5)
        mapping = 1.0 / np.sqrt(1.0 - (6371.0 * np.cos(el) / 6721.0) ** 2)
        x_km, y_km = 350.0 / np.tan(el) * np.sin(az), 350.0 / np.tan(el) * np.cos(az)
        y = mapping * (12.0 + 2e-3 * x_km) + group + level + rng.normal(0.0, 0.1, m)
        var = np.full(m, 0.5)
        if e % 5 == 4:
            var[2] = 0.0
        rb.add_epoch(30.0 * e, y=y, mapping=mapping, x_km=x_km, y_km=y_km, group=group,
                     weight=np.sin(el) ** 2, arc=arc, level=level, arc_var=var)  # fmt: skip
        out.append(rb.arc_offset.copy())
    return out


def test_receiver_bias_same_arcs_shortcut_matches_general_path(monkeypatch):
    """ReceiverBias.add_epoch gives bit for bit the general path's state when arcs continue in the same order (the re-levelling shortcut), over closing and opening arcs."""
    labels = ["G:1C-2W", "E:1C-5Q", "R:1C-2C", "", ""]
    fast = ReceiverBias(labels, memory_s=3600.0)
    off_fast = _feed(fast, 40)
    _general_path(monkeypatch)
    slow = ReceiverBias(labels, memory_s=3600.0)
    off_slow = _feed(slow, 40)
    _assert_same(fast, slow)
    for a, b in zip(off_fast, off_slow, strict=True):
        np.testing.assert_array_equal(a, b, strict=True)


def _pipeline_run(seed: int) -> tuple[StationPipeline, list[np.ndarray]]:
    """Ten minutes of the simulator's quiet day, GLONASS Δτ_n withheld (per-satellite groups)."""
    sc = dataclasses.replace(
        build_scenario("quiet-day", seed=seed, duration_s=600.0, rate_hz=1.0), systems="GRE"
    )
    sim = Simulator(sc)
    pipe = StationPipeline("SHRT", position_ecef_m=sim.station_ecef(0), ephemerides_per_sat=400)
    ephs = nav_ephemerides(sim)
    pipe.handle([dataclasses.replace(e, dtau_s=0.0) if hasattr(e, "dtau_s") else e for e in ephs])
    stec = [
        pipe.handle_one(ep).satellites.stec_tecu
        for blocks in sim.run()
        for ep in block_epochs(blocks[0], 41)
    ]
    return pipe, stec


def test_bias_model_same_arcs_shortcut_matches_general_path(monkeypatch):
    """BiasModel.update over ten simulated minutes gives bit for bit the general path's fit, levelling increments and corrections with the same-arcs shortcut."""
    fast, stec_fast = _pipeline_run(6)
    _general_path(monkeypatch)
    slow, stec_slow = _pipeline_run(6)
    a, b = fast.estimator.biases, slow.estimator.biases
    assert b.rx._arc_id.shape[0] > 5  # the fit ran with open arcs
    _assert_same(a.rx, b.rx)
    for f in ("applied", "comb_applied", "_corr_flat", "_corr_val", "_corr_arc", "_nz_sum",
              "_nz_cnt", "_pool"):  # fmt: skip
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f, strict=True)
    for x, y in zip(stec_fast, stec_slow, strict=True):  # and so the STEC of every epoch
        np.testing.assert_array_equal(x, y, strict=True)
