"""StationPipeline against the simulator's truth (our own invented scenarios, daemon/sim).

Each scenario runs once per module (1 Hz, cut to keep the suite fast). The quiet-day runs are GPS,
GLONASS and Galileo; BeiDou has its own run (test_truth_beidou_stec_within_one_tecu).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from ionwarden.daemon.estimator import StationPipeline
from ionwarden.daemon.sim import Simulator, block_epochs, build_scenario, nav_ephemerides

FIELDS = ("stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "el_deg", "arc_id", "slip",
          "if_code_m", "pair")  # fmt: skip


def _without_dtau(ephs: list) -> list:
    """The ephemerides as a receiver that sends Δτ_n = 0 ("not known") for GLONASS gives them."""
    return [dataclasses.replace(e, dtau_s=0.0) if hasattr(e, "dtau_s") else e for e in ephs]


def _run(
    name: str, duration_s: float, systems: str = "GRE", *, dtau: bool = True, seed: int = 1
) -> dict[str, np.ndarray]:
    """Run a scenario through the pipeline; (epoch, satellite) arrays of ours and the truth.
    ``dtau=False``: the GLONASS Δτ_n are withheld (see :func:`_without_dtau`)."""
    sc = dataclasses.replace(
        build_scenario(name, seed=seed, duration_s=duration_s, rate_hz=1.0), systems=systems
    )
    sim = Simulator(sc)
    pipe = StationPipeline("HARC", position_ecef_m=sim.station_ecef(0), ephemerides_per_sat=400)
    ephs = nav_ephemerides(sim)
    pipe.handle(ephs if dtau else _without_dtau(ephs))
    sats = sim.sats
    n_e, n_s = sc.n_epochs, sats.shape[0]
    out = {k: np.full((n_e, n_s), np.nan) for k in
           ("stec", "rot", "roti", "arc", "slip", "ifc", "dual", "t_stec", "t_rot", "t_el",
            "t_slip", "t_if", "t_vtec", "t_bands")}  # fmt: skip
    col = {int(s): i for i, s in enumerate(sats.tolist())}
    for blocks in sim.run():
        b = blocks[0]
        g = b.geometry
        rows = g.epoch_index
        cols = np.array([col[int(s)] for s in b.sat.tolist()])
        out["t_stec"][np.ix_(rows, cols)] = g.stec_tecu
        out["t_rot"][np.ix_(rows, cols)] = g.rot_tecu_per_min
        out["t_el"][np.ix_(rows, cols)] = np.degrees(g.el_rad)
        out["t_slip"][np.ix_(rows, cols)] = b.slipped.any(axis=2)
        out["t_if"][np.ix_(rows, cols)] = b.if_expected_m
        out["t_vtec"][np.ix_(rows, cols)] = g.vtec_tecu
        band = b.code // 32  # (S, K)
        out["t_bands"][np.ix_(rows, cols)] = sum(
            (b.present & (band == k)[None]).any(axis=2) for k in range(1, 10)
        )
        for e, ep in zip(np.flatnonzero(b.in_stream), block_epochs(b, 41), strict=True):
            s = pipe.handle_one(ep)
            f = s.satellites
            c = np.array([col[int(x)] for x in f.sat.tolist()], dtype=np.intp)
            r = rows[e]
            out["stec"][r, c] = f.stec_tecu
            out["rot"][r, c] = f.rot_tecu_per_min
            out["roti"][r, c] = f.roti_tecu_per_min
            out["arc"][r, c] = f.arc_id
            out["slip"][r, c] = f.slip
            out["ifc"][r, c] = f.if_code_m
            out["dual"][r, c] = np.array([p != "" for p in f.pair], dtype=float)
    # Arc age (s) per (epoch, satellite) at 1 Hz.
    age = np.full((n_e, n_s), np.nan)
    for j in range(n_s):
        start = -1.0
        last = np.nan
        for i in range(n_e):
            a = out["arc"][i, j]
            if np.isnan(a):
                continue
            if a != last:
                start, last = i, a
            age[i, j] = i - start
    out["age"] = age
    out["sys"] = np.broadcast_to(sats // 100, (n_e, n_s))
    return out


@pytest.fixture(scope="module")
def quiet():
    return _run("quiet-day", 1800.0)


def test_truth_stec_within_one_tecu(quiet):
    """STEC is within 1.0 TECU RMS of the truth (el > 15°, arc ≥ 5 min) for GPS and Galileo (broadcast TGD/BGD; issue 6 acceptance)."""
    q = quiet
    ok = (
        (q["t_el"] > 15.0)
        & (q["age"] >= 300.0)
        & np.isfinite(q["stec"])
        & np.isin(q["sys"], (0, 2))
    )
    d = q["stec"][ok] - q["t_stec"][ok]
    assert ok.sum() > 10_000
    assert np.sqrt(np.mean(d**2)) < 1.0


def test_truth_glonass_stec_settles(quiet):
    """GLONASS STEC (satellite part from the broadcast Δτ_n, or a per-satellite combined bias where Δτ_n = 0) is within 1.0 TECU RMS after 5 min of arc (issue 6 acceptance)."""
    q = quiet
    ok = (q["t_el"] > 15.0) & (q["age"] >= 300.0) & np.isfinite(q["stec"]) & (q["sys"] == 1)
    d = q["stec"][ok] - q["t_stec"][ok]
    assert ok.sum() > 5_000
    # Measured (simulator truth, arc ≥ 300 s): 0.57 TECU here (seed 1), 0.31–0.95 on seeds 1–12
    # (test_truth_stec_within_one_tecu_every_seed); 1.5 was asserted while seed 6 was at 1.32.
    assert np.sqrt(np.mean(d**2)) < 1.0


def test_truth_glonass_combined_biases_without_dtau():
    """With Δτ_n withheld (a receiver sending 0), every GLONASS satellite gets a combined bias fitted with the VTEC surface: STEC within 1.5 TECU RMS after 5 min of arc."""
    q = _run("quiet-day", 1800.0, dtau=False)
    ok = (q["t_el"] > 15.0) & (q["age"] >= 300.0) & np.isfinite(q["stec"]) & (q["sys"] == 1)
    d = q["stec"][ok] - q["t_stec"][ok]
    assert ok.sum() > 5_000
    # Measured (simulator truth, seeds 1–12): 0.42 here (seed 1), 0.35–0.84 on ten seeds, 1.11 on
    # seed 7 (the common receiver-bias error of that seed; 1.27 before the arcs' levelling errors
    # entered the fit as random effects), so 1.5 is kept.
    assert np.sqrt(np.mean(d**2)) < 1.5


def test_truth_beidou_stec_within_one_tecu():
    """BeiDou STEC (B1I/B3I, satellite part from the broadcast TGD1) is within 1.0 TECU RMS of the truth (el > 15°, arc ≥ 5 min; issue 6 acceptance)."""
    q = _run("quiet-day", 1800.0, systems="GREC")
    ok = (q["t_el"] > 15.0) & (q["age"] >= 300.0) & np.isfinite(q["stec"]) & (q["sys"] == 3)
    d = q["stec"][ok] - q["t_stec"][ok]
    assert ok.sum() > 3_000
    # Measured (simulator truth, arc ≥ 300 s): 0.37 TECU RMS on seed 1 (0.55, 0.44, 0.80 on seeds
    # 2, 6, 7).
    assert np.sqrt(np.mean(d**2)) < 1.0


@pytest.mark.parametrize("seed", range(2, 13))
def test_truth_stec_within_one_tecu_every_seed(seed):
    """STEC is within 1.0 TECU RMS of the truth (el > 15°, arc ≥ 5 min) for GPS+Galileo and for GLONASS on seeds 2–12 of the quiet day too (issue 6 acceptance)."""
    q = _run("quiet-day", 1800.0, seed=seed)
    base = (q["t_el"] > 15.0) & (q["age"] >= 300.0) & np.isfinite(q["stec"])
    # Measured (simulator truth), TECU RMS, seeds 2–12: GPS+Galileo 0.38–0.90, GLONASS 0.31–0.95
    # (seeds 6 and 7 highest: a receiver-bias error of 0.3–0.8 TECU learnt in the first minutes
    # of the cold start). Before the arcs' levelling errors entered the fit as random effects:
    # 0.45–1.03 and 0.48–1.32.
    for systems in ((0, 2), (1,)):
        ok = base & np.isin(q["sys"], systems)
        d = q["stec"][ok] - q["t_stec"][ok]
        assert ok.sum() > 5_000
        assert np.sqrt(np.mean(d**2)) < 1.0, systems


def test_truth_rot_unbiased_at_noise_floor(quiet):
    """ROT matches the truth differenced over 30 s: < 0.1 TECU/min RMS above 60° (≈2 mm phase noise there), unbiased everywhere."""
    q = quiet
    d = q["rot"] - q["t_rot"]
    high = np.isfinite(d) & (q["t_el"] > 60.0)
    assert high.sum() > 2_000
    assert np.sqrt(np.mean(d[high] ** 2)) < 0.1
    allv = np.isfinite(d)
    assert abs(np.mean(d[allv])) < 0.01


def test_truth_slips_found_few_false_arcs(quiet):
    """≥ 99% of the simulator's slips/lock losses start a new arc, with < 0.1% false arcs at 1 Hz."""
    q = quiet
    truth = q["t_slip"] == 1
    ours = q["slip"] == 1
    seen = np.isfinite(q["slip"]) & (q["dual"] == 1)
    first = np.zeros_like(ours)
    for j in range(ours.shape[1]):  # an arc's first sample is not a false alarm
        i = np.flatnonzero(seen[:, j])
        if i.size:
            first[i[0], j] = True
    assert (ours & truth & seen).sum() >= 0.99 * (truth & seen).sum()
    false = ours & ~truth & seen & ~first
    assert false.sum() < 0.001 * seen.sum()


