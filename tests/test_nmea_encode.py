"""NMEA 0183 encoders (GGA, RMC, GSV, GST): real sentences reproduced byte for byte, and
hypothesis round trips through pynmeagps and our decoder."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from pynmeagps import NMEAReader

from ionwarden.parsers._nmea import (
    GgaFix,
    GstErrors,
    GsvAssembler,
    RmcFix,
    SatellitesInView,
    decode_sentence,
)
from ionwarden.parsers._nmea_encode import encode_gga, encode_gst, encode_gsv, encode_rmc, sentence

from .conftest import REAL_DATA

NMEA = REAL_DATA / "nmea"


def real_lines(name: str, prefix: bytes) -> list[bytes]:
    return [
        line.strip() + b"\r\n"
        for line in (NMEA / name).read_bytes().split(b"\n")
        if line.startswith(prefix)
    ]


def test_sentence_checksum_golden() -> None:
    """sentence() appends the XOR checksum of a real GAGSV (pynmeagps_pygpsdata-mixed.log)."""
    assert sentence("GAGSV", ["1", "1", "00", "7"]) == b"$GAGSV,1,1,00,7*73\r\n"


def test_encode_gga_reproduces_real_sentence() -> None:
    """encode_gga(decode(GGA)) is the original u-blox GGA (pygnssutils_pygpsdata-nmea.log)."""
    (line,) = real_lines("pygnssutils_pygpsdata-nmea.log", b"$GNGGA")
    assert line == b"$GNGGA,103607.00,5327.03942,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,*64\r\n"
    fix = decode_sentence(line)
    assert isinstance(fix, GgaFix)
    assert encode_gga(fix) == line


def test_encode_rmc_reproduces_real_sentences() -> None:
    """encode_rmc(decode(RMC)) gives back every GNRMC of the u-blox extract (157 sentences)."""
    lines = real_lines("pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea", b"$GNRMC")
    assert len(lines) == 157  # PROVENANCE.md
    for line in lines:
        fix = decode_sentence(line)
        assert isinstance(fix, RmcFix)
        assert encode_rmc(fix) == line


def test_encode_gga_reproduces_extract() -> None:
    """encode_gga(decode(GGA)) gives back every GNGGA of the u-blox extract (157 sentences)."""
    for line in real_lines("pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea", b"$GNGGA"):
        fix = decode_sentence(line)
        assert isinstance(fix, GgaFix)
        assert encode_gga(fix) == line


def test_encode_gsv_reproduces_real_group() -> None:
    """encode_gsv of an assembled GPGSV group is the original three sentences (pygnssutils_pygpsdata-nmea.log)."""
    lines = real_lines("pygnssutils_pygpsdata-nmea.log", b"$GPGSV")
    asm = GsvAssembler()
    views = [v for line in lines if (v := asm.push(decode_sentence(line))) is not None]
    assert len(views) == 1
    assert encode_gsv(views[0]) == lines


def test_encode_gsv_reproduces_extract_groups() -> None:
    """Every assembled GSV group of the u-blox extract re-encodes to its sentences."""
    asm = GsvAssembler()
    pending: dict[tuple[str, str | None], list[bytes]] = {}
    n = 0
    for text in (NMEA / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes().splitlines():
        if b"GSV," not in text:
            continue
        line = text + b"\r\n"
        part = decode_sentence(line)
        key = (part.talker, part.signal_id)  # type: ignore[union-attr]
        pending.setdefault(key, []).append(line)
        if (v := asm.push(part)) is not None:
            assert encode_gsv(v) == pending.pop(key)
            n += 1
    assert n == 1730


def test_encode_gst_round_trips_real_sentence() -> None:
    """encode_gst with the receiver's precision gives back the Unicore GNGSTH fields (decimals 3)."""
    (line,) = real_lines("pygnssutils_pygpsdata-nmea.log", b"$GNGST")
    gst = decode_sentence(line)
    assert isinstance(gst, GstErrors)
    assert encode_gst(gst, decimals=0) == line  # u-blox sends whole metres: $GNGST,...,38,60,...


lat = st.floats(-89.9999, 89.9999)
lon = st.floats(-179.9999, 179.9999)
times = st.builds(dt.time, st.integers(0, 23), st.integers(0, 59), st.integers(0, 59),
                  st.integers(0, 99).map(lambda c: c * 10_000))  # fmt: skip
maybe = st.one_of(st.just(math.nan), st.floats(0, 999.9))


@given(lat=lat, lon=lon, t=times, q=st.integers(0, 8), n=st.one_of(st.none(), st.integers(0, 99)),
       hdop=maybe, alt=st.floats(-999, 9999), sep=st.floats(-99, 99))  # fmt: skip
