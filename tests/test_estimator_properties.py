"""Property tests: StationEstimator never crashes on odd epochs and keeps its output consistent."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.estimator import StationEstimator
from ionwarden.parsers import GpsTime, ObsEpoch, signal_code

SIGS = [signal_code(s) for s in ("1C", "2W", "5Q", "2C", "7Q", "6I", "2I")] + [0, 31, 319]


@st.composite
def epochs(draw):
    n = draw(st.integers(0, 30))
    sat = np.array(
        draw(
            st.lists(
                st.sampled_from([1, 2, 7, 105, 211, 323, 699, 0, -1, 700]), min_size=n, max_size=n
            )
        ),
        np.int16,
    )
    sig = np.array(draw(st.lists(st.sampled_from(SIGS), min_size=n, max_size=n)), np.uint16)
    fl = st.one_of(st.just(float("nan")), st.floats(-1e8, 1e8), st.floats(2e7, 2.6e7))
    pr = np.array(draw(st.lists(fl, min_size=n, max_size=n)))
    ph = np.array(draw(st.lists(fl, min_size=n, max_size=n)))
    fr = np.array(
        draw(
            st.lists(
                st.sampled_from([1575.42e6, 1227.6e6, 1176.45e6, float("nan"), 1.0]),
                min_size=n,
                max_size=n,
            )
        )
    )
    lli = np.array(draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)), np.uint8)
    return sat, sig, pr, ph, fr, lli


@settings(max_examples=60, deadline=None)
@given(st.lists(epochs(), min_size=1, max_size=6))
def test_estimator_survives_arbitrary_epochs(batch):
    """StationEstimator returns consistent snapshots (never raises) for any cells, NaNs, bad ids or codes."""
    est = StationEstimator()
    for k, (sat, sig, pr, ph, fr, lli) in enumerate(batch):
        n = sat.shape[0]
        ep = ObsEpoch(
            time=GpsTime(2350, 100.0 + k), sat=sat, sig=sig, pseudorange_m=pr, phase_cycles=ph,
            range_rate_mps=np.full(n, np.nan), cn0_dbhz=np.full(n, 40.0, np.float32),
            lock_time_s=np.full(n, np.nan, np.float32), lock_indicator=np.full(n, -1, np.int16),
            half_cycle=np.zeros(n, np.bool_), lli=lli, freq_hz=fr,
        )  # fmt: skip
        s = est.update(ep)  # pytest turns any leaked RuntimeWarning into an error
        m = len(s.satellites)
        assert s.n_sats == m
        assert len(s.satellites.pair) == m
        for name in ("el_deg", "stec_tecu", "rot_tecu_per_min", "if_code_m", "slip", "arc_id"):
            assert getattr(s.satellites, name).shape == (m,)
        assert s.cell_el_deg.shape == (n,)
