"""MSM4/MSM7 encoder: round trips within the field resolution, byte identity with the old encoder."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.sim import Simulator, block_epochs, build_scenario
from ionwarden.parsers import EPOCH_DTYPES, GpsTime, ObsEpoch, _msm_layout, frequencies_hz
from ionwarden.parsers._msm_encode import _group_nanmeans, encode_msm
from ionwarden.parsers._msm_layout import encode_layout
from ionwarden.parsers._msm_tables import MSM_SYSTEMS
from ionwarden.parsers._stream import StreamDecoder
from tests._msm_encode_reference import encode_msm_reference

C = 299_792_458.0
_LETTERS = "GRECJSI"


@st.composite
def epochs(draw) -> ObsEpoch:
    """Random multi-constellation epochs with physically shaped values."""
    week = draw(st.integers(2100, 2400))
    tow_ms = draw(st.integers(0, 604_799_999))
    time = GpsTime(week, tow_ms / 1000)
    rows = []
    channels = {}
    systems = draw(st.sets(st.sampled_from(sorted(MSM_SYSTEMS)), min_size=1, max_size=4))
    for block in sorted(systems):
        system = MSM_SYSTEMS[block]
        sig_codes = [int(c) for c in system.signals if c]
        sigs = draw(st.lists(st.sampled_from(sig_codes), min_size=1, max_size=3, unique=True))
        max_sats = max(1, 64 // len(sigs))
        bits = draw(
            st.lists(st.integers(1, 40), min_size=1, max_size=min(12, max_sats), unique=True)
        )
        for bit in bits:
            sat = system.sat_base + bit
            if system.letter == "R":
                channels[sat] = draw(st.integers(-7, 6))
            base = draw(st.floats(1.9e7, 3.8e7))
            rate = draw(st.floats(-900, 900))
            rows += [
                (
                    sat,
                    sig,
                    base + draw(st.floats(-50, 50)),
                    draw(st.floats(-500, 500)),
                    rate + draw(st.floats(-0.3, 0.3)),
                    draw(st.floats(20, 60)),
                    draw(st.floats(0, 900)),
                    draw(st.booleans()),
                )
                for sig in sigs
            ]
    sat = np.array([r[0] for r in rows], np.int16)
    sig = np.array([r[1] for r in rows], np.uint16)
    chan = np.array([channels.get(int(s), -128) for s in sat], np.int8)
    freq = frequencies_hz(sat, sig, chan)
    pr = np.array([r[2] for r in rows])
    return ObsEpoch(
        time=time,
        station_id=draw(st.integers(0, 4095)),
        sat=sat,
        sig=sig,
        pseudorange_m=pr,
        phase_cycles=(pr + np.array([r[3] for r in rows])) * freq / C,
        range_rate_mps=np.array([r[4] for r in rows]),
        cn0_dbhz=np.array([r[5] for r in rows], np.float32),
        lock_time_s=np.array([r[6] for r in rows], np.float32),
        lock_indicator=np.full(len(rows), -1, np.int16),
        half_cycle=np.array([r[7] for r in rows], np.bool_),
        lli=np.zeros(len(rows), np.uint8),
        freq_hz=freq,
    )


def _roundtrip(epoch: ObsEpoch, level: int) -> ObsEpoch:
    frames = encode_msm(epoch, level=level)
    decoder = StreamDecoder(reference_time=epoch.time + 3000.0)
    out = [m for m in decoder.feed(b"".join(frames)) + decoder.feed(b"") if isinstance(m, ObsEpoch)]
    assert len(out) == 1, decoder.statistics()
    return out[0]


def _aligned(a: ObsEpoch, b: ObsEpoch):
    ka = a.sat.astype(np.int64) * 1024 + a.sig
    kb = b.sat.astype(np.int64) * 1024 + b.sig
    ia, ib = np.argsort(ka), np.argsort(kb)
    assert (ka[ia] == kb[ib]).all()
    return ia, ib


@settings(max_examples=60, deadline=None)
@given(epochs())
def test_msm7_encode_decode_roundtrip(epoch):
    """encode_msm(level=7) then StreamDecoder returns each value within its MSM7 resolution (RTCM 10403.3 Tables 3.5-87/88)."""
    got = _roundtrip(epoch, 7)
    assert got.time == epoch.time
    assert got.station_id == epoch.station_id
    ia, ib = _aligned(epoch, got)
    # DF405: 2^-29 ms = 0.56 mm; DF406: 2^-31 ms; DF404: 1e-4 m/s; DF408: 2^-4 dB-Hz.
    np.testing.assert_allclose(got.pseudorange_m[ib], epoch.pseudorange_m[ia], rtol=0, atol=1e-3)
    np.testing.assert_allclose(got.phase_cycles[ib], epoch.phase_cycles[ia], rtol=0, atol=2e-3)
    np.testing.assert_allclose(got.range_rate_mps[ib], epoch.range_rate_mps[ia], rtol=0, atol=6e-5)
    np.testing.assert_allclose(got.cn0_dbhz[ib], epoch.cn0_dbhz[ia], rtol=0, atol=1 / 32 + 1e-6)
    np.testing.assert_allclose(got.freq_hz[ib], epoch.freq_hz[ia])  # GLONASS k via DF419
    assert (got.half_cycle[ib] == epoch.half_cycle[ia]).all()
    # DF407 (Table 3.5-75): the decoded minimum never exceeds the true lock time.
    assert (got.lock_time_s[ib] <= epoch.lock_time_s[ia] + 1e-6).all()
    assert (got.lock_time_s[ib] >= epoch.lock_time_s[ia] * 0.5 - 0.002).all()


@settings(max_examples=40, deadline=None)
@given(epochs())
def test_msm4_encode_decode_roundtrip(epoch):
    """encode_msm(level=4) then StreamDecoder returns each value within its MSM4 resolution (RTCM 10403.3 Tables 3.5-81/82)."""
    got = _roundtrip(epoch, 4)
    ia, ib = _aligned(epoch, got)
    # DF400: 2^-24 ms = 17.9 mm; DF401: 2^-29 ms; DF403: 1 dB-Hz; MSM4 has no rates.
    np.testing.assert_allclose(got.pseudorange_m[ib], epoch.pseudorange_m[ia], rtol=0, atol=0.01)
    glo = (epoch.sat[ia] // 100) == 1  # MSM4 carries no GLONASS channel: frequency unknown
    np.testing.assert_allclose(
        got.phase_cycles[ib][~glo], epoch.phase_cycles[ia][~glo], rtol=0, atol=2e-3
    )
    assert np.isnan(got.phase_cycles[ib][glo]).all()
    assert np.isnan(got.range_rate_mps).all()
    np.testing.assert_allclose(got.cn0_dbhz[ib], epoch.cn0_dbhz[ia], rtol=0, atol=0.5 + 1e-6)
    assert (got.lock_time_s[ib] <= epoch.lock_time_s[ia] + 1e-6).all()


def test_msm_encode_sets_multiple_message_bit_except_last():
    """encode_msm sets DF393 on every message but the last of the epoch (RTCM 10403.3 Table 3.5-78)."""
    sat = np.array([1, 101, 201, 301], np.int16)
    sig = np.array([34, 34, 34, 2 * 32 + 8], np.uint16)  # 1C, 1C, 1C, 2I
    n = sat.shape[0]
    arrays = {name: np.zeros(n, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(sat=sat, sig=sig, pseudorange_m=np.full(n, 2.2e7))
    epoch = ObsEpoch(time=GpsTime(2300, 1000.0), **arrays)
    frames = encode_msm(epoch, level=7)
    assert len(frames) == 4
    mmb = [(f[3 + 6] >> 1) & 1 for f in frames]  # message bit 54 = byte 6, second-lowest bit
    assert mmb == [1, 1, 1, 0]


def test_msm_encode_rejects_other_levels():
    """encode_msm raises ValueError for an MSM level other than 4 or 7."""
    with pytest.raises(ValueError):
        encode_msm(ObsEpoch.empty(GpsTime(2300, 0.0)), level=5)


# --- Byte identity with the earlier scalar encoder (frozen in tests/_msm_encode_reference.py) ---

_NASTY = st.one_of(st.just(float("nan")), st.floats(-1e12, 1e12, allow_nan=False))


@st.composite
def rough_epochs(draw) -> ObsEpoch:
    """Epochs in any cell order with NaN, out-of-range and unsupported cells, up to 14 signals/sat."""
    time = GpsTime(draw(st.integers(1, 2400)), draw(st.integers(0, 604_799_999)) / 1000)
    cells: dict[tuple[int, int], None] = {}
    for _ in range(draw(st.integers(1, 6))):
        system = MSM_SYSTEMS[draw(st.sampled_from(sorted(MSM_SYSTEMS)))]
        codes = [int(c) for c in system.signals if c]
        sigs = draw(st.lists(st.sampled_from(codes), min_size=1, max_size=14, unique=True))
        sigs += draw(st.lists(st.integers(0, 1100), max_size=1))  # maybe no MSM id
        bits = draw(st.lists(st.integers(0, 66), min_size=1, max_size=40, unique=True))
        for bit in bits:
            for sig in sigs:
                cells[(system.sat_base + bit, sig)] = None
    cells.update(
        dict.fromkeys(draw(st.lists(st.tuples(st.integers(-3, 800), st.integers(0, 2000)))))
    )
    keys = draw(st.permutations(sorted(cells)))
    n = len(keys)
    sat = np.array([k[0] for k in keys], np.int16)
    sig = np.array([k[1] for k in keys], np.uint16)
    chan = np.array(draw(st.lists(st.integers(-9, 8), min_size=n, max_size=n)), np.int8)
    ok = (sat >= 0) & (sat < 700) & (sig // 32 < 10)  # frequencies_hz covers these
    freq = np.full(n, np.nan)
    freq[ok] = frequencies_hz(sat[ok], sig[ok], chan[ok])
    freq[np.array(draw(st.lists(st.booleans(), min_size=n, max_size=n)), bool)] = np.nan
    base = {int(s): draw(st.floats(-1e3, 8e7)) for s in set(sat.tolist())}
    pr = np.array([base[int(s)] for s in sat]) + np.array(
        draw(st.lists(st.floats(-400, 400), min_size=n, max_size=n))
    )
    rate = np.array([base[int(s)] / 1e4 - 3e3 for s in sat]) + np.array(
        draw(st.lists(st.floats(-2, 2), min_size=n, max_size=n))
    )
    nasty = draw(st.lists(st.tuples(st.integers(0, 3), st.integers(0, n - 1), _NASTY), max_size=8))
    phase = pr * np.nan_to_num(freq, nan=1.6e9) / C
    for which, i, v in nasty:
        (pr, phase, rate, freq)[which][i] = v if which != 3 else float("nan")
    return ObsEpoch(
        time=time,
        station_id=draw(st.integers(-5, 4095)),
        sat=sat,
        sig=sig,
        pseudorange_m=pr,
        phase_cycles=phase,
        range_rate_mps=rate,
        cn0_dbhz=np.array(
            draw(
                st.lists(
                    st.one_of(st.floats(-10, 90), st.just(np.nan), st.just(np.inf)),
                    min_size=n,
                    max_size=n,
                )
            ),
            np.float32,
        ),
        lock_time_s=np.array(
            draw(
                st.lists(
                    st.one_of(st.floats(-1, 1e6), st.just(np.nan), st.just(np.inf)),
                    min_size=n,
                    max_size=n,
                )
            ),
            np.float32,
        ),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=np.array(draw(st.lists(st.booleans(), min_size=n, max_size=n)), np.bool_),
        lli=np.zeros(n, np.uint8),
        freq_hz=freq,
    )


@settings(max_examples=150, deadline=None)
@given(rough_epochs(), st.sampled_from([4, 7]), st.integers(0, 7))
def test_msm_encode_matches_reference_encoder_on_rough_epochs(epoch, level, iods):
    """encode_msm gives the same bytes as the earlier scalar encoder for any epoch (frozen copy)."""
    got = encode_msm(epoch, level=level, iods=iods)
    assert got == encode_msm_reference(epoch, level=level, iods=iods)
    assert got == encode_msm(epoch, level=level, iods=iods)  # second call: cached layout


@settings(max_examples=40, deadline=None)
@given(epochs())
def test_msm_encode_matches_reference_encoder_on_physical_epochs(epoch):
    """encode_msm gives the same bytes as the earlier scalar encoder on the round-trip epochs."""
    for level in (4, 7):
        assert encode_msm(epoch, level=level) == encode_msm_reference(epoch, level=level)


@pytest.mark.parametrize(
    ("scenario", "duration_s", "rate_hz"),
    [("storm-front", 40.0, 1.0), ("band-outage", 3600.0, 1 / 30), ("scintillation", 600.0, 0.1)],
)
def test_msm_encode_matches_reference_encoder_on_simulator(scenario, duration_s, rate_hz):
    """encode_msm gives the reference encoder's bytes for every simulated epoch (our scenarios)."""
    sim = Simulator(build_scenario(scenario, duration_s=duration_s, rate_hz=rate_hz))
    n = 0
    for blocks in sim.run():
        for block in blocks:
            for epoch in block_epochs(block, 41, gaps=False):
                for level in (4, 7):
                    assert encode_msm(epoch, level=level) == encode_msm_reference(
                        epoch, level=level
                    )
                n += 1
    assert n > 10


