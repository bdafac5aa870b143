"""NMEA 0183 decoding: every field of every sentence in ../shared/data/real/nmea equals pynmeagps,
bad checksums are ParseError with PROVENANCE.md's counts, GSV groups assemble per talker and signal."""

from __future__ import annotations

import contextlib
import math
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from pynmeagps import NMEAReader
from pynmeagps import exceptions as nmea_exc

from ionwarden.parsers import ParseError
from ionwarden.parsers._nmea import (
    KNOT_MPS,
    GgaFix,
    GnsFix,
    GsaDop,
    GstErrors,
    GsvAssembler,
    GsvPart,
    NmeaOther,
    RmcFix,
    SatellitesInView,
    VtgVelocity,
    ZdaTime,
    decode_sentence,
    nmea_sat_id,
)

from .conftest import REAL_DATA

NMEA_DIR = REAL_DATA / "nmea"
NMEA_FILES = sorted(NMEA_DIR.glob("*")) if NMEA_DIR.is_dir() else []


def candidates(data: bytes) -> list[bytes]:
    """Each line from its last '$' (a resyncing reader restarts at every '$')."""
    out = []
    for line in data.split(b"\n"):
        j = line.rfind(b"$")
        if j >= 0:
            out.append(line[j:].rstrip(b"\r"))
    return out


def empty(v: object) -> bool:
    return v is None or v == "" or (isinstance(v, float) and math.isnan(v))


def same(ours: object, theirs: object, scale: float = 1.0) -> bool:
    """Our value against pynmeagps's ("" = empty field)."""
    if theirs == "":
        return empty(ours) or ours == 0
    if isinstance(theirs, (int, float)) and not isinstance(theirs, bool):
        return math.isclose(float(ours) * scale, float(theirs), rel_tol=1e-12)  # type: ignore[arg-type]
    return ours == theirs


# Our field → pynmeagps attribute (pynmeagps decode), per type.
FIELDS: dict[type, list[tuple[str, str]]] = {
    GgaFix: [("time_utc", "time"), ("lat_deg", "lat"), ("lon_deg", "lon"), ("quality", "quality"),
             ("n_sats_used", "numSV"), ("hdop", "HDOP"), ("alt_msl_m", "alt"),
             ("geoid_sep_m", "sep"), ("dgps_age_s", "diffAge"), ("dgps_station", "diffStation")],
    RmcFix: [("time_utc", "time"), ("date_utc", "date"), ("lat_deg", "lat"), ("lon_deg", "lon"),
             ("course_deg", "cog"), ("mode", "posMode")],
    GsaDop: [("selection", "opMode"), ("fix_type", "navMode"), ("pdop", "PDOP"), ("hdop", "HDOP"),
             ("vdop", "VDOP")],
    GstErrors: [("time_utc", "time"), ("rms_m", "rangeRms"), ("major_m", "stdMajor"),
                ("minor_m", "stdMinor"), ("orient_deg", "orient"), ("lat_sigma_m", "stdLat"),
                ("lon_sigma_m", "stdLong"), ("alt_sigma_m", "stdAlt")],
    GnsFix: [("time_utc", "time"), ("lat_deg", "lat"), ("lon_deg", "lon"), ("mode", "posMode"),
             ("n_sats_used", "numSV"), ("hdop", "HDOP"), ("alt_msl_m", "alt"),
             ("geoid_sep_m", "sep"), ("dgps_age_s", "diffAge"), ("nav_status", "navStatus")],
    VtgVelocity: [("course_true_deg", "cogt"), ("course_mag_deg", "cogm"), ("mode", "posMode")],
    ZdaTime: [("time_utc", "time")],  # pynmeagps keeps ltzh/ltzn as text: compared below
    GsvPart: [("n_msgs", "numMsg"), ("msg_num", "msgNum"), ("n_in_view", "numSV")],
}  # fmt: skip


