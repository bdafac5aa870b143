"""StationEstimator on our own invented synthetic scenarios (tests/_estimator_synth.py)."""

from __future__ import annotations

import copy
import dataclasses
import json
import pickle

import numpy as np
import pytest

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.estimator import StationEstimator
from ionwarden.parsers import MAX_SAT_ID, GpsTime, ObsEpoch, signal_code

from ._estimator_synth import Scenario, Truth, generate, run, stack


@pytest.fixture(scope="module")
def quiet() -> tuple[Truth, list]:
    tr = generate(Scenario(n_sats=10, duration_s=1500.0, wave_amp_tecu=0.3, signals=("1C", "2W")))
    return tr, run(tr, StationEstimator(station="SYN"))


def _after(tr: Truth, seconds: float) -> np.ndarray:
    return (tr.t[:, None] >= seconds) & (tr.el > np.radians(15.0))


def test_estimator_stec_within_one_tecu_after_five_minutes(quiet):
    """StationEstimator levels STEC to within 1 TECU RMS when el > 15° and the arc is 5 min old."""
    tr, snaps = quiet
    err = stack(snaps, tr, "stec_tecu") - tr.stec
    ok = _after(tr, 300.0)
    assert np.sqrt(np.nanmean(err[ok] ** 2)) < 1.0  # issue 6 acceptance; truth from the generator


def test_estimator_rot_matches_truth_over_same_interval(quiet):
    """StationEstimator's ROT is within 0.1 TECU/min RMS of the truth differenced over 30 s, 2 mm phase noise."""
    tr, snaps = quiet
    rot = stack(snaps, tr, "rot_tecu_per_min")
    truth = np.full_like(tr.stec, np.nan)
    truth[30:] = (tr.stec[30:] - tr.stec[:-30]) / 0.5  # SCIENCE.md §5: ΔSTEC over 30 s, per minute
    d = (rot - truth)[30:]
    assert np.isfinite(d).sum() > 0.9 * d.size
    assert np.sqrt(np.nanmean(d**2)) < 0.1


def test_estimator_vtec_and_gradient_follow_plane(quiet):
    """StationEstimator's station VTEC and plane-fit gradient follow the generator's field (SCIENCE.md §6 mapping)."""
    _tr, snaps = quiet
    vtec = np.array([s.vtec_tecu for s in snaps[300:]])
    assert np.nanmax(np.abs(vtec - 20.0)) < 1.5
    grad = np.array([s.gradient_tecu_per_km for s in snaps[300:]])
    # generator: 0.002 E, −0.001 N TECU/km → |g| = 0.00224, plus a 0.3 TECU wave
    assert np.nanmedian(grad) == pytest.approx(np.hypot(0.002, 0.001), rel=0.35)
    mm = np.array([s.gradient_mm_per_km for s in snaps[300:]])
    assert np.nanmedian(mm / grad) == pytest.approx(
        162.37, rel=1e-3
    )  # 0.1624 m/TECU on L1 (SCIENCE.md §2)


def test_estimator_iono_free_code_within_three_sigma(quiet):
    """StationEstimator's iono-free code equals the iono-free truth within 3σ = 3·√(α²+β²)·σ_code (SCIENCE.md §3)."""
    tr, snaps = quiet
    ifc = stack(snaps, tr, "if_code_m")
    nf = stack(snaps, tr, "if_noise_factor")
    scale = 0.3 * (1.0 + 2.0 * np.exp(-np.degrees(tr.el) / 15.0))  # generator code σ
    z = (ifc - tr.rho) / (nf * scale)
    assert np.nanmean(np.abs(z) < 3.0) > 0.99
    hatch = stack(snaps, tr, "if_code_smoothed_m")
    assert np.nanstd((hatch - tr.rho)[200:]) < 0.3 * np.nanstd((ifc - tr.rho)[200:])


