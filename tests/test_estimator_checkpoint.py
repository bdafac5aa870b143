"""StationEstimator checkpoints: rolling state (arcs, ROT ring, ROTI window) survives a restart.

Our own invented scenario (tests/_estimator_synth.py); the state goes through the runtime's real
``.npz`` checkpoint file (save_checkpoint/load_checkpoint), as under systemd.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from ionwarden.daemon.config import EstimatorSettings
from ionwarden.daemon.estimator import StationEstimator, StationPipeline, StationSnapshot
from ionwarden.daemon.geo import satellite_geometry
from ionwarden.daemon.runtime import load_checkpoint, save_checkpoint
from ionwarden.parsers import ObsEpoch, StreamDecoder

from ._estimator_synth import Scenario, Truth, generate, run, stack

CUT = 500  # epoch index of the restart
FIELDS = ("stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "vtec_tecu", "if_code_smoothed_m")


@pytest.fixture(scope="module")
def scenario() -> tuple[Truth, list[StationSnapshot]]:
    tr = generate(
        Scenario(
            n_sats=8, duration_s=900.0, wave_amp_tecu=0.3, rcv_bias_tecu=4.0,
            signals=("1C", "2W"), seed=5,
        )
    )  # fmt: skip
    return tr, run(tr, StationEstimator(station="SYN"))


def _part(tr: Truth, start: int, stop: int | None = None) -> Truth:
    """The epochs start:stop with their geometry (what ``run`` feeds)."""
    return Truth(
        **{**tr.__dict__, "epochs": tr.epochs[start:stop], "el": tr.el[start:], "az": tr.az[start:]}
    )


def _through_file(est: StationEstimator, tmp_path: Path) -> dict[str, Any]:
    """state_dict → the runtime's .npz checkpoint file → the dict a restarted daemon loads."""
    save_checkpoint(tmp_path, "SYN", est.state_dict(), fp="f", wall_time_s=1000.0)
    state = load_checkpoint(tmp_path, "SYN", fp="f", wall_time_s=1010.0, max_age_s=60.0)
    assert state is not None
    return state


def test_estimator_checkpoint_resumes_arcs_like_uninterrupted_run(scenario, tmp_path):
    """StationEstimator restored from a checkpoint continues exactly like an uninterrupted run when the restart gap is short."""
    tr, full = scenario
    a = StationEstimator(station="SYN")
    run(_part(tr, 0, CUT), a)
    state = _through_file(a, tmp_path)
    assert state["version"] == 2
    b = StationEstimator(station="SYN")
    b.load_state(state)
    after = run(_part(tr, CUT), b)
    assert b.counters["state_resumed"] == 1
    ref = full[CUT:]
    # Oracle: the uninterrupted run over the same epochs (common practice, STYLE rule 23); the
    # only difference allowed is float rounding: abs_tol 1e-9 (TECU, TECU/min, m).
    for name in FIELDS:
        np.testing.assert_allclose(
            stack(after, tr, name), stack(ref, tr, name), atol=1e-9, rtol=0, err_msg=name
        )
    np.testing.assert_array_equal(stack(after, tr, "arc_id"), stack(ref, tr, "arc_id"))
    assert not any(s.satellites.slip.any() for s in after)  # no spurious new arc at the restart
    assert np.isfinite(after[0].satellites.roti_tecu_per_min).all()  # window kept, not refilled
    assert [s.receiver_bias_tecu for s in after] == pytest.approx(
        [s.receiver_bias_tecu for s in ref], abs=1e-9
    )


def test_estimator_checkpoint_after_long_gap_starts_new_arcs_keeps_biases(scenario, tmp_path):
    """StationEstimator restored after a gap longer than max_gap_s starts new arcs but keeps the receiver biases."""
    tr, _ = scenario
    a = StationEstimator(station="SYN")
    run(_part(tr, 0, CUT), a)
    state = _through_file(a, tmp_path)
    b = StationEstimator(station="SYN")
    b.load_state(state)
    gap = 30  # s at 1 Hz, > max_gap_s = 15 s (the slip detector's gap rule, common practice)
    assert gap > EstimatorSettings().max_gap_s
    np.testing.assert_allclose(b.biases.rx.bias, a.biases.rx.bias, atol=1e-9)
    after = run(_part(tr, CUT + gap), b)
    assert b.counters["state_expired"] == 1
    assert "state_resumed" not in b.counters
    first = after[0].satellites
    assert first.slip.all()
    assert (first.arc_id >= a.arcs.next_arc).all()  # arc ids are not reused across the restart
    assert np.isnan(first.rot_tecu_per_min).all()  # no ROT across the gap
    assert np.isnan(first.roti_tecu_per_min).all()  # ROTI window starts empty
    # The biases were not re-learnt from scratch: the first snapshot already applies them.
    assert after[0].receiver_bias_tecu == pytest.approx(4.0, abs=1.5)  # scenario's invented bias


def test_estimator_checkpoint_version_one_loads_biases_only(scenario):
    """StationEstimator loads a version-1 state (receiver biases only) and then builds its arcs anew."""
    tr, _ = scenario
    a = StationEstimator(station="SYN")
    run(_part(tr, 0, CUT), a)
    v1 = {"version": 1, "station": "SYN", "receiver_bias": a.biases.state_dict()}
    b = StationEstimator(station="SYN")
    b.load_state(v1)
    np.testing.assert_allclose(b.biases.rx.bias, a.biases.rx.bias, atol=1e-9)
    after = run(_part(tr, CUT), b)
    assert after[0].satellites.slip.all()
    assert "state_resumed" not in b.counters
    assert "state_expired" not in b.counters