def test_encode_gga_round_trips(lat, lon, t, q, n, hdop, alt, sep) -> None:
    """GGA encode → pynmeagps parse (checksum validated) and → our decode agree within the
    printed precision (1e-5 arc-minute, 0.01 HDOP, 0.1 m)."""
    fix = GgaFix(talker="GP", time_utc=t, lat_deg=lat, lon_deg=lon, quality=q, n_sats_used=n,
                 hdop=hdop, alt_msl_m=alt, geoid_sep_m=sep, dgps_age_s=math.nan, dgps_station=None)  # fmt: skip
    raw = encode_gga(fix)
    ref = NMEAReader.parse(raw, validate=1)  # pynmeagps decode
    out = decode_sentence(raw)
    assert isinstance(out, GgaFix)
    assert abs(ref.lat - lat) <= 0.5e-5 / 60 + 1e-12
    assert abs(out.lon_deg - lon) <= 0.5e-5 / 60 + 1e-12
    assert out.time_utc == t
    assert out.quality == q
    assert out.n_sats_used == n
    assert abs(out.alt_msl_m - alt) <= 0.05 + 1e-9
    assert (math.isnan(hdop) and math.isnan(out.hdop)) or abs(out.hdop - hdop) <= 0.005 + 1e-9


@given(lat=lat, lon=lon, t=times, speed=st.floats(0, 500), course=maybe,
       date=st.dates(dt.date(2000, 1, 1), dt.date(2068, 12, 31)), valid=st.booleans())  # fmt: skip
def test_encode_rmc_round_trips(lat, lon, t, speed, course, date, valid) -> None:
    """RMC encode → pynmeagps parse and our decode agree (speed to 0.001 kn; two-digit years
    pivot at 69 in pynmeagps, so dates stay in 2000–2068)."""
    fix = RmcFix(talker="GN", time_utc=t, date_utc=date, valid=valid, lat_deg=lat, lon_deg=lon,
                 speed_mps=speed, course_deg=course, mag_var_deg=math.nan, mode="A", nav_status="V")  # fmt: skip
    raw = encode_rmc(fix)
    assert NMEAReader.parse(raw, validate=1).date == date  # pynmeagps decode
    out = decode_sentence(raw)
    assert isinstance(out, RmcFix)
    assert out.valid == valid
    assert out.date_utc == date
    assert abs(out.speed_mps - speed) <= 0.0005 * 1852 / 3600 + 1e-9
    assert abs(out.lat_deg - lat) <= 0.5e-5 / 60 + 1e-12


@given(
    sats=st.lists(
        st.sampled_from([3, 17, 32, 105, 124, 211, 236, 301, 346, 402]), unique=True, max_size=12
    ),
    data=st.data(),
    signal=st.sampled_from([None, "1", "7", "B"]),
)
def test_encode_gsv_round_trips(sats: list[int], data: st.DataObject, signal: str | None) -> None:
    """GSV group encode → assemble again gives the same arrays (whole degrees and dB-Hz)."""
    talker = {0: "GP", 1: "GL", 2: "GA", 3: "GB", 4: "GQ"}
    system = sats[0] // 100 if sats else 0
    sats = [s for s in sats if s // 100 == system]
    n = len(sats)
    elv = data.draw(
        st.lists(st.one_of(st.just(math.nan), st.integers(0, 90)), min_size=n, max_size=n)
    )
    az = data.draw(st.lists(st.integers(0, 359), min_size=n, max_size=n))
    cn0 = data.draw(
        st.lists(st.one_of(st.just(math.nan), st.integers(0, 99)), min_size=n, max_size=n)
    )
    view = SatellitesInView(
        talker=talker[system], system="GRECJ"[system], signal_id=signal, band=0, n_in_view=n,
        sat=np.array(sats, dtype=np.int16), elevation_deg=np.array(elv, dtype=float),
        azimuth_deg=np.array(az, dtype=float), cn0_dbhz=np.array(cn0, dtype=float),
    )  # fmt: skip
    asm = GsvAssembler()
    out = None
    for raw in encode_gsv(view):
        NMEAReader.parse(raw, validate=1)  # pynmeagps accepts the checksum
        out = asm.push(decode_sentence(raw))
    assert out is not None
    np.testing.assert_array_equal(out.sat, view.sat)
    np.testing.assert_array_equal(out.elevation_deg, view.elevation_deg)
    np.testing.assert_array_equal(out.azimuth_deg, view.azimuth_deg)
    np.testing.assert_array_equal(out.cn0_dbhz, view.cn0_dbhz)
    assert out.signal_id == signal