def test_estimator_slips_found_without_false_arcs():
    """StationEstimator finds ≥ 99% of 1–5 cycle slips at 1 Hz with < 0.1% false arcs (issue 6 acceptance)."""
    rng = np.random.default_rng(5)
    choices = [
        (1, 0),
        (0, 1),
        (1, 1),
        (-1, -1),
        (2, 1),
        (1, 2),
        (-1, 0),
        (0, -1),
        (3, 3),
        (5, 0),
        (0, 4),
    ]
    slips = []
    for _ in range(100):
        c = choices[int(rng.integers(len(choices)))]
        slips.append((int(rng.integers(0, 8)), int(rng.integers(20, 1790)), c[0], c[1]))
    tr = generate(Scenario(n_sats=8, duration_s=1800.0, slips=slips, signals=("1C", "2W")))
    snaps = run(tr, StationEstimator())
    slip = stack(snaps, tr, "slip") == 1
    truth = np.zeros_like(slip)
    for si, ti, _, _ in slips:
        truth[ti, si] = True
    slip[0] = False  # first epoch starts every arc
    assert (slip & truth).sum() >= 0.99 * truth.sum()
    assert (slip & ~truth).sum() < 0.001 * slip.size


def test_estimator_pair_fallback_keeps_satellites():
    """StationEstimator switches 1C-2W → 1C-5Q during a 2W outage, marks the switch, keeps > 90% of satellite-epochs."""
    outages = [(i, "2W", 300, 700) for i in range(6)]
    tr = generate(Scenario(n_sats=6, duration_s=1000.0, outages=outages))
    snaps = run(tr, StationEstimator())
    stec = stack(snaps, tr, "stec_tecu")
    assert np.isfinite(stec).mean() > 0.9
    assert snaps[400].satellites.pair[0] == "1C-5Q"
    assert snaps[800].satellites.pair[0] == "1C-2W"
    switch = stack(snaps, tr, "pair_switch") == 1
    assert switch[300].all()
    assert switch[701].all()
    assert snaps[-1].counters["arcs_pair_switch"] == 12


def test_estimator_roti_tracks_wave():
    """StationEstimator's ROTI is within 20% of the truth's std of 30 s ROT over 5 min where truth > 0.3 (Pi et al. 1997 definition)."""
    tr = generate(
        Scenario(
            n_sats=6,
            duration_s=1200.0,
            wave_amp_tecu=1.0,
            wave_period_s=400.0,
            signals=("1C", "2W"),
        )
    )
    snaps = run(tr, StationEstimator())
    roti = stack(snaps, tr, "roti_tecu_per_min")
    rot_t = np.full_like(tr.stec, np.nan)
    rot_t[30:] = (tr.stec[30:] - tr.stec[:-30]) / 0.5
    truth = np.full_like(tr.stec, np.nan)
    for k in range(330, len(tr.t)):
        truth[k] = np.std(rot_t[k - 299 : k + 1], axis=0)
    ok = truth > 0.3
    assert ok.sum() > 1000
    assert np.nanmax(np.abs(roti[ok] / truth[ok] - 1.0)) < 0.2


def _epoch(t: float, lli: int = 0, lock: int = 10, half: bool = False) -> ObsEpoch:
    sig = np.array([signal_code("1C"), signal_code("2W")], np.uint16)
    f = np.array([1575.42e6, 1227.6e6])
    rho = 2.1e7
    return ObsEpoch(
        time=GpsTime(2350, 1000.0 + t), sat=np.array([5, 5], np.int16), sig=sig,
        pseudorange_m=np.array([rho, rho + 3.0]), phase_cycles=rho * f / 299_792_458.0,
        range_rate_mps=np.full(2, np.nan), cn0_dbhz=np.full(2, 40.0, np.float32),
        lock_time_s=np.full(2, np.nan, np.float32), lock_indicator=np.full(2, lock, np.int16),
        half_cycle=np.full(2, half), lli=np.array([lli, 0], np.uint8), freq_hz=f,
    )  # fmt: skip


@pytest.mark.parametrize(
    ("kwargs", "counter"),
    [({"lli": 1}, "arcs_lli_or_half_cycle"), ({"half": True}, "arcs_lli_or_half_cycle"),
     ({"lock": 3}, "arcs_lock_time"), ({}, None)],
)  # fmt: skip
def test_estimator_new_arc_on_lock_flags(kwargs, counter):
    """StationEstimator starts a new arc on RINEX LLI bit 0, a half-cycle change or an MSM lock-indicator drop (RINEX 3.05 §5.3, RTCM DF402)."""
    est = StationEstimator()
    for k in range(5):
        s = est.update(_epoch(float(k)))
    s = est.update(_epoch(5.0, **kwargs))
    assert bool(s.satellites.slip[0]) is (counter is not None)
    if counter:
        assert s.counters[counter] == 1