def test_estimator_checkpoint_rolling_part_dropped_when_config_differs(scenario, tmp_path):
    """StationEstimator drops (and counts) a rolling state that does not fit its ROTI window, keeping the biases."""
    tr, _ = scenario
    a = StationEstimator(station="SYN")
    run(_part(tr, 0, CUT), a)
    state = _through_file(a, tmp_path)
    b = StationEstimator(EstimatorSettings(roti_window_s=120.0), station="SYN")
    b.load_state(state)
    assert b.counters["state_rolling_rejected"] == 1
    np.testing.assert_allclose(b.biases.rx.bias, a.biases.rx.bias, atol=1e-9)
    assert run(_part(tr, CUT, CUT + 1), b)[0].satellites.slip.all()


def test_estimator_checkpoint_is_compact(scenario):
    """StationEstimator's rolling state keeps only the rows of satellites it has seen."""
    tr, _ = scenario
    a = StationEstimator(station="SYN")
    run(_part(tr, 0, 50), a)
    roll = a.state_dict()["rolling"]
    assert roll["sats"].tolist() == sorted(tr.sats.tolist())
    assert roll["rot"]["value"].shape[1] == tr.sats.shape[0]
    assert "rolling" not in StationEstimator().state_dict()  # nothing seen: biases only


DEMO = Path(__file__).resolve().parents[1] / "daemon" / "data" / "demo.bin"


@pytest.mark.skipif(not DEMO.is_file(), reason="bundled demo capture not built yet")
def test_pipeline_checkpoint_resumes_demo_capture_through_npz(tmp_path):
    """StationPipeline restarted mid-capture from its npz checkpoint continues the arcs of an uninterrupted run."""
    msgs = StreamDecoder().feed(DEMO.read_bytes()[:400_000]) + StreamDecoder().feed(b"")
    epochs = [i for i, m in enumerate(msgs) if isinstance(m, ObsEpoch)]
    cut = epochs[len(epochs) // 2]
    full = StationPipeline("harc", ephemerides_per_sat=50)
    ref = [o for o in full.handle(msgs) if isinstance(o, StationSnapshot)]
    first = StationPipeline("harc", ephemerides_per_sat=50)
    first.handle(msgs[:cut])
    save_checkpoint(tmp_path, "harc", first.state_dict(), fp="f", wall_time_s=0.0)
    state = load_checkpoint(tmp_path, "harc", fp="f", wall_time_s=5.0, max_age_s=60.0)
    assert state is not None
    second = StationPipeline("harc", ephemerides_per_sat=50)
    second.load_state_dict(state)
    # The receiver re-broadcasts its ephemerides and station position after a restart.
    second.handle([m for m in msgs[:cut] if not isinstance(m, ObsEpoch)])
    after = [o for o in second.handle(msgs[cut:]) if isinstance(o, StationSnapshot)]
    assert second.estimator.counters["state_resumed"] == 1
    ref = ref[-len(after) :]
    assert len(after) > 20
    for a, r in zip(after, ref, strict=True):
        np.testing.assert_array_equal(a.satellites.sat, r.satellites.sat)
        np.testing.assert_array_equal(a.satellites.arc_id, r.satellites.arc_id)
        np.testing.assert_array_equal(a.satellites.slip, r.satellites.slip)
        # Oracle: the uninterrupted run over daemon/data/demo.bin (our invented demo scenario;
        # common practice, STYLE rule 23); abs_tol 2e-3 TECU and
        # TECU/min covers geometry re-derived from the re-broadcast ephemerides (its cache
        # refreshes every geometry_refresh_s at other epochs than in the uninterrupted run).
        for name in ("stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min"):
            np.testing.assert_allclose(
                getattr(a.satellites, name), getattr(r.satellites, name), atol=2e-3, rtol=0,
                err_msg=name,
            )  # fmt: skip


@pytest.mark.skipif(not DEMO.is_file(), reason="bundled demo capture not built yet")
def test_geometry_extrapolates_with_a_rate_right_after_start():
    """Geometry extrapolates elevations with a real rate from the first refresh after a (re)start."""
    msgs = StreamDecoder().feed(DEMO.read_bytes()[:60_000]) + StreamDecoder().feed(b"")
    pipe = StationPipeline("harc", ephemerides_per_sat=50)
    snaps = [o for o in pipe.handle(msgs) if isinstance(o, StationSnapshot)]
    geo = pipe.estimator.geometry
    s = next(x for x in snaps if x.time.total_s - snaps[0].time.total_s >= 20.0)
    assert geo.rx_ecef is not None
    direct = satellite_geometry(
        s.time.total_s, geo.rx_ecef, s.satellites.sat.astype(np.intp), geo.store
    )
    ok = direct.valid
    assert ok.sum() >= 5
    # Oracle: the orbit evaluated at that epoch (our satellite_geometry); 20 s of linear
    # extrapolation leaves a second-order error well under 0.01° (a zero rate left ~0.17°).
    np.testing.assert_allclose(
        s.satellites.el_deg[ok], np.degrees(direct.el_rad[ok]), atol=0.01, rtol=0
    )
