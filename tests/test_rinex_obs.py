"""RINEX 3 observation reader: real-file cross-checks against georinex, record semantics, errors."""

from __future__ import annotations

import bz2
import contextlib
import gzip
import shutil
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers import GpsTime, ParseError, sat_id, sat_name, signal_code, signal_name
from ionwarden.parsers._rinex_obs import RinexObsParser, _decode_f14_3, iter_rinex_obs

P433 = "rinex/P43300USA_R_20190012056_17M_15S_MO"
C_MPS = 299_792_458.0


@pytest.fixture(scope="session")
def p433_rnx(real_data: Path) -> Path:
    return real_data / f"{P433}.rnx"


@pytest.fixture(scope="session")
def p433(p433_rnx: Path) -> tuple[RinexObsParser, list]:
    parser = RinexObsParser()
    return parser, list(iter_rinex_obs(p433_rnx, parser=parser))


@pytest.fixture(scope="session")
def p433_georinex(p433_rnx: Path) -> dict[str, object]:
    """georinex.load once per session (slow), flattened to numpy arrays."""
    import georinex

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # georinex/xarray FutureWarnings are not ours
        ds = georinex.load(p433_rnx, useindicators=True)
    return {
        "time": ds.time.values,
        "sv": [str(s) for s in ds.sv.values],
        **{str(k): np.asarray(v.values, np.float64) for k, v in ds.data_vars.items()},
    }


def _header_block(obs: dict[str, str], extra: str = "", time_system: str = "GPS") -> list[str]:
    """A minimal RINEX 3.05 header (Table A2) with the given SYS / # / OBS TYPES."""
    lines = [f"{'     3.05           OBSERVATION DATA    M':<60}RINEX VERSION / TYPE"]
    for s, codes in obs.items():
        cs = codes.split()
        lines.append(
            f"{s}  {len(cs):3d}" + "".join(f" {c}" for c in cs).ljust(54) + "SYS / # / OBS TYPES"
        )
    lines.append(
        f"{'  2019     1     1     0     0    0.0000000     ' + time_system:<60}TIME OF FIRST OBS"
    )
    if extra:
        lines.append(extra)
    lines.append(f"{'':60}END OF HEADER")
    return [ln + "\n" for ln in lines]


def _field(value: float | None, lli: str = " ", ssi: str = " ") -> str:
    return (" " * 14 if value is None else f"{value:14.3f}") + lli + ssi


def _feed_all(lines: list[str]) -> list:
    p = RinexObsParser()
    out = p.feed_lines(lines)
    p.feed_line("")
    return out


# --- real data ------------------------------------------------------------------------------------


def test_rinex_obs_p433_matches_georinex(p433, p433_georinex) -> None:
    """RinexObsParser gives every C/L/S value and LLI of every epoch exactly as georinex does."""
    _, epochs = p433
    g = p433_georinex
    col = {sv: j for j, sv in enumerate(g["sv"])}
    # Source: georinex.load of ../shared/data/real/rinex/P43300USA_R_20190012056_17M_15S_MO.rnx.
    assert len(epochs) == len(g["time"]) == 70
    ours: dict[str, np.ndarray] = {}
    for name in g:
        if name in ("time", "sv") or name.endswith("ssi"):
            continue
        ours[name] = np.full((70, len(g["sv"])), np.nan)
    for i, ep in enumerate(epochs):
        assert np.datetime64(ep.time.to_utc().replace(tzinfo=None), "us") + np.timedelta64(
            18, "s"
        ) == g["time"][i].astype("datetime64[us]")  # GPS − UTC = 18 s in 2019 (IERS Bulletin C)
        cols = np.array([col[sat_name(int(s))] for s in ep.sat])
        for k_arr, kind in ((ep.pseudorange_m, "C"), (ep.phase_cycles, "L"), (ep.cn0_dbhz, "S")):
            for sig in np.unique(ep.sig):
                m = ep.sig == sig
                key = f"{kind}{signal_name(int(sig))}"
                ours.setdefault(key, np.full((70, len(g["sv"])), np.nan))[i, cols[m]] = k_arr[m]
            lli = ep.lli.astype(np.float64) + 2.0 * ep.half_cycle
            for sig in np.unique(ep.sig):
                m = (ep.sig == sig) & ~np.isnan(ep.phase_cycles)
                name = f"L{signal_name(int(sig))}"
                if m.any():
                    ours.setdefault(name + "lli", np.full((70, len(g["sv"])), np.nan))
                    ours[name + "lli"][i, cols[m]] = lli[m]
    for name, arr in ours.items():
        if name.endswith("lli"):
            if (
                name not in g
            ):  # georinex 1.16.2 drops some LLI variables (L5Illi): see the spot check
                continue
            ref = g[name]
            ref = np.where(np.isnan(g[name[:-3]]), np.nan, np.nan_to_num(ref, nan=0.0)) % 4
        else:  # a code absent from the file (e.g. L1W) must be all-NaN on our side too
            ref = g.get(name, np.full_like(arr, np.nan))
            # georinex leaves a blank LLI as NaN; RINEX 3.05 §5.7: blank = 0 (no loss of lock).
        if name.startswith("S"):  # ObsEpoch.cn0_dbhz is float32 by contract
            ref = ref.astype(np.float32).astype(np.float64)
        np.testing.assert_array_equal(arr, ref, err_msg=name)


