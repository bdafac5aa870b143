"""RINEX navigation readers: brdc0010.19n against georinex, hand-written RINEX 3 and 2.11 records."""

from __future__ import annotations

import contextlib
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.parsers import GlonassEphemeris, KeplerEphemeris, ParseError, sat_id
from ionwarden.parsers._rinex_nav import RinexNavParser, iter_rinex_nav
from ionwarden.parsers._rinex_time import civil_from_week

# georinex variable → KeplerEphemeris attribute (georinex nav2 names; RINEX 2.11 Table A4 order).
GEORINEX_FIELDS = {
    "SVclockBias": "af0",
    "SVclockDrift": "af1",
    "SVclockDriftRate": "af2",
    "IODE": "iode",
    "Crs": "crs",
    "DeltaN": "delta_n",
    "M0": "m0",
    "Cuc": "cuc",
    "Eccentricity": "e",
    "Cus": "cus",
    "sqrtA": "sqrt_a",
    "Toe": "toe_s",
    "Cic": "cic",
    "Omega0": "omega0",
    "Cis": "cis",
    "Io": "i0",
    "Crc": "crc",
    "omega": "omega",
    "OmegaDot": "omega_dot",
    "IDOT": "idot",
    "GPSWeek": "week",
    "SVacc": "accuracy_m",
    "health": "health",
    "IODC": "iodc",
    "FitIntvl": "fit_interval_h",
}

# Hand-written RINEX 3.04 mixed navigation file: invented values, layouts per RINEX 3.05
# Table A8 (Galileo), A14 (BeiDou), A10 (GLONASS, 3 orbit lines before 3.05), A12 (QZSS).
NAV3_SNIPPET = """\
     3.04           N: GNSS NAV DATA    M: MIXED            RINEX VERSION / TYPE
ionwarden test                          20190101 000000 UTC PGM / RUN BY / DATE
GAL    1.0000D+02  2.0000D-01  3.0000D-03  0.0000D+00       IONOSPHERIC CORR
BDSA   1.1176D-08  2.9802D-08 -4.1723D-07  6.5565D-07       IONOSPHERIC CORR
    18    18  1929     7                                    LEAP SECONDS
                                                            END OF HEADER
E11 2019 01 01 00 10 00-6.000000000000D-04-8.000000000000D-12 0.000000000000D+00
     4.500000000000D+01-1.205000000000D+02 3.100000000000D-09 1.200000000000D+00
    -5.000000000000D-06 1.500000000000D-04 8.000000000000D-06 5.440600000000D+03
     1.734000000000D+05 1.000000000000D-08-2.100000000000D+00-2.000000000000D-08
     9.700000000000D-01 1.502500000000D+02-5.000000000000D-01-5.500000000000D-09
     1.000000000000D-10 2.580000000000D+02 2.034000000000D+03
     3.120000000000D+00 0.000000000000D+00 2.300000000000D-09 2.600000000000D-09
     1.728000000000D+05
C23 2019 01 01 00 00 00 2.500000000000D-04 1.000000000000D-11 0.000000000000D+00
     1.000000000000D+00-8.000000000000D+01 4.000000000000D-09-7.000000000000D-01
    -3.000000000000D-06 4.500000000000D-04 9.000000000000D-06 5.282600000000D+03
     1.728000000000D+05-1.000000000000D-08 1.500000000000D+00 3.000000000000D-08
     9.600000000000D-01 2.005000000000D+02 3.000000000000D-01-6.600000000000D-09
    -2.000000000000D-10 0.000000000000D+00 6.780000000000D+02
     2.000000000000D+00 0.000000000000D+00-1.000000000000D-08-2.000000000000D-09
     1.728000000000D+05 1.000000000000D+00
R05 2019 01 01 00 15 00 3.500000000000D-05 1.800000000000D-12 1.737000000000D+05
     1.234567800000D+04 1.234000000000D+00 1.860000000000D-09 0.000000000000D+00
    -2.000050000000D+04-5.000000000000D-01-2.790000000000D-09 1.000000000000D+00
     8.000250000000D+03 3.100000000000D+00 0.000000000000D+00 0.000000000000D+00
J02 2019 01 01 00 00 00 1.000000000000D-05 0.000000000000D+00 0.000000000000D+00
     1.000000000000D+02 1.000000000000D+01 4.000000000000D-09 5.000000000000D-01
     1.000000000000D-06 7.500000000000D-02 1.000000000000D-06 6.493000000000D+03
     1.728000000000D+05 1.000000000000D-08 2.000000000000D+00 1.000000000000D-08
     7.200000000000D-01-5.000000000000D+01-1.570000000000D+00-3.000000000000D-09
     1.000000000000D-10 2.000000000000D+00 2.034000000000D+03 0.000000000000D+00
     2.800000000000D+00 0.000000000000D+00-4.700000000000D-09 8.680000000000D+02
     1.720000000000D+05 0.000000000000D+00
"""