def test_msm_encode_splits_wide_satellites_like_reference():
    """With 15 GPS signals per satellite a message holds 4 satellites (RTCM 10403.3 §3.5.12.3: NSat × NSig ≤ 64)."""
    codes = [int(c) for c in MSM_SYSTEMS[107].signals if c]
    sat = np.repeat(np.arange(1, 11, dtype=np.int16), len(codes))
    sig = np.tile(np.array(codes, np.uint16), 10)
    n = sat.shape[0]
    rng = np.random.default_rng(5)
    pr = 2.2e7 + rng.normal(0, 30, n)
    pr[::7] = np.nan
    arrays = {name: np.zeros(n, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(sat=sat, sig=sig, pseudorange_m=pr, range_rate_mps=rng.normal(0, 500, n))
    epoch = ObsEpoch(time=GpsTime(2300, 1000.0), **arrays)
    frames = encode_msm(epoch, level=7)
    assert len(frames) == 3  # 4 + 4 + 2 satellites
    assert frames == encode_msm_reference(epoch, level=7)


def test_msm_encode_rejects_duplicate_cells():
    """encode_msm raises ValueError naming the satellite when two cells share satellite and signal."""
    sat = np.array([5, 5], np.int16)
    sig = np.array([34, 34], np.uint16)
    arrays = {name: np.zeros(2, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(sat=sat, sig=sig, pseudorange_m=np.full(2, 2.2e7))
    with pytest.raises(ValueError, match="satellite 5"):
        encode_msm(ObsEpoch(time=GpsTime(2300, 1.0), **arrays))


@pytest.mark.parametrize(("station_id", "iods"), [(4096, 0), (1, 8), (1, -1)])
def test_msm_encode_rejects_fields_that_do_not_fit(station_id, iods):
    """encode_msm raises ValueError for a DF003 over 4095 or a DF409 outside 0…7 (RTCM 10403.3 Table 3.5-78)."""
    sat = np.array([5], np.int16)
    arrays = {name: np.zeros(1, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(sat=sat, sig=np.array([34], np.uint16), pseudorange_m=np.full(1, 2.2e7))
    with pytest.raises(ValueError, match="does not fit"):
        encode_msm(ObsEpoch(time=GpsTime(2300, 1.0), **arrays), station_id=station_id, iods=iods)


def test_msm_group_nanmeans_bit_identical_to_nanmean():
    """_group_nanmeans equals np.nanmean of each satellite's cells bit for bit, 1 to 15 cells (numpy)."""
    codes = [int(c) for c in MSM_SYSTEMS[107].signals if c]  # 15 GPS signal ids
    sat = np.concatenate([np.full(k, k, np.int16) for k in range(1, 16)])
    sig = np.concatenate([np.array(codes[:k], np.uint16) for k in range(1, 16)])
    lay = encode_layout(sat, sig, 7)
    assert lay is not None
    rng = np.random.default_rng(11)
    for _ in range(200):
        values = rng.lognormal(0, 8, (2, sat.shape[0])) * rng.choice([-1.0, 1.0], (2, sat.shape[0]))
        values[rng.random(values.shape) < 0.15] = np.nan
        got, count = _group_nanmeans(values[:, lay.cells], lay)
        for row in range(2):
            cells = values[row, lay.cells]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN satellites
                want = [np.nanmean(cells[lay.cell_sat == k]) for k in range(15)]
            np.testing.assert_array_equal(got[row], want)
            assert count[row].tolist() == [
                int((~np.isnan(cells[lay.cell_sat == k])).sum()) for k in range(15)
            ]


def _edge_epoch(pr_ms: list[float], fine_ms: float, rate: float, sig: int = 34) -> ObsEpoch:
    n = len(pr_ms)
    arrays = {name: np.zeros(n, dtype) for name, dtype in EPOCH_DTYPES.items()}
    arrays.update(
        sat=np.arange(1, n + 1, dtype=np.int16),
        sig=np.full(n, sig, np.uint16),
        pseudorange_m=np.array(pr_ms) * (C / 1000) + fine_ms * (C / 1000),
        phase_cycles=(np.array(pr_ms) + 2 * fine_ms) * 1575.42e6 / 1000,
        freq_hz=np.full(n, 1575.42e6),
        range_rate_mps=np.full(n, rate),
        cn0_dbhz=np.full(n, 63.49, np.float32),
        lock_time_s=np.full(n, 524.288, np.float32),
    )
    return ObsEpoch(time=GpsTime(2300, 604_799.999), station_id=4095, **arrays)


@pytest.mark.parametrize(
    "fine_ms", [0.0, 2.0**-11, 2.0**-10 - 2.0**-40, 2.0**-10, -(2.0**-10), 0.004]
)
@pytest.mark.parametrize("rate", [0.0, 8191.4, 8191.5, -8191.5, -8192.0, 0.49999])
def test_msm_encode_matches_reference_encoder_at_field_limits(fine_ms, rate):
    """encode_msm agrees with the reference encoder at the DF397/DF399/DF400/DF405 range limits (RTCM 10403.3 DF397–DF406)."""
    rough = [0.0, -(2.0**-11), 2.0**-11, 254.999, 255.0 - 2.0**-11, 255.0 - 2.0**-12, 255.0, 300.0]
    epoch = _edge_epoch(rough, fine_ms, rate)
    for level in (4, 7):
        assert encode_msm(epoch, level=level) == encode_msm_reference(epoch, level=level)


def test_msm_encode_layout_cache_is_reused_and_bounded(monkeypatch):
    """encode_layout returns the cached layout for the same cells and clears its cache when full."""
    monkeypatch.setattr(_msm_layout, "_LAYOUTS", {})
    monkeypatch.setattr(_msm_layout, "_MAX_LAYOUTS", 3)
    sig = np.array([34], np.uint16)
    first = encode_layout(np.array([1], np.int16), sig, 7)
    assert encode_layout(np.array([1], np.int16), sig, 7) is first
    assert encode_layout(np.array([1], np.int16), sig, 4) is not first
    assert encode_layout(np.array([900], np.int16), sig, 7) is None  # no MSM system
    for prn in range(2, 6):
        encode_layout(np.array([prn], np.int16), sig, 7)
        assert len(_msm_layout._LAYOUTS) <= 3
    with pytest.raises(ValueError, match="read-only"):
        first.cells[0] = 1