def test_rinex_obs_p433_sbas_l5_lli_spot_check(p433) -> None:
    """RinexObsParser reads the LLI of S35 L5I in epoch 2 that georinex does not expose."""
    _, epochs = p433
    ep = epochs[1]
    m = (ep.sat == sat_id("S", 35)) & (ep.sig == signal_code("5I"))
    # Source: P433…_MO.rnx line 104, "S35 … 149121461.53817": value, LLI 1, SSI 7 (RINEX 3.05 Table A3).
    assert ep.phase_cycles[m].tolist() == [149121461.538]
    assert ep.lli[m].tolist() == [1]
    assert ep.half_cycle[m].tolist() == [False]


def test_rinex_obs_p433_contents_match_provenance(p433) -> None:
    """RinexObsParser finds the satellites, signals and header values PROVENANCE.md lists for P433."""
    parser, epochs = p433
    h = parser.header
    assert h is not None
    # Source: ../shared/data/real/PROVENANCE.md (rinex/P433…_MO.rnx) and the file's own header.
    assert h.version == 3.03
    assert h.marker_name == "p433"
    assert h.receiver_type == "SEPT POLARX5"
    assert h.antenna_type == "TRM59800.80     SCIT"
    assert h.approx_position_m == (-2268682.1122, -3949823.1452, 4451278.8623)
    assert h.interval_s == 15.0
    assert h.time_system == "GPS"
    assert h.time_of_first_obs == GpsTime(2034, 2 * 86400 + 20 * 3600 + 56 * 60 + 45)
    assert h.glonass_channels[sat_id("R", 10)] == -7
    assert len(h.glonass_channels) == 8
    assert h.obs_types["R"] == ("C1C", "L1C", "S1C", "C2C", "L2C", "S2C")
    sats = {int(s) for e in epochs for s in e.sat}
    assert len(sats) == 37
    per_sys = {s: len({x for x in sats if sat_name(x)[0] == s}) for s in "GERCS"}
    assert per_sys == {"G": 11, "E": 7, "R": 8, "C": 7, "S": 4}
    sigs = {
        (sat_name(int(s))[0], signal_name(int(g)))
        for e in epochs
        for s, g in zip(e.sat, e.sig, strict=True)
    }
    assert {g for s, g in sigs if s == "G"} == {"1C", "1W", "2W", "2L", "5Q"}
    assert {g for s, g in sigs if s == "C"} == {"2I", "7I", "6I"}
    assert epochs[0].time == GpsTime(2034, 248205.0)
    for ep in epochs:  # the parser skips re-validation; the arrays must still meet the contract
        replace(ep, _validate=True)
    assert epochs[-1].time == GpsTime(2034, 248205.0 + 69 * 15.0)