def test_truth_iono_free_code_unbiased(quiet):
    """The iono-free code equals the simulator's noise-free iono-free code on average (|mean| < 5 cm) and within 3σ, el > 30°."""
    q = quiet
    ok = np.isfinite(q["ifc"]) & np.isfinite(q["t_if"]) & (q["t_el"] > 30.0) & (q["sys"] == 0)
    d = q["ifc"][ok] - q["t_if"][ok]
    assert abs(np.mean(d)) < 0.05
    # 3σ of the IF combination of two ~0.5 m codes with multipath: α,β of L1/L2 (SCIENCE.md §3)
    assert np.mean(np.abs(d) < 3 * 2.978 * 0.7) > 0.99


def test_truth_pair_fallback_keeps_satellites():
    """During a band-2 outage the estimator falls back to another pair: > 90% of satellite-epochs with a second band stay dual-frequency (issue 6 acceptance)."""
    q = _run("band-outage", 2200.0, systems="GE")
    # BandOutage 600–1200 s: band 2 C/N0 −20 dB; 1500–2100 s: band 2 lost (GPS L2 gone).
    seen = np.isfinite(q["t_el"]) & (q["t_el"] > 10.0)
    lost = slice(1510, 2090)
    gps = q["sys"] == 0
    possible = seen & (q["t_bands"] >= 2)  # a second band exists to fall back to
    during = (q["dual"][lost][possible[lost]] == 1).mean()
    gps_during = (q["dual"][lost][gps[lost] & seen[lost]] == 1).mean()
    # GPS satellites without L5 (simulated older blocks) have no second band while L2 is lost.
    assert gps_during > 0.7
    assert during > 0.9
    kept = seen & (q["dual"] == 1)
    assert kept.sum() > 0.9 * seen.sum()