# The same GLONASS record in RINEX 2.11 layout (Table A11: I2,5I3,F5.1,3D19.12; 3X,4D19.12).
NAV2_GLONASS_SNIPPET = """\
     2.11           G: GLONASS NAV DATA                     RINEX VERSION / TYPE
ionwarden test                          01-JAN-19 00:00     PGM / RUN BY / DATE
                                                            END OF HEADER
 5 19  1  1  0 15  0.0 3.500000000000D-05 1.800000000000D-12 1.737000000000D+05
    1.234567800000D+04 1.234000000000D+00 1.860000000000D-09 0.000000000000D+00
   -2.000050000000D+04-5.000000000000D-01-2.790000000000D-09 1.000000000000D+00
    8.000250000000D+03 3.100000000000D+00 0.000000000000D+00 0.000000000000D+00
"""


def _parse(text: str) -> tuple[RinexNavParser, list]:
    p = RinexNavParser()
    out = p.feed_lines(text.splitlines(keepends=True))
    p.feed_line("")
    return p, out


@pytest.fixture(scope="session")
def brdc(real_data: Path) -> tuple[RinexNavParser, list]:
    p = RinexNavParser()
    return p, list(iter_rinex_nav(real_data / "rinex" / "brdc0010.19n", parser=p))


@pytest.fixture(scope="session")
def brdc_georinex(real_data: Path):
    import georinex

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # georinex/xarray FutureWarnings are not ours
        return georinex.load(real_data / "rinex" / "brdc0010.19n")