def test_estimator_gap_starts_new_arc():
    """StationEstimator starts a new arc after a data gap longer than max_gap_s."""
    est = StationEstimator(EstimatorSettings(max_gap_s=10.0))
    for k in range(5):
        est.update(_epoch(float(k)))
    assert not est.update(_epoch(12.0)).satellites.slip[0]
    assert est.update(_epoch(30.0)).satellites.slip[0]


def test_estimator_out_of_order_epoch_is_counted():
    """StationEstimator ignores and counts an epoch that is not newer than the last one."""
    est = StationEstimator()
    first = est.update(_epoch(1.0))
    again = est.update(_epoch(1.0))
    assert again is first
    assert again.counters["epochs_out_of_order"] == 0
    assert est.counters["epochs_out_of_order"] == 1


def test_estimator_glonass_uses_cell_frequencies():
    """StationEstimator takes GLONASS FDMA frequencies from ObsEpoch.freq_hz (GLONASS ICD §3.3.1.4, k = −4)."""
    k = -4
    f = np.array([1602e6 + k * 0.5625e6, 1246e6 + k * 0.4375e6])
    rho, stec = 2.2e7, 30.0
    est = StationEstimator()
    for i in range(3):
        i_m = 40.3e16 * stec / f**2
        ep = ObsEpoch(
            time=GpsTime(2350, 500.0 + i), sat=np.array([105, 105], np.int16),
            sig=np.array([signal_code("1C"), signal_code("2C")], np.uint16),
            pseudorange_m=rho + i_m, phase_cycles=(rho - i_m) * f / 299_792_458.0,
            range_rate_mps=np.full(2, np.nan), cn0_dbhz=np.full(2, 40.0, np.float32),
            lock_time_s=np.full(2, np.nan, np.float32), lock_indicator=np.full(2, -1, np.int16),
            half_cycle=np.zeros(2, np.bool_), lli=np.zeros(2, np.uint8), freq_hz=f,
        )  # fmt: skip
        s = est.update(ep)
    assert s.satellites.pair == ("1C-2C",)
    assert s.satellites.stec_tecu[0] == pytest.approx(stec, abs=1e-6)
    # no channel known → NaN frequency → no TEC (SCIENCE.md §1)
    bad = ObsEpoch(**{**{n: getattr(ep, n) for n in ep.__slots__ if not n.startswith("_")},
                      "time": GpsTime(2350, 510.0), "freq_hz": np.full(2, np.nan)})  # fmt: skip
    s = est.update(bad)
    assert s.satellites.pair == ("",)
    assert np.isnan(s.satellites.stec_tecu[0])


def test_estimator_state_survives_copy_and_pickle(quiet):
    """StationEstimator copied or pickled mid-stream continues exactly like the original (STYLE rule 23)."""
    tr, _ = quiet
    a = StationEstimator()
    run(Truth(**{**tr.__dict__, "epochs": tr.epochs[:400]}), a)
    b = copy.deepcopy(a)
    c = pickle.loads(pickle.dumps(a))
    for est in (a, b, c):
        last = run(
            Truth(
                **{
                    **tr.__dict__,
                    "epochs": tr.epochs[400:450],
                    "el": tr.el[400:],
                    "az": tr.az[400:],
                }
            ),
            est,
        )[-1]
        est.result = last  # type: ignore[attr-defined]
    np.testing.assert_array_equal(a.result.satellites.stec_tecu, b.result.satellites.stec_tecu)
    np.testing.assert_array_equal(
        a.result.satellites.roti_tecu_per_min, c.result.satellites.roti_tecu_per_min
    )


def test_estimator_receiver_bias_estimated_and_persisted():
    """StationEstimator estimates a 6 TECU receiver bias with its σ and restores it from state_dict()."""
    tr = generate(
        Scenario(n_sats=10, duration_s=1800.0, rcv_bias_tecu=6.0, signals=("1C", "2W"), seed=3)
    )
    est = StationEstimator()
    snaps = run(tr, est)
    last = snaps[-1]
    assert last.receiver_bias_tecu == pytest.approx(6.0, abs=1.5)
    assert 0.0 < last.receiver_bias_sigma_tecu < 3.0
    state = est.state_dict()
    del state["rolling"]  # numpy arrays (npz checkpoint); the bias part stays plain JSON types
    state = json.loads(json.dumps(state))
    fresh = StationEstimator()
    fresh.load_state(state)
    np.testing.assert_allclose(fresh.biases.rx.bias, est.biases.rx.bias)
    with pytest.raises(ValueError, match="version"):
        fresh.load_state({"version": 99})


