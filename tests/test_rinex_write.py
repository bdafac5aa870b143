"""RINEX 3.04 writers: write → read round trips, and georinex reading what we write."""

from __future__ import annotations

import io
import math
import warnings
from dataclasses import replace
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers import (
    EPOCH_DTYPES,
    GlonassEphemeris,
    GpsTime,
    KeplerEphemeris,
    ObsEpoch,
    frequencies_hz,
    sat_id,
    sat_name,
    signal_code,
)
from ionwarden.parsers._rinex_nav import RinexNavParser, iter_rinex_nav
from ionwarden.parsers._rinex_obs import RinexObsParser, iter_rinex_obs
from ionwarden.parsers._rinex_obs_header import RinexObsHeader
from ionwarden.parsers._rinex_write import (
    format_obs_epoch,
    format_obs_header,
    write_rinex_nav,
    write_rinex_obs,
)
from tests.test_rinex_nav import NAV3_SNIPPET

C_MPS = 299_792_458.0
OBS_TYPES = {
    "G": ("C1C", "L1C", "D1C", "S1C", "C2W", "L2W", "S2W"),
    "R": ("C1C", "L1C", "D1C", "S1C", "C2C", "L2C"),
    "E": ("C1C", "L1C", "S1C", "C5Q", "L5Q", "D5Q", "S5Q"),
    "C": ("C2I", "L2I", "S2I", "C6I", "L6I"),
}
# Invented station for our own scenario (rule 3): not a real marker.
HEADER = RinexObsHeader(
    version=3.04,
    program="ionwarden-sim",
    date="20240101 000000 UTC",
    marker_name="IWSIM",
    marker_type="GEODETIC",
    observer="ionwarden",
    agency="ionwarden",
    receiver_number="1",
    receiver_type="SIMULATED",
    receiver_version="0.1",
    antenna_number="1",
    antenna_type="SIMANT          NONE",
    approx_position_m=(4000000.0, 1000000.0, 4800000.0),
    obs_types=MappingProxyType(OBS_TYPES),
    interval_s=1.0,
    time_of_first_obs=GpsTime(2300, 3600.0),
    glonass_channels=MappingProxyType({sat_id("R", 3): 5, sat_id("R", 9): -2}),
    leap_seconds=18,
)
CELLS = [
    ("G", 5, "1C"), ("G", 5, "2W"), ("G", 12, "1C"),
    ("R", 3, "1C"), ("R", 3, "2C"), ("R", 9, "1C"),
    ("E", 11, "1C"), ("E", 11, "5Q"),
    ("C", 23, "2I"), ("C", 23, "6I"),
]  # fmt: skip