def test_rinex_nav_brdc_matches_georinex(brdc, brdc_georinex) -> None:
    """RinexNavParser reads all 413 GPS records of brdc0010.19n with georinex's values."""
    _, ephs = brdc
    ds = brdc_georinex
    # Source: georinex.load of ../shared/data/real/rinex/brdc0010.19n; counts from PROVENANCE.md.
    assert len(ephs) == 413
    assert len({e.sat for e in ephs}) == 32
    assert int(np.isfinite(ds["sqrtA"].values).sum()) == 413
    times = {np.datetime64(t, "s"): i for i, t in enumerate(ds.time.values)}
    svs = {str(s): j for j, s in enumerate(ds.sv.values)}
    arrays = {name: ds[name].values for name in [*GEORINEX_FIELDS, "TGD"]}
    for e in ephs:
        assert isinstance(e, KeplerEphemeris)
        y, mo, d, h, mi, s = civil_from_week(e.week, e.toc_s)
        i = times[np.datetime64(f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{int(s):02d}", "s")]
        j = svs[f"G{e.sat:02d}"]
        for gname, attr in GEORINEX_FIELDS.items():
            assert float(getattr(e, attr)) == arrays[gname][i, j], (e.sat, gname)
        assert e.tgd_s[0] == arrays["TGD"][i, j]
        assert e.time_system == "GPS"
        assert e.source == "RINEX"


def test_rinex_nav_brdc_header(brdc) -> None:
    """RinexNavParser keeps ION ALPHA/BETA and LEAP SECONDS of a RINEX 2 header."""
    p, _ = brdc
    h = p.header
    assert h is not None
    # Source: brdc0010.19n header lines ION ALPHA / ION BETA / LEAP SECONDS (RINEX 2.11 Table A3).
    assert h.ion_alpha == (0.7451e-08, -0.1490e-07, -0.5960e-07, 0.1192e-06)
    assert h.ion_beta == (0.9011e05, -0.6554e05, -0.1311e06, 0.4588e06)
    assert h.leap_seconds == 18
    assert h.version == 2.0
    assert h.satellite_system == "G"


def test_rinex_nav_rinex3_galileo_record() -> None:
    """RinexNavParser maps a RINEX 3 Galileo record (Table A8) to KeplerEphemeris in GPS weeks."""
    p, ephs = _parse(NAV3_SNIPPET)
    e = next(x for x in ephs if x.sat == sat_id("E", 11))
    # RINEX 3.05 Table A8: GAL week is aligned to the GPS week; BGD E5a/E1 then E5b/E1; SISA (m).
    assert (e.week, e.toe_s, e.toc_s) == (2034, 173400.0, 2 * 86400 + 600.0)
    assert (e.af0, e.af1, e.af2) == (-6.0e-4, -8.0e-12, 0.0)
    assert (e.iode, e.iodc, e.health) == (45, -1, 0)
    assert e.tgd_s == (2.3e-9, 2.6e-9)
    assert e.accuracy_m == 3.12
    assert (e.crs, e.delta_n, e.m0, e.sqrt_a, e.e) == (-120.5, 3.1e-9, 1.2, 5440.6, 1.5e-4)
    assert (e.i0, e.crc, e.omega, e.omega_dot, e.idot) == (0.97, 150.25, -0.5, -5.5e-9, 1e-10)
    assert math.isnan(e.fit_interval_h)
    h = p.header
    assert h is not None
    assert h.ionospheric_corr["GAL"] == (100.0, 0.2, 0.003, 0.0)
    assert h.ionospheric_corr["BDSA"][2] == -4.1723e-07
    assert h.leap_seconds == 18


def test_rinex_nav_rinex3_beidou_record() -> None:
    """RinexNavParser keeps BeiDou toe/toc in BDT and converts the BDT week to the GPS week."""
    _, ephs = _parse(NAV3_SNIPPET)
    e = next(x for x in ephs if x.sat == sat_id("C", 23))
    # RINEX 3.05 Table A14 (BDT week, AODE, AODC, TGD1/TGD2); GPS week = BDT week + 1356
    # (BDS-SIS-ICD-B1I-3.0 §5.1.3; _ephemeris docstring).
    assert e.week == 678 + 1356
    assert e.time_system == "BDT"
    assert (e.toe_s, e.toc_s) == (172800.0, 172800.0)
    assert (e.iode, e.iodc) == (1, 1)
    assert e.tgd_s == (-1.0e-8, -2.0e-9)


def test_rinex_nav_rinex3_qzss_fit_flag() -> None:
    """RinexNavParser reads QZSS (Table A12) with the fit-interval flag 0 meaning 2 hours."""
    _, ephs = _parse(NAV3_SNIPPET)
    e = next(x for x in ephs if x.sat == sat_id("J", 2))
    # RINEX 3.05 Table A12: fit interval flag 0/1 (IS-QZSS-PNT: 0 → 2 h).
    assert (e.week, e.iodc, e.fit_interval_h) == (2034, 868, 2.0)


def test_rinex_nav_rinex3_glonass_record() -> None:
    """RinexNavParser converts a GLONASS record (Table A10) to SI units and Moscow time of day."""
    _, ephs = _parse(NAV3_SNIPPET)
    (e,) = [x for x in ephs if isinstance(x, GlonassEphemeris)]
    _check_glonass(e)


def test_rinex_nav_rinex2_glonass_file() -> None:
    """RinexNavParser reads a RINEX 2.11 GLONASS (.yyg) record the same as the RINEX 3 one."""
    p, ephs = _parse(NAV2_GLONASS_SNIPPET)
    (e,) = ephs
    assert p.header is not None
    assert p.header.satellite_system == "R"
    _check_glonass(e)


def _check_glonass(e: GlonassEphemeris) -> None:
    assert e.sat == sat_id("R", 5)
    # RINEX 3.05 Table A10: clock bias is −τ_n; X/Y/Z in km, velocities km/s, accelerations km/s².
    assert e.tau_n_s == -3.5e-5
    assert e.gamma_n == 1.8e-12
    assert (e.x_m, e.y_m, e.z_m) == (12345678.0, -20000500.0, 8000250.0)
    assert (e.vx_mps, e.vy_mps, e.vz_mps) == (1234.0, -500.0, 3100.0)
    assert e.ax_mps2 == pytest.approx(1.86e-6, rel=1e-15)
    assert (e.channel, e.health, e.age_days) == (1, 0, 0)
    # GLONASS ICD Ed. 5.1 §3.3.3: GLONASS time = UTC + 3 h → t_b = 03:15 = 11700 s;
    # §4.5: N4 = 6 for 2016–2019, N_T = 1097 for 2019-01-01 (366 + 365 + 365 + 1).
    assert (e.tb_s, e.four_year, e.day_number) == (11700.0, 6, 1097)


def test_rinex_nav_rinex305_glonass_has_four_orbit_lines() -> None:
    """RinexNavParser reads the fourth GLONASS orbit line of RINEX 3.05 and stays in step."""
    lines = NAV3_SNIPPET.replace("     3.04 ", "     3.05 ", 1).splitlines(keepends=True)
    i = next(k for k, ln in enumerate(lines) if ln.startswith("R05"))
    # RINEX 3.05 Table A10: BROADCAST ORBIT-4 (status flags, L1/L2 delay, URAI, health flags).
    extra = "     0.000000000000D+00 0.000000000000D+00 0.000000000000D+00 0.000000000000D+00\n"
    lines.insert(i + 4, extra)
    _, ephs = _parse("".join(lines))
    assert [type(x).__name__ for x in ephs] == [
        "KeplerEphemeris",
        "KeplerEphemeris",
        "GlonassEphemeris",
        "KeplerEphemeris",
    ]


def test_rinex_nav_bad_record_names_line() -> None:
    """RinexNavParser raises ParseError with the first line of a malformed record."""
    lines = NAV3_SNIPPET.splitlines(keepends=True)
    lines[7] = lines[7][:30] + "x.xxxxxxxxxxD-01" + lines[7][46:]
    with pytest.raises(ParseError, match="bad navigation record") as info:
        _parse("".join(lines))
    assert info.value.offset == 7  # common practice: the record's first line number


def test_rinex_nav_truncated_record_and_unknown_system() -> None:
    """RinexNavParser reports a cut record at end of input and an unknown system letter."""
    with pytest.raises(ParseError, match="inside a record"):
        _parse("".join(NAV3_SNIPPET.splitlines(keepends=True)[:10]))
    bad = NAV3_SNIPPET.replace("E11 2019", "X11 2019")
    with pytest.raises(ParseError, match="bad satellite system"):
        _parse(bad)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.text(alphabet=" 0123456789.-+DEinfaGRECJSx", max_size=85), max_size=20))
def test_rinex_nav_arbitrary_lines_yield_ephemerides_or_parse_error(body: list[str]) -> None:
    """RinexNavParser turns arbitrary record lines into ephemerides or ParseError, nothing else."""
    head = "".join(NAV3_SNIPPET.splitlines(keepends=True)[:6])
    with contextlib.suppress(ParseError):  # common practice (STYLE rule 8)
        _parse(head + "".join(b + "\n" for b in body))