def test_rinex_obs_glonass_frequency_from_header_channel(p433) -> None:
    """RinexObsParser sets GLONASS freq_hz from the GLONASS SLOT / FRQ # channel when known."""
    _, epochs = p433
    ep = next(e for e in epochs if sat_id("R", 10) in e.sat)
    m = (ep.sat == sat_id("R", 10)) & (ep.sig == signal_code("1C"))
    # GLONASS ICD Ed. 5.1 §3.3.1.4: 1602 MHz + k·0.5625 MHz, k = −7 for R10 (file header).
    assert ep.freq_hz[m].tolist() == [1602.0e6 - 7 * 0.5625e6]
    assert np.all(ep.lock_indicator == -1)
    assert np.all(np.isnan(ep.lock_time_s))
    assert ep.sources == ("RINEX",)


def test_rinex_obs_hatanaka_bz2_equals_plain(real_data: Path, p433) -> None:
    """iter_rinex_obs streams the .crx.bz2 through crx2rnx to the same epochs as the .rnx."""
    _, plain = p433
    # Source: PROVENANCE.md: the .rnx is hatanaka.decompress() of this .crx.bz2, unchanged.
    packed = list(iter_rinex_obs(real_data / f"{P433}.crx.bz2"))
    _assert_same_epochs(plain, packed)