def _epoch(time: GpsTime, values: np.ndarray, lli: np.ndarray, half: np.ndarray) -> ObsEpoch:
    """An ObsEpoch over CELLS; ``values`` (n, 4) = pseudorange, phase, Doppler (Hz), C/N0."""
    sat = np.array([sat_id(s, p) for s, p, _ in CELLS], np.int16)
    sig = np.array([signal_code(g) for _, _, g in CELLS], np.uint16)
    glo = np.array([HEADER.glonass_channels.get(int(s), -128) for s in sat], np.int8)
    freq = frequencies_hz(sat, sig, glo)
    n = len(CELLS)
    return ObsEpoch(
        time=time,
        sat=sat,
        sig=sig,
        pseudorange_m=values[:, 0],
        phase_cycles=values[:, 1],
        range_rate_mps=-values[:, 2] * C_MPS / freq,
        cn0_dbhz=values[:, 3].astype(np.float32),
        lock_time_s=np.full(n, np.nan, np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=half.astype(np.bool_),
        lli=lli.astype(np.uint8),
        freq_hz=freq,
        sources=("RINEX",),
    )


def _masked(values: np.ndarray) -> np.ndarray:
    """Blank out what the OBS_TYPES above do not carry (no D for G2W/R2C/E1C/C, no S for C6I)."""
    v = values.copy()
    for k, (s, _, g) in enumerate(CELLS):
        for j, kind in enumerate("CLDS"):
            if f"{kind}{g}" not in OBS_TYPES[s]:
                v[k, j] = np.nan
    return v


def _read_text(text: str) -> tuple[RinexObsParser, list[ObsEpoch]]:
    p = RinexObsParser()
    out = p.feed_lines(text.splitlines(keepends=True))
    p.feed_line("")
    return p, out


milli = st.integers(-999_999_999, 999_999_999_999).map(lambda m: m / 1000)
epoch_values = st.lists(
    st.tuples(
        st.integers(15_000_000_000, 40_000_000_000).map(lambda m: m / 1000),
        milli,
        st.integers(-6_000_000, 6_000_000).map(lambda m: m / 1000),
        st.integers(0, 60_000).map(lambda m: m / 1000),
    ),
    min_size=len(CELLS),
    max_size=len(CELLS),
)


@settings(max_examples=60, deadline=None)
@given(
    epoch_values,
    st.lists(st.integers(0, 1), min_size=len(CELLS), max_size=len(CELLS)),
    st.lists(st.booleans(), min_size=len(CELLS), max_size=len(CELLS)),
    st.integers(0, 604_799_999_9).map(lambda t: t / 10_000),
)
def test_rinex_write_obs_roundtrip(values, lli, half, tow) -> None:
    """format_obs_epoch then RinexObsParser give back every value within RINEX 3-decimal resolution."""
    v = _masked(np.array(values, np.float64))
    ep = _epoch(GpsTime(2300, tow), v, np.array(lli), np.array(half))
    text = format_obs_header(HEADER) + format_obs_epoch(ep, OBS_TYPES)
    _, (back,) = _read_text(text)
    # RINEX 3.05 Table A3: F14.3 values and F11.7 seconds; LLI bits 0/1 on phase (§5.7).
    assert back.time.week == 2300
    assert back.time.tow_s == pytest.approx(tow, abs=5e-8)
    np.testing.assert_array_equal(back.sat, ep.sat)
    np.testing.assert_array_equal(back.sig, ep.sig)
    np.testing.assert_array_equal(back.pseudorange_m, v[:, 0])
    np.testing.assert_array_equal(back.phase_cycles, v[:, 1])
    np.testing.assert_allclose(back.range_rate_mps, ep.range_rate_mps, rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(back.cn0_dbhz, ep.cn0_dbhz)
    has_phase = ~np.isnan(v[:, 1])
    np.testing.assert_array_equal(back.lli[has_phase], ep.lli[has_phase])
    np.testing.assert_array_equal(back.half_cycle[has_phase], ep.half_cycle[has_phase])
    np.testing.assert_array_equal(back.freq_hz, ep.freq_hz)


def test_rinex_write_header_roundtrip() -> None:
    """format_obs_header writes a header that RinexObsParser reads back to the same values."""
    p, _ = _read_text(format_obs_header(HEADER))
    h = p.header
    assert h is not None
    # RINEX 3.04 Table A2 records, read back by our reader (same table).
    for name in (
        "marker_name",
        "receiver_type",
        "antenna_type",
        "approx_position_m",
        "interval_s",
        "time_of_first_obs",
        "time_system",
        "leap_seconds",
    ):
        assert getattr(h, name) == getattr(HEADER, name), name
    assert dict(h.obs_types) == OBS_TYPES
    assert dict(h.glonass_channels) == dict(HEADER.glonass_channels)
    assert h.version == 3.04


def test_rinex_write_p433_roundtrip_exact(real_data: Path) -> None:
    """write_rinex_obs of the real P433 epochs reads back bit-identical (3 decimals in, 3 out)."""
    parser = RinexObsParser()
    epochs = list(
        iter_rinex_obs(real_data / "rinex/P43300USA_R_20190012056_17M_15S_MO.rnx", parser=parser)
    )
    assert parser.header is not None
    buf = io.StringIO()
    assert write_rinex_obs(buf, parser.header, epochs) == 70
    _, back = _read_text(buf.getvalue())
    # Source: ../shared/data/real/rinex/P43300USA_R_20190012056_17M_15S_MO.rnx.
    assert len(back) == 70
    for a, b in zip(epochs, back, strict=True):
        assert a.time == b.time
        for name in EPOCH_DTYPES:
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)


def test_rinex_write_obs_georinex_reads_identical_values(tmp_path: Path) -> None:
    """georinex.load of a file we wrote gives the same C/L/D/S values as our reader."""
    import georinex

    rng = np.random.default_rng(7)
    epochs = []
    for k in range(3):
        v = np.column_stack(
            [
                rng.integers(20_000_000_000, 26_000_000_000, len(CELLS)) / 1000,
                rng.integers(100_000_000_000, 140_000_000_000, len(CELLS)) / 1000,
                rng.integers(-4_000_000, 4_000_000, len(CELLS)) / 1000,
                rng.integers(30_000, 50_000, len(CELLS)) / 1000,
            ]
        )
        epochs.append(
            _epoch(
                GpsTime(2300, 3600.0 + k), _masked(v), np.zeros(len(CELLS)), np.zeros(len(CELLS))
            )
        )
    path = tmp_path / "IWSIM.rnx"
    with open(path, "w", encoding="ascii") as f:
        write_rinex_obs(f, HEADER, epochs)
    _, ours = _read_text(path.read_text())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # georinex/xarray FutureWarnings are not ours
        ds = georinex.load(path)
    # Source: georinex.load (reference library) of the written file.
    assert ds.sizes["time"] == 3
    for i, ep in enumerate(ours):
        for k in range(len(ep)):
            sv = sat_name(int(ep.sat[k]))
            band = f"{int(ep.sig[k]) // 32}{chr(65 + int(ep.sig[k]) % 32)}"
            doppler = -ep.range_rate_mps[k] * ep.freq_hz[k] / C_MPS
            for kind, ours_v in (
                ("C", ep.pseudorange_m[k]),
                ("L", ep.phase_cycles[k]),
                ("S", ep.cn0_dbhz[k]),
            ):
                if f"{kind}{band}" in OBS_TYPES[sv[0]]:
                    ref = float(ds[f"{kind}{band}"].sel(sv=sv).values[i])
                    assert np.float32(ref) == np.float32(ours_v) if kind == "S" else ref == ours_v
            if f"D{band}" in OBS_TYPES[sv[0]]:
                assert float(ds[f"D{band}"].sel(sv=sv).values[i]) == pytest.approx(
                    doppler, abs=1e-9
                )


def test_rinex_write_rejects_values_outside_f14_3() -> None:
    """format_obs_epoch refuses a value that RINEX F14.3 cannot hold instead of corrupting columns."""
    v = _masked(np.full((len(CELLS), 4), 1.0))
    v[0, 0] = 1.0e11
    ep = _epoch(GpsTime(2300, 0.0), v, np.zeros(len(CELLS)), np.zeros(len(CELLS)))
    with pytest.raises(ValueError, match=r"F14\.3"):
        format_obs_epoch(ep, OBS_TYPES)  # RINEX 3.05 Table A3: F14.3


# --- navigation -----------------------------------------------------------------------------------


def _nav_roundtrip(ephs: list) -> list:
    buf = io.StringIO()
    write_rinex_nav(buf, ephs, leap_seconds=18, ionospheric_corr={"GPSA": (1e-8, 0.0, -6e-8, 1e-7)})
    p = RinexNavParser()
    out = p.feed_lines(buf.getvalue().splitlines(keepends=True))
    p.feed_line("")
    assert p.header is not None
    assert p.header.leap_seconds == 18
    assert p.header.ion_alpha == (1e-8, 0.0, -6e-8, 1e-7)
    return out


def _assert_same_ephemeris(
    a: KeplerEphemeris | GlonassEphemeris, b: KeplerEphemeris | GlonassEphemeris
) -> None:
    assert type(a) is type(b)
    for name in a.__dataclass_fields__:
        x, y = getattr(a, name), getattr(b, name)
        if isinstance(x, float):
            assert x == pytest.approx(y, rel=1e-12, abs=1e-300, nan_ok=True), (
                name
            )  # D19.12: 13 digits
        elif isinstance(x, tuple):
            assert x == pytest.approx(y, rel=1e-12, nan_ok=True), name
        else:
            assert x == y, name


def test_rinex_write_nav_brdc_roundtrip(real_data: Path) -> None:
    """write_rinex_nav of the 413 brdc0010.19n records reads back to the same values."""
    ephs = list(iter_rinex_nav(real_data / "rinex/brdc0010.19n"))
    back = _nav_roundtrip(ephs)
    # Source: ../shared/data/real/rinex/brdc0010.19n (values carry 12 digits; D19.12 keeps 13).
    assert len(back) == 413
    for a, b in zip(ephs, back, strict=True):
        _assert_same_ephemeris(a, b)


def test_rinex_write_nav_mixed_roundtrip_and_georinex(tmp_path: Path) -> None:
    """write_rinex_nav of E/C/R/J records reads back equal, and georinex reads the same values."""
    import georinex

    p = RinexNavParser()
    ephs = p.feed_lines(NAV3_SNIPPET.splitlines(keepends=True))
    back = _nav_roundtrip(ephs)
    for a, b in zip(ephs, back, strict=True):
        _assert_same_ephemeris(a, b)  # RINEX 3.04 Tables A8/A10/A12/A14, both directions
    path = tmp_path / "IWSIM_MN.rnx"
    with open(path, "w", encoding="ascii") as f:
        write_rinex_nav(f, ephs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = georinex.load(path)
    # Source: georinex.load (reference library) of the written file.
    e11 = next(e for e in ephs if isinstance(e, KeplerEphemeris) and e.sat == sat_id("E", 11))
    sel = ds.sel(sv="E11").dropna("time", how="all")
    assert float(sel["sqrtA"].values[0]) == e11.sqrt_a
    assert float(sel["SVclockBias"].values[0]) == e11.af0
    assert float(sel["Toe"].values[0]) == e11.toe_s
    c23 = next(e for e in ephs if isinstance(e, KeplerEphemeris) and e.sat == sat_id("C", 23))
    sel = ds.sel(sv="C23").dropna("time", how="all")
    assert float(sel["sqrtA"].values[0]) == c23.sqrt_a
    assert float(sel["BDTWeek"].values[0]) == c23.week - 1356
    r05 = next(e for e in ephs if isinstance(e, GlonassEphemeris))
    sel = ds.sel(sv="R05").dropna("time", how="all")
    assert float(sel["X"].values[0]) == pytest.approx(r05.x_m, rel=1e-15)  # georinex: metres
    assert -float(sel["SVclockBias"].values[0]) == r05.tau_n_s
    assert float(sel["FreqNum"].values[0]) == r05.channel


def test_rinex_write_glonass_needs_a_date() -> None:
    """write_rinex_nav refuses a GLONASS ephemeris whose day_number/four_year are unknown (-1)."""
    p = RinexNavParser()
    eph = next(
        e
        for e in p.feed_lines(NAV3_SNIPPET.splitlines(keepends=True))
        if isinstance(e, GlonassEphemeris)
    )
    with pytest.raises(ValueError, match="day_number"):
        write_rinex_nav(io.StringIO(), [replace(eph, day_number=-1)])
    assert math.isfinite(eph.tb_s)  # GLONASS ICD §4.5: t_b alone does not fix the day