def test_truth_roti_in_scintillation():
    """ROTI is within 20% of the truth's std of 30-s ROT over 5 min where that exceeds 0.3 TECU/min (Pi et al. 1997)."""
    q = _run("scintillation", 1500.0, systems="GE")
    rot_t = q["t_rot"]
    truth = np.full_like(rot_t, np.nan)
    for i in range(330, rot_t.shape[0]):
        w = rot_t[i - 299 : i + 1]
        fin = np.isfinite(w)
        n = fin.sum(axis=0)
        v = np.where(fin, w, 0.0)
        mean = v.sum(axis=0) / np.maximum(n, 1)
        var = (np.where(fin, (w - mean) ** 2, 0.0)).sum(axis=0) / np.maximum(n, 1)
        truth[i] = np.where(n >= 150, np.sqrt(var), np.nan)
    ok = (truth > 0.3) & np.isfinite(q["roti"]) & (q["t_el"] > 15.0) & (q["age"] > 330.0)
    assert ok.sum() > 500
    ratio = q["roti"][ok] / truth[ok]
    assert np.mean(np.abs(ratio - 1.0) < 0.2) > 0.95


def test_truth_combined_biases_survive_checkpoint(tmp_path):
    """The learnt GLONASS combined biases survive state_dict → runtime npz checkpoint → load_state."""
    from ionwarden.daemon.runtime._checkpoint import load_checkpoint, save_checkpoint

    sc = dataclasses.replace(
        build_scenario("quiet-day", duration_s=900.0, rate_hz=1.0), systems="GR"
    )
    sim = Simulator(sc)
    pipe = StationPipeline("HARC", position_ecef_m=sim.station_ecef(0), ephemerides_per_sat=400)
    pipe.handle(_without_dtau(nav_ephemerides(sim)))  # every GLONASS satellite: combined bias
    for blocks in sim.run():
        pipe.handle(block_epochs(blocks[0], 41))
    b = pipe.estimator.biases
    assert np.isfinite(b.comb_applied).sum() >= 3  # several GLONASS satellites learnt
    save_checkpoint(tmp_path, "HARC", pipe.state_dict(), fp="f", wall_time_s=0.0)
    state = load_checkpoint(tmp_path, "HARC", fp="f", wall_time_s=1.0, max_age_s=10.0)
    assert state is not None
    fresh = StationPipeline("HARC")
    fresh.load_state_dict(state)
    fb = fresh.estimator.biases
    np.testing.assert_allclose(fb.comb_applied, b.comb_applied, equal_nan=True)
    np.testing.assert_allclose(fb.rx.bias, b.rx.bias)
