"""ReceiverBias (daemon/estimator/_rxbias.py): re-levelling of open arcs, their levelling errors as
random effects, the version-1 state; BiasModel's use of the arcs' levelling corrections."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.daemon.estimator._rxbias import N_VTEC, ReceiverBias

LABELS = ["G:1C-2W", "E:1C-5Q"]


def _epochs(n: int, seed: int = 5):
    """Invented geometry: 8 satellites in two groups drifting in elevation, a quadratic VTEC."""
    rng = np.random.default_rng(seed)
    m = 8
    az = rng.uniform(0.0, 2 * np.pi, m)
    el0 = rng.uniform(0.3, 1.2, m)
    group = np.array([0, 1] * (m // 2), np.intp)
    for e in range(n):
        el = np.clip(el0 + 0.01 * e * np.cos(az), 0.25, 1.5)
        mapping = 1.0 / np.sqrt(1.0 - (6371.0 * np.cos(el) / 6721.0) ** 2)  # SCIENCE.md §6
        r_km = 350.0 / np.tan(el)
        x_km, y_km = r_km * np.sin(az), r_km * np.cos(az)
        vtec = 12.0 + 2e-3 * x_km - 4e-3 * y_km + 0.5e-6 * y_km**2
        yield 30.0 * e, mapping, x_km, y_km, group, np.sin(el) ** 2, mapping * vtec


def test_relevel_equals_fit_with_final_offsets():
    """Re-levelling open arcs gives the same normal equations as feeding every epoch with each
    arc's final levelling offset (the algebra of add_epoch: rhs gains Σ w·h·Δoffset)."""
    a = ReceiverBias(LABELS, memory_s=3600.0)
    b = ReceiverBias(LABELS, memory_s=3600.0)
    arcs = np.arange(8, dtype=np.int64) + 100
    n = 20
    rng = np.random.default_rng(1)
    offsets = rng.normal(0.0, 3.0, (n, 8)).cumsum(axis=0) / np.arange(1, n + 1)[:, None]
    for k, (t, mapping, x_km, y_km, group, w, stec) in enumerate(_epochs(n)):
        kw = {"mapping": mapping, "x_km": x_km, "y_km": y_km, "group": group, "weight": w}
        a.add_epoch(t, y=stec + offsets[k], arc=arcs, level=offsets[k], **kw)
        b.add_epoch(t, y=stec + offsets[-1], **kw)
    np.testing.assert_allclose(a.normal, b.normal, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(a.rhs, b.rhs, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(a.bias, b.bias, rtol=1e-9, atol=1e-9)


def test_receiver_bias_loads_version_1_state():
    """A version-1 state (bias-only normal equations, the VTEC plane eliminated) loads as the bias
    block with nothing known about the surface: the same biases as solving it directly."""
    normal = np.array([[40.0, 5.0], [5.0, 30.0]])
    rhs = np.array([100.0, -60.0])
    v1 = {"version": 1, "labels": LABELS, "normal": normal.tolist(), "rhs": rhs.tolist(),
          "sq_res": 2.0, "dof": 8.0, "last_t": 12.0}  # fmt: skip
    rb = ReceiverBias(LABELS, memory_s=3600.0)
    rb.load_state(v1)
    expect = np.linalg.solve(normal + np.eye(2) / 100.0**2, rhs)  # weak 100-TECU prior (module)
    np.testing.assert_allclose(rb.bias, expect, rtol=1e-12)
    assert rb.normal.shape == (N_VTEC + 2, N_VTEC + 2)
    again = ReceiverBias(LABELS, memory_s=3600.0)
    again.load_state(rb.state_dict())  # and the version-2 state round-trips
    np.testing.assert_allclose(again.bias, rb.bias, rtol=1e-12)
    np.testing.assert_allclose(again.normal, rb.normal)


def _augmented_oracle(rb_epochs, memory_s: float):
    """Batch numpy oracle of the random-effect fit: one dense information filter whose state is
    (coefficients, groups, every arc ever seen), the random walk and forgetting applied to all of
    it, arcs re-levelled by adding their information column × Δoffset, priors at the solve (a
    closed arc keeps the variance it had when last seen). Standard information-filter algebra
    (common practice), written independently of ReceiverBias's Schur-complement bookkeeping."""
    from ionwarden.daemon.estimator import _rxbias

    p, g = N_VTEC, len(LABELS)
    arcs: list[int] = []
    lam_n = np.zeros((p + g, p + g))
    eta = np.zeros(p + g)
    lev: dict[int, float] = {}
    var: dict[int, float] = {}
    last_t = None
    for t, mapping, x_km, y_km, group, w, y, arc, level, arc_var in rb_epochs:
        if last_t is not None:
            dt = t - last_t
            f = np.exp(-dt / memory_s)
            lam_n *= f
            eta *= f
            q = _rxbias._VTEC_RW * dt
            s = lam_n[:p, :p] + np.diag(1.0 / q)
            k = np.linalg.solve(s, lam_n[:p, :])
            eta -= lam_n[:, :p] @ np.linalg.solve(s, eta[:p])
            lam_n = lam_n - lam_n[:, :p] @ k
        last_t = t
        for a in arc.tolist():
            if a not in arcs:  # a new state
                arcs.append(a)
                lam_n = np.pad(lam_n, ((0, 1), (0, 1)))
                eta = np.pad(eta, (0, 1))
        col = {a: p + g + arcs.index(a) for a in arcs}
        for a, lv in zip(arc.tolist(), level.tolist(), strict=True):
            if a in lev:  # re-level the arc's earlier observations
                eta += lam_n[:, col[a]] * (lv - lev[a])
            lev[a] = lv
        h = np.zeros((len(y), lam_n.shape[0]))
        h[:, :p] = ReceiverBias._design(mapping, x_km, y_km)
        h[np.arange(len(y)), p + group] = 1.0
        h[np.arange(len(y)), [col[a] for a in arc.tolist()]] = 1.0
        lam_n += (h * w[:, None]).T @ h
        eta += (h * w[:, None]).T @ y
        var.update(zip(arc.tolist(), arc_var.tolist(), strict=True))
    prior = np.full(lam_n.shape[0], 1.0 / _rxbias._PRIOR_SIGMA_TECU**2)
    prior[:p] = 1.0 / _rxbias._PRIOR_VTEC_SIGMA**2
    prior[3:p] = 1.0 / _rxbias._CURVATURE_SIGMA**2
    prior[p + g :] = [1.0 / var[a] for a in arcs]
    x = np.linalg.solve(lam_n + np.diag(prior), eta)
    return x[p : p + g], dict(zip(arcs, x[p + g :].tolist(), strict=True))


def _random_effect_epochs(n: int, *, close_at: int | None = None):
    """Invented epochs (see :func:`_epochs`) with receiver biases 4 and −2 TECU, a levelling
    error per arc that shrinks as the arc's offset improves, and, from ``close_at``, satellite 0
    on a new arc (its old arc closed)."""
    rng = np.random.default_rng(8)
    err0 = rng.normal(0.0, 1.5, 8)
    bias = np.array([4.0, -2.0])
    out = []
    for k, (t, mapping, x_km, y_km, group, w, stec) in enumerate(_epochs(n)):
        arc = np.arange(8, dtype=np.int64) + 100
        if close_at is not None and k >= close_at:
            arc[0] = 200
        level = err0 * 3.0 / (3.0 + k) + 0.1 * rng.normal(size=8)  # offset error in y
        y = stec + bias[group] + level
        arc_var = 2.0 * 1.5**2 * 3.0 / (3.0 + k) * np.ones(8)
        out.append((t, mapping, x_km, y_km, group, w, y, arc, level, arc_var))
    return out


@pytest.mark.parametrize(("close_at", "memory_s"), [(None, 3600.0), (12, 1e12)])
def test_receiver_bias_random_effect_arcs_equal_augmented_filter(close_at, memory_s):
    """ReceiverBias with arc_var equals a dense information filter carrying every arc as a state (biases and open arcs' offsets, abs_tol 1e-9 TECU), with forgetting, and with an arc closed on the way."""
    # A closed arc is eliminated with its prior and then forgotten with the data; the oracle
    # forgets its data only (the prior enters at the end): the same without forgetting
    # (memory 1e12 s). With 1 h memory the biases differed by 5e-4 TECU 390 s after the close.
    epochs = _random_effect_epochs(25, close_at=close_at)
    rb = ReceiverBias(LABELS, memory_s=memory_s)
    for t, mapping, x_km, y_km, group, w, y, arc, level, arc_var in epochs:
        rb.add_epoch(
            t, y=y, mapping=mapping, x_km=x_km, y_km=y_km, group=group, weight=w, arc=arc,
            level=level, arc_var=arc_var,
        )  # fmt: skip
    bias, offsets = _augmented_oracle(epochs, memory_s)
    np.testing.assert_allclose(rb.bias, bias, rtol=0, atol=1e-9)
    expect = [offsets[a] for a in epochs[-1][7].tolist()]
    np.testing.assert_allclose(rb.arc_offset, expect, rtol=0, atol=1e-9)


def test_receiver_bias_random_effect_arcs_find_a_badly_levelled_arc():
    """ReceiverBias with arc_var finds an arc levelled 3 TECU off (arc_offset within 0.5 TECU) and keeps the biases within 0.3 TECU of the invented 4 and −2, where the white-noise fit is pulled by > 0.3."""
    bias = np.array([4.0, -2.0])
    white = ReceiverBias(LABELS, memory_s=3600.0)
    re = ReceiverBias(LABELS, memory_s=3600.0)
    arc = np.arange(8, dtype=np.int64) + 100
    level = np.zeros(8)
    level[2] = 3.0  # invented levelling error of one arc (TECU)
    var = np.full(8, 0.5**2)
    var[2] = 3.0**2  # the arc's own increments would say it is poorly levelled
    for t, mapping, x_km, y_km, group, w, stec in _epochs(40):
        kw = {"mapping": mapping, "x_km": x_km, "y_km": y_km, "group": group, "weight": w}
        y = stec + bias[group] + level
        white.add_epoch(t, y=y, **kw)
        re.add_epoch(t, y=y, arc=arc, level=level, arc_var=var, **kw)
    # Truth of the invented scenario: biases (4, −2), arc 102 off by +3 TECU.
    assert np.max(np.abs(white.bias - bias)) > 0.3
    np.testing.assert_allclose(re.bias, bias, atol=0.3)
    assert abs(re.arc_offset[2] - 3.0) < 0.5


def test_receiver_bias_state_keeps_random_effect_arcs():
    """ReceiverBias state_dict → load_state resumes open random-effect arcs exactly; a version-2 state written before the arcs' own block existed loads with those arcs closed."""
    epochs = _random_effect_epochs(15)
    a = ReceiverBias(LABELS, memory_s=3600.0)
    for t, mapping, x_km, y_km, group, w, y, arc, level, arc_var in epochs[:10]:
        a.add_epoch(
            t, y=y, mapping=mapping, x_km=x_km, y_km=y_km, group=group, weight=w, arc=arc,
            level=level, arc_var=arc_var,
        )  # fmt: skip
    b = ReceiverBias(LABELS, memory_s=3600.0)
    b.load_state(a.state_dict())
    np.testing.assert_allclose(b.bias, a.bias, rtol=1e-12)
    np.testing.assert_allclose(b.arc_offset, a.arc_offset, rtol=1e-12, atol=1e-12)
    for t, mapping, x_km, y_km, group, w, y, arc, level, arc_var in epochs[10:]:
        kw = {"mapping": mapping, "x_km": x_km, "y_km": y_km, "group": group, "weight": w}
        a.add_epoch(t, y=y, arc=arc, level=level, arc_var=arc_var, **kw)
        b.add_epoch(t, y=y, arc=arc, level=level, arc_var=arc_var, **kw)
    np.testing.assert_allclose(b.bias, a.bias, rtol=1e-10)
    old = {k: v for k, v in a.state_dict().items() if k not in ("arc_n", "arc_r", "arc_var")}
    c = ReceiverBias(LABELS, memory_s=3600.0)
    c.load_state(old)
    assert c.arc_offset.shape == (0,)  # open arcs not resumed
    np.testing.assert_allclose(c.normal, a.normal)


def test_bias_model_levelling_correction_only_for_its_arc():
    """BiasModel.correction subtracts an arc's levelling correction from that arc only (not from a new arc of the same satellite), and from any arc when no arc ids are given."""
    from ionwarden.daemon.config import EstimatorSettings
    from ionwarden.daemon.estimator._biases import BiasModel
    from ionwarden.daemon.estimator._pairs import PairTable

    cfg = EstimatorSettings()
    pairs = PairTable.from_config(cfg.pairs)
    bm = BiasModel(pairs, cfg, 400)
    flat = np.array([5 * pairs.width])
    # invented: G05's arc 42 found 1.5 TECU off by the fit
    bm.set_arc_corrections(flat, np.array([1.5]), np.array([42]))
    group = np.array([0])
    k = np.array([9.52])
    # Expected by construction: no satellite or receiver part yet, so the total is the correction.
    assert bm.correction(flat, group, k, arc=np.array([42]))[1][0] == 1.5
    assert bm.correction(flat, group, k, arc=np.array([43]))[1][0] == 0.0
    assert bm.correction(flat, group, k)[1][0] == 1.5