def check_against_pynmeagps(ours: object, ref: Any) -> None:
    for mine, theirs in FIELDS.get(type(ours), []):
        assert same(getattr(ours, mine), getattr(ref, theirs)), (
            mine,
            getattr(ours, mine),
            getattr(ref, theirs),
        )
    if isinstance(ours, (RmcFix, VtgVelocity)):
        knots = ref.spd if isinstance(ours, RmcFix) else ref.sogn
        assert same(ours.speed_mps, knots, 1 / KNOT_MPS)
    if isinstance(ours, RmcFix):
        assert ours.valid == (ref.status == "A")
        mv = ref.mv
        assert same(ours.mag_var_deg, mv if ref.mvEW != "W" or mv == "" else -mv)
    if isinstance(ours, GsaDop):
        svids = [getattr(ref, f"svid_{k:02d}") for k in range(1, 13)]
        assert ours.svids == tuple(v for v in svids if v != "")
        sys_id = getattr(ref, "systemId", "")  # pynmeagps keeps the hex digit as text
        assert ours.system_id == (int(sys_id, 16) if sys_id != "" else None)
    if isinstance(ours, GsvPart):
        n = len(ours.svids)
        assert same(ours.signal_id, str(getattr(ref, "signalID", "")) or "")
        for k in range(n):
            assert ours.svids[k] == getattr(ref, f"svid_{k + 1:02d}")
            assert same(ours.elevation_deg[k], getattr(ref, f"elv_{k + 1:02d}"))
            assert same(ours.azimuth_deg[k], getattr(ref, f"az_{k + 1:02d}"))
            assert same(ours.cn0_dbhz[k], getattr(ref, f"cno_{k + 1:02d}"))
        assert not hasattr(ref, f"svid_{n + 1:02d}")
    if isinstance(ours, ZdaTime):
        zone = [
            (ours.zone_hours, ref.ltzh),
            (ours.zone_minutes, ref.ltzn),
        ]
        for got, text in zone:
            assert got == (int(text) if text != "" else None)
    if isinstance(ours, ZdaTime) and ours.date_utc is not None:
        assert (ours.date_utc.day, ours.date_utc.month, ours.date_utc.year) == (
            ref.day, ref.month, ref.year,
        )  # fmt: skip


def decode_file(path: Path) -> tuple[int, int, int, int]:
    """(decoded, bad checksums, malformed, compared with pynmeagps) for one file."""
    ok = bad = malformed = compared = 0
    for s in candidates(path.read_bytes()):
        try:
            ref = NMEAReader.parse(s, validate=1)  # pynmeagps decode, checksum validated
        except nmea_exc.NMEAParseError as exc:
            ref = exc
        try:
            ours = decode_sentence(s)
        except ParseError as exc:
            if "checksum" in exc.reason:
                bad += 1
                assert isinstance(ref, nmea_exc.NMEAParseError)  # pynmeagps also rejects it
            else:
                malformed += 1
            continue
        ok += 1
        assert ref is not None
        assert not isinstance(ref, Exception)
        if not isinstance(ours, NmeaOther):
            check_against_pynmeagps(ours, ref)
            compared += 1
        else:
            assert ours.talker + ours.sentence_id == ref.identity or ours.talker == "P"
    return ok, bad, malformed, compared


# (good, bad checksum, malformed) per file: PROVENANCE.md, with the mixed file as noted below.
EXPECTED = {
    # 4,661 sentences, all valid (PROVENANCE.md).
    "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea": (4661, 0, 0),
    "pygnssutils_pygpsdata-nmea.log": (26, 0, 0),  # all 26 checksums valid
    "pynmeagps_pygpsdata-nmea2.log": (17, 0, 0),  # all 17 valid
    "pynmeagps_unicore_nmea.log": (61, 0, 0),  # all 61 valid
    "pynmeagps_pygpsdata-nmeabadck.log": (1, 2, 0),  # two bad checksums, one valid GNRMC
    # PROVENANCE.md: the scan found 14 good + 1 bad + 2 malformed, its candidates running from a '$'
    # inside UBX binary to the CRLF of the next GGA; restarting at each '$' recovers that GGA, so
    # 15 good = pynmeagps's GNGGA×2 + GNGSA×8 + GSV×5, and the 2 binary '$' runs are malformed.
    "pynmeagps_pygpsdata-mixed.log": (15, 0, 2),
}


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_decode_sentence_equals_pynmeagps(name: str) -> None:
    """decode_sentence matches pynmeagps field for field, and checksum counts (PROVENANCE.md)."""
    ok, bad, malformed, compared = decode_file(NMEA_DIR / name)
    assert (ok, bad, malformed) == EXPECTED[name]
    assert compared > 0


