"""The lean GGA/GST builders (parsers/_nmea_fast.py) give exactly the pynmeagps path's values.

Source of every expected value: the pynmeagps path of ``decode_sentence`` (reference library
pynmeagps), run on the same sentence with the lean builders switched off; the sentences are the
real captures in ../shared/data/real/nmea (read in place) and generated field garbage.
"""

from __future__ import annotations

from unittest import mock

import pytest
from hypothesis import given
from hypothesis import strategies as st

from ionwarden.parsers import ParseError
from ionwarden.parsers._nmea import GgaFix, GstErrors, decode_sentence
from ionwarden.parsers._nmea_encode import sentence
from ionwarden.parsers._nmea_fast import FAST_BUILDERS

from .conftest import REAL_DATA
from .test_nmea import candidates

NMEA_FILES = sorted((REAL_DATA / "nmea").glob("*")) if (REAL_DATA / "nmea").is_dir() else []


def outcome(raw: bytes) -> str:
    """The decoded value's repr (exact floats, -0.0 ≠ 0.0, NaN = NaN) or the ParseError's reason."""
    try:
        return repr(decode_sentence(raw))
    except ParseError as exc:
        return f"ParseError({exc.reason!r}, {exc.message_id!r})"


def reference(raw: bytes) -> str:
    """The same through pynmeagps only (lean builders off)."""
    with mock.patch.dict(FAST_BUILDERS, clear=True):
        return outcome(raw)


def lean(raw: bytes) -> object:
    """What the lean builder alone gives (None: it hands over to pynmeagps)."""
    s = raw.rstrip(b"\r\n")
    comma = s.find(b",")
    address = s[1:comma].decode()
    return FAST_BUILDERS[address[2:]](address[:2], s[comma + 1 : -3])


def test_lean_equals_pynmeagps_on_every_real_gga_gst() -> None:
    """Every GGA/GST sentence of the real captures: same value (or error) both ways."""
    assert NMEA_FILES
    seen = taken = 0
    for path in NMEA_FILES:
        for s in candidates(path.read_bytes()):
            if s[3:7] not in (b"GGA,", b"GST,"):
                continue
            seen += 1
            assert outcome(s) == reference(s), s
            taken += lean(s) is not None
    # the captures hold GGA (and the Unicore file GST) sentences; the lean path takes most of them
    assert seen >= 150
    assert taken >= seen - 5


@pytest.mark.parametrize(
    "csv",
    [
        # from memory: NMEA 0183 §6.3 GGA layouts, edge cases of the time and position fields
        "103607.00,5327.03942,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,",
        "103607,5327.03942,S,00214.42462,E,4,12,0.6,56.0,M,48.5,M,1.0,0123",
        "235960.00,5327.03942,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,",  # leap second: pynmeagps gives no time
        "103607.1234567,0000.00000,S,00000.0000,W,1,06,,,,,,,",  # 7 fraction digits; zero position in the southern/western hemispheres
        "1036,53.0,N,0.0,W,0,,,,,,,,",  # short fields
        ",,,,,,,,,,,,,",  # all empty
        "103607.5,5327.03942,N,00214.42462,W,1,06",  # too few fields
        "103607.00,5327.03942,N,00214.42462,W,1.5,06,5.88,56.0,M,48.5,M,,",  # non-integer quality: pynmeagps error
        "103607.00,5327.0394,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,,extra",  # extra field: pynmeagps ignores it
    ],
)
def test_lean_gga_equals_pynmeagps_on_edge_cases(csv: str) -> None:
    raw = sentence("GNGGA", csv.split(","))
    assert outcome(raw) == reference(raw)


@given(
    st.sampled_from(["GPGGA", "GNGGA", "GNGST", "GPGST"]),
    st.lists(st.text(alphabet="0123456789.,-+NSEWM *", max_size=12), max_size=16),
)
def test_lean_equals_pynmeagps_on_garbage_fields(address: str, fields: list[str]) -> None:
    """Arbitrary field text (valid checksum): same value or same ParseError both ways."""
    raw = sentence(address, fields)
    assert outcome(raw) == reference(raw)


def test_lean_builds_our_value_types() -> None:
    """The lean path returns the same value types (real GGA from pygnssutils' extract)."""
    gga = lean(b"$GNGGA,103607.00,5327.03942,N,00214.42462,W,1,06,5.88,56.0,M,48.5,M,,*64")
    assert isinstance(gga, GgaFix)
    assert gga.lat_deg > 0 > gga.lon_deg
    gst = lean(sentence("GPGST", ["172814.0", "0.006", "0.023", "0.020", "273.6", "0.023",
                                  "0.020", "0.031"]))  # fmt: skip
    assert isinstance(gst, GstErrors)
    assert gst.alt_sigma_m == 0.031  # NMEA 0183 §6.3 GST field 8, as sent