def test_rinex_obs_gzip_and_crx_gzip_equal_plain(real_data: Path, tmp_path: Path, p433) -> None:
    """iter_rinex_obs reads .rnx.gz and .crx.gz (detected by content) like the plain file."""
    _, plain = p433
    gz = tmp_path / "p433.rnx.gz"
    with open(real_data / f"{P433}.rnx", "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    crx_gz = tmp_path / "p433.crx.gz"
    with bz2.open(real_data / f"{P433}.crx.bz2", "rb") as src, gzip.open(crx_gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    _assert_same_epochs(plain, list(iter_rinex_obs(gz)))
    _assert_same_epochs(plain, list(iter_rinex_obs(crx_gz)))


def test_rinex_obs_unix_compress_equals_plain(p433_rnx: Path, tmp_path: Path, p433) -> None:
    """iter_rinex_obs reads an old-style Unix compress (.Z) file like the plain one."""
    import ncompress

    _, plain = p433
    z = tmp_path / "p4330010.19o.Z"
    z.write_bytes(ncompress.compress(p433_rnx.read_bytes()))
    _assert_same_epochs(plain, list(iter_rinex_obs(z)))


def test_rinex_obs_corrupt_hatanaka_raises_parse_error(real_data: Path, tmp_path: Path) -> None:
    """iter_rinex_obs turns a corrupt Compact RINEX body into ParseError, not another exception."""
    crx = bz2.decompress((real_data / f"{P433}.crx.bz2").read_bytes())
    cut = crx.index(b"END OF HEADER") + 200
    bad = tmp_path / "bad.crx"
    bad.write_bytes(crx[:cut] + b"&garbage that is no CRX epoch\n" * 3 + crx[cut + 5000 :])
    with pytest.raises(ParseError):  # common practice: crx2rnx failure surfaces as our error
        list(iter_rinex_obs(bad))


def test_rinex_obs_hatanaka_fallback_without_executable(
    real_data: Path, p433, monkeypatch: pytest.MonkeyPatch
) -> None:
    """open_rinex_text falls back to hatanaka.crx2rnx in memory when crx2rnx is not shipped."""
    from ionwarden.parsers import _rinex_open

    monkeypatch.setattr(_rinex_open, "_crx2rnx_path", lambda: None)
    _, plain = p433
    # Source: PROVENANCE.md: the .rnx is hatanaka.decompress() of the .crx.bz2.
    _assert_same_epochs(plain, list(iter_rinex_obs(real_data / f"{P433}.crx.bz2")))


def test_rinex_obs_early_stop_on_hatanaka_releases_the_pipe(real_data: Path) -> None:
    """iter_rinex_obs closed after one epoch of a Hatanaka file stops crx2rnx cleanly."""
    it = iter_rinex_obs(real_data / f"{P433}.crx.bz2")
    first = next(it)
    it.close()
    assert len(first) > 0  # common practice: generator close must not hang or raise


def test_rinex_obs_line_feeding_modes_agree(p433_rnx: Path, p433) -> None:
    """RinexObsParser gives the same epochs fed line by line, all at once, or with CRLF endings."""
    _, ref = p433
    text = p433_rnx.read_text("latin-1")
    lines = text.splitlines(keepends=True)
    p = RinexObsParser()
    one_by_one = [e for ln in lines for e in p.feed_line(ln)]
    crlf = _feed_all([ln.rstrip("\n") + "\r\n" for ln in lines])
    no_newline = _feed_all([ln.rstrip("\n") for ln in lines])
    trailing_blanks = _feed_all([*lines, "\n", "   \n"])
    for other in (one_by_one, crlf, no_newline, trailing_blanks):
        _assert_same_epochs(ref, other)  # common practice (STYLE rule 8, adapted to lines)


def _assert_same_epochs(a: list, b: list) -> None:
    assert len(a) == len(b)
    for x, y in zip(a, b, strict=True):
        assert x.time == y.time
        for name in (
            "sat",
            "sig",
            "pseudorange_m",
            "phase_cycles",
            "range_rate_mps",
            "cn0_dbhz",
            "lli",
            "half_cycle",
            "freq_hz",
        ):
            np.testing.assert_array_equal(getattr(x, name), getattr(y, name), err_msg=name)


# --- record semantics (hand-written records, RINEX 3.05 Table A3) -------------------------------


def test_rinex_obs_doppler_lli_and_half_cycle() -> None:
    """RinexObsParser maps D to −D·c/f, LLI bit 0 to lli and bit 1 to half_cycle."""
    lines = _header_block({"G": "C1C L1C D1C S1C"})
    lines.append("> 2019 01 01 00 00 30.0000000  0  2\n")
    lines.append(
        "G05"
        + _field(20000000.123)
        + _field(105000000.5, "3")
        + _field(-1234.5)
        + _field(45.25)
        + "\n"
    )
    lines.append("G07" + _field(None) + _field(None) + _field(None) + _field(30.0) + "\n")
    (ep,) = _feed_all(lines)
    assert ep.time == GpsTime(1025 + 1009, 2 * 86400 + 30.0)  # 2019-01-01 is Tuesday of week 2034
    assert ep.sat.tolist() == [5, 7]
    assert ep.pseudorange_m[0] == 20000000.123
    # RINEX 3.05 §5.3: Doppler positive for approaching satellites → range rate = −D·λ, λ = c/f_L1.
    assert ep.range_rate_mps[0] == pytest.approx(1234.5 * C_MPS / 1575.42e6, rel=1e-15)
    # RINEX 3.05 §5.7 / Table A3: LLI bit 0 = loss of lock, bit 1 = half-cycle ambiguity possible.
    assert ep.lli.tolist() == [1, 0]
    assert ep.half_cycle.tolist() == [True, False]
    assert np.isnan(ep.pseudorange_m[1])  # RINEX 3.05 §5.7: blank = not observed
    assert ep.cn0_dbhz.tolist() == [45.25, 30.0]


def test_rinex_obs_power_failure_flag_marks_every_cell() -> None:
    """RinexObsParser sets lli bit 0 on all cells of an epoch with flag 1 (power failure)."""
    lines = _header_block({"E": "C1C L1C"})
    lines.append("> 2019 01 01 00 00 30.0000000  1  1\n")
    lines.append("E11" + _field(23000000.0) + _field(1.0e8) + "\n")
    (ep,) = _feed_all(lines)
    assert ep.lli.tolist() == [
        1
    ]  # RINEX 3.05 Table A3: flag 1 = power failure since previous epoch


def test_rinex_obs_event_header_and_cycle_slip_records() -> None:
    """RinexObsParser skips flag 5/6 records, counts them, and applies flag 4 header records."""
    lines = _header_block({"G": "C1C"})
    lines.append("> 2019 01 01 00 00 00.0000000  5  0\n")
    lines.append("> 2019 01 01 00 00 01.0000000  6  1\n")
    lines.append("G05" + _field(1.0) + "\n")
    lines.append("> 2019 01 01 00 00 02.0000000  4  1\n")
    lines.append(f"{'G    2 C1C C2W':<60}SYS / # / OBS TYPES\n")
    lines.append("> 2019 01 01 00 00 03.0000000  0  1\n")
    lines.append("G05" + _field(21000000.0) + _field(21000003.5) + "\n")
    p = RinexObsParser()
    (ep,) = p.feed_lines(lines)
    p.feed_line("")
    # RINEX 3.05 Table A3: flags 2–5 are events (4 = header records follow), 6 = cycle-slip records.
    assert [signal_name(int(s)) for s in ep.sig] == ["1C", "2W"]
    assert ep.pseudorange_m.tolist() == [21000000.0, 21000003.5]
    stats = p.statistics()
    assert (stats.epochs, stats.event_records, stats.cycle_slip_records) == (1, 2, 1)


def test_rinex_obs_epoch_without_satellites_is_emitted_empty() -> None:
    """RinexObsParser hands on an epoch record with zero satellites as an empty ObsEpoch."""
    lines = [*_header_block({"G": "C1C"}), "> 2019 01 01 00 00 05.0000000  0  0\n"]
    (ep,) = _feed_all(lines)
    assert len(ep) == 0  # RINEX 3.05 Table A3: number of satellites may be 0
    assert ep.time == GpsTime(2034, 2 * 86400 + 5.0)


def test_rinex_obs_scale_factor_divides_values() -> None:
    """RinexObsParser divides observations by the header's SYS / SCALE FACTOR."""
    extra = f"{'G   10   1 L1C':<60}SYS / SCALE FACTOR"  # A1,1X,I4,2X,I2,12(1X,A3)
    lines = _header_block({"G": "C1C L1C"}, extra=extra)
    lines += [
        "> 2019 01 01 00 00 00.0000000  0  1\n",
        "G05" + _field(21000000.0) + _field(1000000005.0) + "\n",
    ]
    (ep,) = _feed_all(lines)
    # RINEX 3.05 Table A2 SYS / SCALE FACTOR: divide stored L1C by 10 before use; C1C unscaled.
    assert ep.phase_cycles.tolist() == [100000000.5]
    assert ep.pseudorange_m.tolist() == [21000000.0]


def test_rinex_obs_header_is_bounded() -> None:
    """RinexObsParser stops with ParseError on an endless header instead of growing memory."""
    p = RinexObsParser()
    p.feed_line(f"{'     3.05           OBSERVATION DATA    M':<60}RINEX VERSION / TYPE\n")
    for _ in range(4_999):
        p.feed_line(f"{'junk':<60}COMMENT\n")
    with pytest.raises(ParseError, match="header longer"):  # common practice (STYLE rule 5)
        p.feed_line(f"{'junk':<60}COMMENT\n")


@pytest.mark.parametrize(
    ("system", "offset_s"),
    [("GPS", 0.0), ("GAL", 0.0), ("BDT", 14.0), ("GLO", 18.0)],
)
def test_rinex_obs_time_system_converted_to_gps(system: str, offset_s: float) -> None:
    """RinexObsParser converts GAL/BDT/GLO epoch tags to GPS time."""
    lines = _header_block({"G": "C1C"}, time_system=system)
    lines.append("> 2019 01 01 00 00 00.0000000  0  1\n")
    lines.append("G05" + _field(21000000.0) + "\n")
    (ep,) = _feed_all(lines)
    # RINEX 3.05 §3.4: GAL aligned with GPS, BDT = GPST − 14 s, GLO = UTC(SU); GPS−UTC = 18 s (2019).
    assert ep.time == GpsTime(2034, 2 * 86400 + offset_s)


# --- errors ---------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("bad_line", "fragment"),
    [
        ("2019 01 01 00 00 00.0000000  0  1\n", "epoch record"),
        ("> 2019 01 01 00 00 0x.0000000  0  1\n", "bad epoch record"),
        ("> 2019 01 01 00 00 00.0000000  9  1\n", "bad epoch flag"),
    ],
)
def test_rinex_obs_bad_epoch_record_names_line(bad_line: str, fragment: str) -> None:
    """RinexObsParser raises a ParseError carrying the line number for a bad epoch record."""
    lines = [*_header_block({"G": "C1C"}), bad_line]
    with pytest.raises(ParseError, match=fragment) as info:
        _feed_all(lines)
    assert info.value.offset == len(lines)  # common practice: name the offending line


def test_rinex_obs_bad_value_and_undeclared_system() -> None:
    """RinexObsParser raises ParseError naming the satellite line for a bad value or system."""
    head = _header_block({"G": "C1C L1C"})
    bad_value = [*head, "> 2019 01 01 00 00 00.0000000  0  1\n", "G05  2x000000.000  " + "\n"]
    with pytest.raises(ParseError, match="bad observation value") as info:
        _feed_all(bad_value)
    assert info.value.offset == len(bad_value)
    undeclared = [*head, "> 2019 01 01 00 00 00.0000000  0  1\n", "E05" + _field(1.0) + "\n"]
    with pytest.raises(ParseError, match="undeclared satellite") as info:
        _feed_all(undeclared)
    assert info.value.offset == len(undeclared)


def test_rinex_obs_truncated_epoch_and_header() -> None:
    """RinexObsParser reports a cut epoch or a missing END OF HEADER at end of input."""
    lines = [
        *_header_block({"G": "C1C"}),
        "> 2019 01 01 00 00 00.0000000  0  2\n",
        "G05" + _field(1.0) + "\n",
    ]
    with pytest.raises(ParseError, match="record line"):
        _feed_all(lines)
    with pytest.raises(ParseError, match="END OF HEADER"):
        _feed_all(_header_block({"G": "C1C"})[:-1])


def test_rinex_obs_bad_observation_code_is_a_parse_error() -> None:
    """RinexObsParser rejects a RINEX 2 style observation code with ParseError at END OF HEADER."""
    lines = _header_block({"G": "C1C"})
    lines[1] = lines[1].replace(" C1C", " C1 ", 1)
    with pytest.raises(ParseError, match="OBS TYPES"):  # RINEX 3.05 §5.1: codes are tna
        _feed_all(lines)


def test_rinex_obs_rejects_rinex2() -> None:
    """RinexObsParser refuses a RINEX 2 observation header with a clear error."""
    lines = [
        f"{'     2.11           OBSERVATION DATA    M':<60}RINEX VERSION / TYPE\n",
        f"{'':60}END OF HEADER\n",
    ]
    with pytest.raises(ParseError, match="not a RINEX 3 observation file"):
        _feed_all(lines)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.text(alphabet=" 0123456789.->GREC-xD\t", max_size=90), max_size=12))