def test_nmea_files_all_covered() -> None:
    """Every NMEA file under ../shared/data/real/nmea is cross-checked."""
    assert {p.name for p in NMEA_FILES} == set(EXPECTED)


def test_decode_sentence_types_of_extract() -> None:
    """The u-blox extract decodes to PROVENANCE.md's sentence counts per type."""
    counts: dict[str, int] = {}
    for s in candidates((NMEA_DIR / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes()):
        m = decode_sentence(s)
        key = type(m).__name__ if not isinstance(m, NmeaOther) else m.sentence_id
        counts[key] = counts.get(key, 0) + 1
    # PROVENANCE.md: GNGGA×157, GNRMC×157, GNGLL×158, GNVTG×157, GNGSA×785, GSV 1114+628+628+720+157.
    assert counts == {"GgaFix": 157, "RmcFix": 157, "GLL": 158, "VtgVelocity": 157,
                      "GsaDop": 785, "GsvPart": 3247}  # fmt: skip


def test_gsv_assembler_groups_extract_per_signal() -> None:
    """GsvAssembler yields one view per talker and signal id per epoch (NMEA 4.11 signal ids)."""
    asm = GsvAssembler()
    lines = candidates((NMEA_DIR / "pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea").read_bytes())
    views: list[SatellitesInView] = [
        v for s in lines if (v := asm.push(decode_sentence(s))) is not None
    ]
    assert asm.dropped_groups == 0
    keys = {(v.talker, v.signal_id, v.band) for v in views}
    # PROVENANCE.md: GP 1 and 6 (L1 C/A, L2C), GL 1 and 3, GA 7 and 2 (E1, E5b), GB 1 and B
    # (B1I, B2I), GQ; RINEX bands per NMEA 0183 4.11 signal table (from memory).
    assert {(t, s) for t, s, _ in keys} >= {
        ("GP", "1"), ("GP", "6"), ("GL", "1"), ("GL", "3"), ("GA", "7"), ("GA", "2"),
        ("GB", "1"), ("GB", "B"),
    }  # fmt: skip
    bands = {(t, s): b for t, s, b in keys}
    assert bands[("GP", "6")] == 2
    assert bands[("GA", "2")] == 7
    assert bands[("GB", "B")] == 7
    for v in views:
        assert len(v.sat) == len(v.cn0_dbhz) == len(v.elevation_deg) == len(v.azimuth_deg)
        assert len(v.sat) == v.n_in_view
        assert not v.sat.flags.writeable
        if v.talker == "GL":
            assert ((v.sat > 100) & (v.sat < 200)).all()  # NMEA GLONASS 65–96 → R01–R32


def test_gsv_assembler_drops_out_of_order_group() -> None:
    """GsvAssembler drops a group whose sentence 2 has another signal id (hand-edited real file)."""
    asm = GsvAssembler()
    out = [
        v
        for s in candidates((NMEA_DIR / "pygnssutils_pygpsdata-nmea.log").read_bytes())
        if (v := asm.push(decode_sentence(s))) is not None
    ]
    # pygnssutils_pygpsdata-nmea.log: GLGSV 1/3 and 3/3 carry signal 1, 2/3 carries B.
    assert [(v.talker, v.signal_id) for v in out] == [("GP", "1"), ("GA", "7"), ("GB", "1")]
    assert asm.dropped_groups == 1
    gp = out[0]
    # Values from the sentences themselves: $GPGSV,3,1,11,01,06,014,08,...
    assert gp.sat[0] == 1
    assert gp.elevation_deg[0] == 6
    assert gp.azimuth_deg[0] == 14
    assert gp.cn0_dbhz[0] == 8
    assert math.isnan(gp.cn0_dbhz[2])


@pytest.mark.parametrize(
    "raw",
    [
        b"$GNRMC,103607.00,A,5327.03942,N,00214.42462,W,0.046,,060321,,,A,V*0E",  # checksum of 10214
        b"GNGGA,103607.00*00",
        b"$GNGGA,103607.00*G0",
        b"$*00",
        b"$GN GGA,1*00",
    ],
)
def test_decode_sentence_rejects_bad_input(raw: bytes) -> None:
    """decode_sentence raises ParseError for bad checksum, framing or address (NMEA 0183 §5.3)."""
    with pytest.raises(ParseError):
        decode_sentence(raw)


def test_decode_sentence_accepts_with_or_without_crlf() -> None:
    """decode_sentence gives the same value with CRLF, LF or none (real GGA)."""
    s = b"$GNGGA,103607.00,5327.03942,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,*64"
    values = {decode_sentence(s + end) for end in (b"", b"\n", b"\r\n")}
    assert len(values) == 1


def test_decode_sentence_maps_pynmeagps_errors() -> None:
    """A valid checksum over a bad field gives ParseError chained to pynmeagps's error."""
    from ionwarden.parsers._nmea_encode import sentence

    raw = sentence("GPGGA", ["1036xx", "53x", "N", "", "", "q"])
    with pytest.raises(ParseError) as info:
        decode_sentence(raw)
    assert info.value.message_id == "GPGGA"
    assert info.value.__cause__ is not None


@given(st.binary(max_size=120))
def test_decode_sentence_raises_only_parse_error(data: bytes) -> None:
    """decode_sentence returns a message or raises ParseError for arbitrary bytes (STYLE rule 8)."""
    with contextlib.suppress(ParseError):
        decode_sentence(data)


@given(
    st.sampled_from(["GGA", "RMC", "GSA", "GSV", "GST", "GNS", "VTG", "ZDA"]),
    st.lists(st.text(alphabet="0123456789.,-NSEWAMV", max_size=12), max_size=22),
)
def test_decode_sentence_survives_garbage_fields(kind: str, fields: list[str]) -> None:
    """Known sentence types with garbage fields and valid checksums never escape ParseError."""
    from ionwarden.parsers._nmea_encode import sentence

    with contextlib.suppress(ParseError):
        decode_sentence(sentence("GN" + kind, fields))


@pytest.mark.parametrize(
    ("system", "n", "want"),
    [
        ("G", 7, 7), ("G", 40, 527), ("R", 65, 101), ("R", 5, 105), ("E", 11, 211),
        ("E", 311, 211), ("C", 46, 346), ("C", 423, 323), ("J", 195, 403), ("J", 2, 402),
        (None, 70, 106), (None, 12, 12), ("G", 300, None),
    ],
)  # fmt: skip
def test_nmea_sat_id_maps_numbering(system: str | None, n: int, want: int | None) -> None:
    """nmea_sat_id follows NMEA 4.11 numbering and the older combined ranges (from memory)."""
    assert nmea_sat_id(system, n) == want


def test_gsv_assembler_bounds_group_size() -> None:
    """GsvAssembler drops a group announcing more than MAX_GSV_SENTENCES sentences (bounded memory)."""
    from ionwarden.parsers._nmea_encode import sentence
    from ionwarden.parsers._nmea_gsv import MAX_GSV_SENTENCES

    asm = GsvAssembler()
    big = MAX_GSV_SENTENCES + 1
    for k in range(1, 4):
        assert asm.push(decode_sentence(sentence("GPGSV", [str(big), str(k), "99"]))) is None
    assert asm.dropped_groups == 0  # never stored, nothing partial to drop
    ok = decode_sentence(sentence("GPGSV", ["1", "1", "01", "07", "45", "123", "40"]))
    view = asm.push(ok)
    assert view is not None
    assert view.sat.tolist() == [7]