def test_estimator_empty_epoch_gives_empty_snapshot():
    """StationEstimator returns a snapshot with no satellites for an epoch without cells."""
    est = StationEstimator()
    s = est.update(ObsEpoch.empty(GpsTime(2350, 10.0)))
    assert s.n_sats == 0
    assert len(s.satellites) == 0
    assert np.isnan(s.vtec_tecu)


def test_estimator_time_reset_restarts_arcs():
    """StationEstimator restarts its arcs when time jumps back more than an hour (replay restart)."""
    est = StationEstimator()
    for k in range(5):
        est.update(_epoch(5000.0 + k))
    s = est.update(_epoch(0.0))
    assert s.counters["time_resets"] == 1
    assert s.satellites.slip[0]
    assert est.update(_epoch(1.0)).counters["epochs_out_of_order"] == 0


def test_estimator_twenty_hz_rot_uses_thirty_second_lag():
    """StationEstimator at 20 Hz differences STEC 30 s apart (SCIENCE.md §5): ROT within 0.1 TECU/min of the truth."""
    tr = generate(
        Scenario(
            n_sats=4, duration_s=90.0, interval_s=0.05, wave_amp_tecu=0.5, signals=("1C", "2W")
        )
    )
    snaps = run(tr, StationEstimator())
    rot = stack(snaps, tr, "rot_tecu_per_min")
    lag = 600  # 30 s at 20 Hz
    truth = (tr.stec[lag:] - tr.stec[:-lag]) / 0.5
    d = rot[lag:] - truth
    assert np.isfinite(d).mean() > 0.95
    assert np.sqrt(np.nanmean(d**2)) < 0.1


def test_estimator_satellite_dcb_override_from_config():
    """StationEstimator subtracts a configured satellite DCB: STEC shifts by +K·c·DCB (SCIENCE.md §3 K; DCB = band-1 − band-2 delay)."""
    base = StationEstimator()
    over = StationEstimator(EstimatorSettings(satellite_dcb_ns={"G05": {"1C-2W": 2.0}}))
    for k in range(3):
        a = base.update(_epoch(float(k)))
        b = over.update(_epoch(float(k)))
    k_l1l2 = 9.5196  # TECU per metre, GPS L1/L2 (SCIENCE.md §3 table)
    shift = b.satellites.stec_tecu[0] - a.satellites.stec_tecu[0]
    assert shift == pytest.approx(k_l1l2 * 299_792_458.0 * 2e-9, rel=1e-4)
    with pytest.raises(ValueError, match="not configured"):
        StationEstimator(EstimatorSettings(satellite_dcb_ns={"G05": {"1C-9Z": 1.0}}))


def _snapshot_arrays(snap) -> dict[str, np.ndarray]:
    s = snap.satellites
    names = ("sat", "el_deg", "stec_tecu", "vtec_tecu", "rot_tecu_per_min", "roti_tecu_per_min",
             "iono_l1_m", "if_code_m", "if_phase_m", "if_code_smoothed_m", "slip", "arc_id",
             "mp1_m", "mp2_m", "if_noise_factor", "pair_switch")  # fmt: skip
    out = {n: np.asarray(getattr(s, n)) for n in names}
    out["pair"] = np.array(s.pair)
    out["cell_el_deg"] = snap.cell_el_deg
    out["station"] = np.array([snap.vtec_tecu, snap.roti_max_tecu_per_min, snap.gradient_mm_per_km])
    return out


def test_estimator_cached_layout_equals_rebuilt_layout():
    """StationEstimator gives bit-identical figures whether the epoch layout is reused or rebuilt every epoch (outages and slips change it)."""
    outages = [(0, "2W", 200, 260), (3, "5Q", 100, 400)]
    slips = [(1, 150, 1, 0), (2, 300, 0, 1)]
    tr = generate(Scenario(n_sats=6, duration_s=500.0, outages=outages, slips=slips))
    cached = StationEstimator()
    rebuilt = StationEstimator()
    snaps_c = run(tr, cached)
    rebuilt.set_receiver_position(cached.geometry.rx_ecef, "config")
    for ti, ep in enumerate(tr.epochs):
        rebuilt.set_gsv(ep.time, tr.sats, np.degrees(tr.el[ti]), np.degrees(tr.az[ti]))
        rebuilt.cells._last = None  # forget the cached layout: rebuild from the cells
        a, b = _snapshot_arrays(snaps_c[ti]), _snapshot_arrays(rebuilt.update(ep))
        for name, va in a.items():
            np.testing.assert_array_equal(va, b[name], err_msg=f"{name} at epoch {ti}")
    # from the scenario: the first epoch, then each outage's first and last-plus-one epoch
    assert cached.cells.rebuilds == 5
    assert rebuilt.cells.rebuilds == len(tr.epochs)