def test_rinex_obs_arbitrary_lines_yield_epochs_or_parse_error(body: list[str]) -> None:
    """RinexObsParser turns arbitrary record lines into epochs or ParseError, nothing else."""
    lines = [*_header_block({"G": "C1C L1C", "R": "C1C"}), *(b + "\n" for b in body)]
    with contextlib.suppress(ParseError):
        _feed_all(lines)  # common practice (STYLE rule 8): only messages or our parse error


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(-999_999_999_999, 9_999_999_999_999), min_size=1, max_size=20))
def test_rinex_obs_vectorised_f14_3_equals_float(milli: list[int]) -> None:
    """_decode_f14_3 reads every F14.3 field bit-exactly as Python float() does."""
    texts = [f"{m / 1000:14.3f}" for m in milli]
    raw = np.frombuffer("".join(texts).encode(), np.uint8).reshape(1, len(texts), 14)
    got = _decode_f14_3(raw, 1)
    assert got[0].tolist() == [float(t) for t in texts]  # Python float(): the reference parse


def test_rinex_obs_odd_field_layout_falls_back_to_float() -> None:
    """_decode_f14_3 accepts a field with fewer decimals through the float() fallback."""
    raw = np.frombuffer(b"     1234.5   " + b"              ", np.uint8).reshape(1, 2, 14)
    got = _decode_f14_3(raw, 1)
    assert got[0, 0] == 1234.5
    assert np.isnan(got[0, 1])  # RINEX 3.05 §5.7: blank field = not observed


def test_rinex_obs_empty_stream_reports_missing_header() -> None:
    """RinexObsParser at end of input before any header raises ParseError."""
    with pytest.raises(ParseError, match="END OF HEADER"):
        RinexObsParser().feed_line("")
