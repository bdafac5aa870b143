"""Selective NMEA decoding: sentences nobody routes skip pynmeagps's field parse."""

from __future__ import annotations

import pytest

from ionwarden.daemon.bench import demo_capture
from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.parsers import GgaFix, NmeaOther, ParseError, decode_sentence

# A GGA sentence (NMEA 0183 v4.11 layout; checksum valid, decoded through pynmeagps below).
GGA = b"$GPGGA,092725.00,4717.11399,N,00833.91590,E,1,08,1.01,499.6,M,48.0,M,,*5B\r\n"


def test_decode_sentence_passes_unwanted_types_through() -> None:
    """decode_sentence returns NmeaOther without a field parse when the type is not wanted."""
    other = decode_sentence(GGA, frozenset({"GST"}))
    assert isinstance(other, NmeaOther)
    assert other.sentence_id == "GGA"
    assert isinstance(decode_sentence(GGA, frozenset({"GGA"})), GgaFix)
    assert isinstance(decode_sentence(GGA), GgaFix)


def test_decode_sentence_checks_checksum_even_when_unwanted() -> None:
    """decode_sentence still rejects a bad checksum for a sentence it would not parse (NMEA 0183 §5.2.1)."""
    bad = GGA.replace(b"*5B", b"*00")
    with pytest.raises(ParseError, match="checksum"):
        decode_sentence(bad, frozenset())


def test_pipeline_stops_parsing_gsv_once_ephemerides_give_geometry() -> None:
    """StationPipeline narrows NMEA decoding to GGA/GST when every satellite has ephemeris
    geometry, and still reports the receiver's fix every second (bundled demo)."""
    data = demo_capture()
    pipe = StationPipeline("demo")
    outs = []
    for i in range(0, len(data), 4096):
        outs += pipe.feed(data[i : i + 4096])
    snaps = [o for o in outs if isinstance(o, StationSnapshot)]
    fixes = [o for o in outs if isinstance(o, FixStatus)]
    assert snaps[-1].geometry_source == "ephemeris"
    assert pipe.decoder.nmea_wanted == frozenset({"GGA", "GST"})
    assert len(fixes) >= len(snaps) - 2  # one GGA per second in the demo (daemon/data/demo.md)