def test_cell_router_rebuilds_when_a_cell_becomes_unusable():
    """CellRouter reuses the layout while cells repeat and rebuilds it (next pair) when a code turns NaN."""
    tr = generate(Scenario(n_sats=3, duration_s=3.0))
    est = StationEstimator()
    ep0, ep1, ep2 = tr.epochs
    lay0 = est.cells.layout(ep0)
    assert est.cells.layout(ep1) is lay0  # same satellites, signals, frequencies, usability
    pr = ep2.pseudorange_m.copy()
    pr[(ep2.sat == 1) & (ep2.sig == signal_code("2W"))] = np.nan
    lay2 = est.cells.layout(dataclasses.replace(ep2, pseudorange_m=pr))
    assert lay2 is not lay0
    assert lay2.labels == ("1C-5Q", "1C-2W", "1C-2W")  # config pair order (EstimatorSettings)
    assert lay2.n_unusable == 1


def _layout_oracle(pairs, sat, sig, usable):
    """Per present satellite the first configured pair whose two signals both have a usable cell
    (the last such cell where one repeats), by plain Python loops."""
    present = sorted({int(s) for s in sat if 0 <= s < MAX_SAT_ID})
    last = {}
    for k, (s, g, u) in enumerate(zip(sat.tolist(), sig.tolist(), usable.tolist(), strict=True)):
        if u:
            last[(s, g)] = k
    out = []
    for s in present:
        sys_i = s // 100
        for r in range(pairs.width):
            a, b = int(pairs.sig1[sys_i, r]), int(pairs.sig2[sys_i, r])
            if a and b and (s, a) in last and (s, b) in last:
                out.append((s, r, last[(s, a)], last[(s, b)]))
                break
    return present, out


def test_cell_router_matches_plain_loops():
    """CellRouter's pair choice and cell indices equal plain loops over random epochs with
    repeated cells, unusable values, signals outside the pair table and satellites out of range
    (pair order from EstimatorSettings' defaults; "first configured pair", issue 6)."""
    rng = np.random.default_rng(7)
    est = StationEstimator()
    pairs = est.pairs
    codes = [signal_code(c) for c in ("1C", "2W", "2L", "5Q", "5X", "7Q", "2I", "6I", "7I", "1X")]
    for _ in range(60):
        n = int(rng.integers(0, 40))
        sat = rng.choice([1, 2, 3, 5, 101, 102, 205, 206, 319, 320, 699, 700, 1000], n)
        sig = rng.choice(codes, n)
        pr = rng.choice([2.2e7, 0.0, np.nan], n, p=[0.85, 0.05, 0.10])
        ep = ObsEpoch(
            time=GpsTime(2300, 100.0), sat=sat.astype(np.int16), sig=sig.astype(np.uint16),
            pseudorange_m=pr, phase_cycles=np.full(n, 1.1e8), range_rate_mps=np.zeros(n),
            cn0_dbhz=np.full(n, 45.0, np.float32), lock_time_s=np.full(n, 100.0, np.float32),
            lock_indicator=np.zeros(n, np.int16), half_cycle=np.zeros(n, np.bool_),
            lli=np.zeros(n, np.uint8), freq_hz=1.1e9 + sig * 1e6,  # distinct per signal
        )  # fmt: skip
        usable = np.isfinite(pr) & (pr > 0) & (sig >= 32)
        lay = est.cells.layout(ep)
        present, chosen = _layout_oracle(pairs, sat, sig, usable)
        assert lay.present.tolist() == present
        assert lay.idx.tolist() == [c[0] for c in chosen]
        assert lay.rank.tolist() == [c[1] for c in chosen]
        assert lay.i12_2[0].tolist() == [c[2] for c in chosen]
        assert lay.i12_2[1].tolist() == [c[3] for c in chosen]
