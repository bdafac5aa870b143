"""Streaming equals batch: the estimator's rolling figures against whole-arc numpy computations
(STYLE rule 23), and the ring buffers against plain window computations."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationEstimator, iono_coefficients
from ionwarden.daemon.estimator._windows import LagRing, SlotStd
from ionwarden.daemon.geo import mapping_factor

from ._estimator_synth import Scenario, generate, run, stack

C = 299_792_458.0


@pytest.fixture(scope="module", params=[5, 12], ids=["5sats", "12sats"])
def arc(request):
    """One 20-minute arc of 5 or 12 satellites (no slips), with its snapshots: with 12 the
    receiver-bias fit has the spare satellites to re-level the arcs (``_biases``)."""
    tr = generate(
        Scenario(
            n_sats=request.param, duration_s=1200.0, wave_amp_tecu=0.5, signals=("1C", "2W"),
            seed=11,
        )
    )  # fmt: skip
    return tr, run(tr, StationEstimator())


def _batch_inputs(tr, sat_index: int):
    """Per-epoch P1, P2, L1, L2 (m) of one satellite, straight from the epochs."""
    f1, f2 = 1575.42e6, 1227.6e6
    out = np.full((len(tr.epochs), 4), np.nan)
    sat = tr.sats[sat_index]
    for k, ep in enumerate(tr.epochs):
        sel = ep.sat == sat
        p = ep.pseudorange_m[sel]
        ph = ep.phase_cycles[sel]
        out[k] = p[0], p[1], ph[0] * C / f1, ph[1] * C / f2
    return out, f1, f2


@pytest.mark.parametrize("sat_index", [0, 3])
def test_estimator_streaming_equals_batch_over_arc(arc, sat_index):
    """StationEstimator's STEC/ROT/ROTI/IF/Hatch equal a batch numpy computation over the arc (abs_tol 1e-6; SCIENCE.md §3–§5, §9)."""
    tr, snaps = arc
    x, f1, f2 = _batch_inputs(tr, sat_index)
    p1, p2, l1, l2 = x.T
    co = iono_coefficients(np.array([f1]), np.array([f2]))
    k, alpha, beta = co.k_tecu_per_m[0], co.alpha[0], co.beta[0]
    el = tr.el[:, sat_index]
    # Levelling: running sin²el-weighted mean of K(P2−P1) − K(L1−L2) up to each epoch.
    gf = k * (l1 - l2)
    w = np.maximum(np.sin(el), 0.1) ** 2
    offset = np.cumsum(w * (k * (p2 - p1) - gf)) / np.cumsum(w)
    stec = gf + offset
    # ROT over 30 epochs (1 Hz), ROTI = population std of the last 300 ROT samples.
    rot = np.full_like(stec, np.nan)
    rot[30:] = (gf[30:] - gf[:-30]) / 0.5
    roti = np.full_like(stec, np.nan)
    for i in range(34, len(stec)):
        win = rot[max(0, i - 299) : i + 1]
        roti[i] = np.std(win[np.isfinite(win)])
    if_code = alpha * p1 + beta * p2
    if_phase = alpha * l1 + beta * l2
    hatch = np.empty_like(if_code)  # per-entity scalar Hatch filter (SCIENCE.md §9)
    hatch[0] = if_code[0]
    for i in range(1, len(hatch)):
        n = min(i + 1, 100)
        hatch[i] = if_code[i] / n + (n - 1) / n * (hatch[i - 1] + if_phase[i] - if_phase[i - 1])

    got = {name: stack(snaps, tr, name)[:, sat_index] for name in
           ("stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "if_code_m", "if_code_smoothed_m")}  # fmt: skip
    # Receiver bias: the estimator subtracts its estimate (reported in the snapshot); add it back.
    np.testing.assert_allclose(got["if_code_m"], if_code, atol=1e-6)
    np.testing.assert_allclose(got["if_code_smoothed_m"], hatch, atol=1e-6)
    np.testing.assert_allclose(
        got["rot_tecu_per_min"], rot, atol=1e-4
    )  # float32 ring: 1e-4 TECU/min
    np.testing.assert_allclose(got["roti_tecu_per_min"][34:], roti[34:], atol=1e-4)
    bias = np.array(
        [s.receiver_bias_tecu if np.isfinite(s.receiver_bias_tecu) else 0.0 for s in snaps]
    )
    # ... and the arc's levelling correction from the receiver-bias fit (reported per satellite).
    relevel = stack(snaps, tr, "stec_relevel_tecu")[:, sat_index]
    if len(tr.sats) >= 12:
        assert np.count_nonzero(relevel[np.isfinite(relevel)])  # the re-levelling is exercised
    np.testing.assert_allclose(got["stec_tecu"] + bias + relevel, stec, atol=1e-6)
    # VTEC = STEC / M(el) (SCIENCE.md §6 thin shell, h = 350 km)
    vtec = stack(snaps, tr, "vtec_tecu")[:, sat_index]
    np.testing.assert_allclose(vtec, got["stec_tecu"] / mapping_factor(el, 350e3), rtol=1e-12)


def test_slot_std_equals_window_std():
    """SlotStd's running sums give the population std of the finite values in the window (abs_tol 1e-9)."""
    rng = np.random.default_rng(3)
    win = SlotStd(8, window_s=20.0, slot_s=1.0)
    history: list[tuple[float, np.ndarray]] = []
    sats = np.arange(8)
    t = 0.0
    for _ in range(200):
        t += float(rng.choice([1.0, 1.0, 1.0, 3.0, 0.5]))  # gaps and sub-slot samples
        v = rng.normal(0, 1, 8)
        v[rng.random(8) < 0.2] = np.nan
        win.push(t, sats, v)
        if not history or np.floor(t) > np.floor(history[-1][0]):
            history.append((t, v))
        slot = np.floor(t)
        vals = np.array([h[1] for h in history if slot - np.floor(h[0]) < 20])
        expect = np.array(
            [np.std(c[np.isfinite(c)]) if np.isfinite(c).sum() >= 2 else np.nan for c in vals.T]
        )
        np.testing.assert_allclose(win.std(sats, 2), expect, atol=1e-6)


def test_lag_ring_grows_and_keeps_history():
    """LagRing returns the value lag_s ago, also after growing for a faster data rate."""
    ring = LagRing(4, lag_s=30.0, rows=8)
    sats = np.array([1, 2])
    arcs = np.array([0, 0], np.int32)
    for t in np.arange(0.0, 40.0, 1.0):
        ring.ensure_interval(1.0)
        ring.push(float(t), sats, np.array([t, -t]), arcs)
    v, t_lag = ring.lagged(40.0, sats, arcs, 1.0)
    assert t_lag == 10.0
    np.testing.assert_array_equal(v, [10.0, -10.0])
    ring.ensure_interval(0.05)  # 20 Hz: grows, keeps the 1 Hz history
    assert ring.rows >= 600
    v, _ = ring.lagged(40.0, sats, arcs, 1.0)
    np.testing.assert_array_equal(v, [10.0, -10.0])
    v, _ = ring.lagged(40.0, sats, np.array([0, 1], np.int32), 1.0)  # other arc → NaN
    assert v[0] == 10.0
    assert np.isnan(v[1])


def test_bias_model_separates_glonass_biases_from_plane():
    """BiasModel recovers per-satellite GLONASS combined biases and the GPS receiver bias when VTEC is an exact plane (batch least squares is exact on noise-free data)."""
    from ionwarden.daemon.config import EstimatorSettings
    from ionwarden.daemon.estimator import PairTable
    from ionwarden.daemon.estimator._biases import BiasModel
    from ionwarden.parsers import MAX_SAT_ID

    cfg = EstimatorSettings()
    pairs = PairTable.from_config(cfg.pairs)
    model = BiasModel(pairs, cfg, MAX_SAT_ID)
    gps = np.arange(1, 9)
    glo = np.arange(101, 107)
    for s in gps:
        model.set_delays(int(s), np.zeros(10))  # satellite part known: 0
    rng = np.random.default_rng(3)
    b_glo = rng.uniform(-8.0, 8.0, glo.shape[0])  # invented combined biases (TECU)
    b_gps = 2.5  # invented receiver bias, GPS group of pair rank 0
    sats = np.concatenate((gps, glo))
    m = sats.shape[0]
    az0 = rng.uniform(0.0, 2 * np.pi, m)
    el0 = rng.uniform(0.3, 1.3, m)
    for e in range(60):
        t = 30.0 * e
        el = np.clip(el0 + 0.004 * e * np.sin(az0), 0.2, 1.5)
        mapping = mapping_factor(el, 350e3)
        r_km = 350.0 / np.tan(el) * 0.9
        x_km, y_km = r_km * np.sin(az0 + 0.003 * e), r_km * np.cos(az0 + 0.003 * e)
        vtec = 12.0 + 0.5 * np.sin(e / 9.0) + 3e-3 * x_km - 5e-3 * y_km  # plane, varying
        y = mapping * vtec + np.concatenate((np.full(gps.shape, b_gps), b_glo))
        model.update(
            t, y=y, idx=sats, rank=np.zeros(m, np.intp),
            group=(sats // 100) * pairs.width, mapping=mapping, x_km=x_km, y_km=y_km,
            weight=np.sin(el) ** 2,
        )  # fmt: skip
    # Exact data: the only error is the weak 100-TECU prior (common practice tolerance).
    np.testing.assert_allclose(model.comb_applied[glo, 0], b_glo, atol=0.02)
    np.testing.assert_allclose(model.applied[0], b_gps, atol=0.02)
    assert np.all(np.isfinite(model.rx.sigma[model.sat_group[glo, 0]]))
    fresh = BiasModel(pairs, cfg, MAX_SAT_ID)
    fresh.load_state(model.state_dict())
    np.testing.assert_allclose(fresh.comb_applied, model.comb_applied, equal_nan=True)
