"""ReceiverBias (daemon/estimator/_rxbias.py): re-levelling of open arcs and the version-1 state."""

from __future__ import annotations

import numpy as np

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
