"""Selective NMEA decoding: sentences nobody routes skip pynmeagps's field parse."""

from __future__ import annotations

import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ionwarden.daemon.bench import demo_capture
from ionwarden.daemon.estimator import FixStatus, StationPipeline, StationSnapshot
from ionwarden.parsers import GgaFix, NmeaOther, ParseError, decode_sentence
from ionwarden.parsers._framer import Framer, NmeaFrame, RtcmFrame
from ionwarden.parsers._nmea import decode_wanted, skipped_sentence

from .test_nmea import NMEA_FILES, candidates

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


def _outcome(raw: bytes, wanted: frozenset[str] | None, *, checked: bool) -> str:
    """The decoded value's repr or the ParseError's reason and message id."""
    try:
        return repr(decode_sentence(raw, wanted, checked=checked))
    except ParseError as exc:
        return f"ParseError({exc.reason!r}, {exc.message_id!r})"


@pytest.mark.parametrize("wanted", [None, frozenset({"GGA", "GST"}), frozenset()])
def test_decode_sentence_checked_equals_unchecked_on_real_sentences(wanted) -> None:
    """decode_sentence gives the same value with checked=True for every checksum-good sentence of
    the real captures in ../shared/data/real/nmea (source: its own checking path on the same bytes)."""
    seen = 0
    for path in NMEA_FILES:
        for raw in candidates(path.read_bytes()):
            plain = _outcome(raw, wanted, checked=False)
            if "checksum" in plain:  # the framer never hands these over
                continue
            assert _outcome(raw, wanted, checked=True) == plain
            seen += 1
    assert seen > 4661  # the u-blox extract alone has 4,661 (PROVENANCE.md)


@pytest.mark.parametrize(
    ("raw", "reason"),
    [
        # NMEA 0183 §5.3: "!" starts encapsulated (AIS) sentences, which we do not decode.
        (b"!AIVDM,1,1,,A,13u?etPv2;0n:dDPwUM1U1Cb069D,0*24\r\n", "not a $...*hh sentence"),
        (b"$*00\r\n", "not a $...*hh sentence"),  # no address field
        (b"$GP-GA,1*21\r\n", "bad address field b'GP-GA'"),  # §5.3.2: address is alphanumeric
    ],
)
def test_decode_sentence_checked_keeps_other_errors(raw, reason) -> None:
    """decode_sentence with checked=True still rejects a framed (checksum-good) sentence it cannot
    name (NMEA 0183 §5.3)."""
    with pytest.raises(ParseError, match=re.escape(reason)):
        decode_sentence(raw, frozenset(), checked=True)
    with pytest.raises(ParseError, match=re.escape(reason)):
        decode_sentence(raw, frozenset())


def test_decode_sentence_checked_skips_only_the_checksum() -> None:
    """decode_sentence(checked=True) trusts the caller's checksum and names the sentence as usual."""
    bad = GGA.replace(b"*5B", b"*00")
    other = decode_sentence(bad, frozenset(), checked=True)
    assert isinstance(other, NmeaOther)
    assert (other.talker, other.sentence_id, other.raw) == ("GP", "GGA", bad.rstrip(b"\r\n"))
    # Proprietary (NMEA 0183 §5.3.3): talker "P", the rest of the address as the id.
    pubx = b"$PUBX,00,081350.00*00\r\n"
    assert decode_sentence(pubx, None, checked=True) == NmeaOther(
        talker="P", sentence_id="UBX", raw=pubx.rstrip(b"\r\n")
    )


@settings(max_examples=300, deadline=None)
@given(
    st.sampled_from(
        [b"$GPGGA,", b"$GNGST,", b"$GNRMC,", b"$GPGSV,", b"$PUBX,", b"$GP-GA,", b"!AI"]
    ),
    st.binary(max_size=90).map(lambda b: bytes(0x20 + v % 0x5F for v in b)),
    st.sampled_from([None, frozenset({"GGA", "GST"})]),
)
def test_decode_sentence_checked_equals_unchecked_on_framed_sentences(head, tail, wanted) -> None:
    """decode_sentence(checked=True) gives the value or ParseError of the checking path for every
    sentence our framer passes (printable fields, checksum made valid; NMEA 0183 §5.3.1)."""
    body = (head + tail)[1:].replace(b"*", b",")
    ck = 0
    for b in body:
        ck ^= b
    raw = head[:1] + body + b"*%02X\r\n" % ck
    frames = Framer().feed(raw)
    assert len(frames) == 1
    assert _outcome(raw, wanted, checked=True) == _outcome(raw, wanted, checked=False)


def test_pipeline_parses_only_routed_sentences_before_orbits() -> None:
    """Without ephemerides StationPipeline parses GGA, GST and GSV (the fallback elevations), not
    GSA/VTG/RMC, and the GSV elevations reach the estimator (bundled demo with its ephemeris
    messages removed, first 200 kB)."""
    pipe = StationPipeline("demo")
    assert pipe.decoder.nmea_wanted == frozenset({"GGA", "GST", "GSV"})
    data = demo_capture()[:200_000]
    kept = b"".join(
        f.raw if isinstance(f, NmeaFrame) else data[f.offset : f.offset + len(f.payload) + 6]
        for f in Framer().feed(data)
        if not (isinstance(f, RtcmFrame) and f.msg_type in (1019, 1020, 1042, 1044, 1045, 1046))
    )
    outs = []
    for i in range(0, len(kept), 4096):
        outs += pipe.feed(kept[i : i + 4096])
    snaps = [o for o in outs if isinstance(o, StationSnapshot)]
    assert snaps
    assert {s.geometry_source for s in snaps[5:]} == {"gsv"}
    assert pipe.decoder.nmea_wanted == frozenset({"GGA", "GST", "GSV"})


# -- skipped_sentence: decode_wanted's None for a plain reason, from a cached head ----------------
_WANTED_SETS = [None, frozenset({"GGA", "GST"}), frozenset({"GGA", "GST", "GSV"}), frozenset()]


def _decode_outcome(raw: bytes, wanted: frozenset[str] | None) -> str:
    """decode_wanted(checked=True)'s result: "None", a value's repr, or the ParseError."""
    try:
        return repr(decode_wanted(raw, wanted, checked=True))
    except ParseError as exc:
        return f"ParseError({exc.reason!r})"


def _check_skipped(raw: bytes) -> None:
    """skipped_sentence is True only where decode_wanted(checked=True) returns None (the oracle:
    the previous path, which the stream decoder still takes whenever it is False)."""
    for wanted in _WANTED_SETS:
        if skipped_sentence(raw, wanted):
            assert _decode_outcome(raw, wanted) == "None", (raw, wanted)


def test_skipped_sentence_on_real_sentences() -> None:
    """Every sentence of the real captures in ../shared/data/real/nmea, and the decoder's count
    of skipped ones matches what decode_wanted alone returns None for."""
    n_skipped = 0
    for path in NMEA_FILES:
        for raw in candidates(path.read_bytes()):
            _check_skipped(raw)
            _check_skipped(raw + b"\r\n")
            n_skipped += skipped_sentence(raw + b"\r\n", frozenset({"GGA", "GST"}))
    assert n_skipped > 1000  # GSV, RMC, GSA, … of the u-blox extract (PROVENANCE.md)


_ADDRESSES = st.sampled_from(
    ["GPGSV", "GLGSV", "GNRMC", "GPGGA", "GNGST", "GNGSA", "GPZDA", "GPVTG", "GPXYZ", "PUBX",
     "PABCD", "GP-SV", "GNGSVH", "GP GSV", "gpgsv", "GPGS\u00e9"]
)  # fmt: skip


@settings(max_examples=400)
@given(
    _ADDRESSES,
    st.text(alphabet="0123456789,.*$!ABCNEW \r\n-", max_size=80),
    st.sampled_from(["*4F", "*", "*4", "4F", ""]),
    st.sampled_from(["\r\n", "\n", "", "\r", "\n\r", "\r\n\r\n"]),
    st.sampled_from(["$", "!", ""]),
)
def test_skipped_sentence_on_generated_sentences(
    address: str, body: str, star: str, eol: str, start: str
) -> None:
    """Odd addresses, bodies with extra '*'/'$'/CR/LF, short and long sentences, missing or
    broken checksum fields, every line ending: never True where decode_wanted would not return
    None."""
    raw = f"{start}{address},{body}{star}{eol}".encode()
    _check_skipped(raw)
    _check_skipped(raw[:9])
    _check_skipped(raw + b"x" * 250)


def test_skipped_sentence_skips_the_plain_unwanted_ones() -> None:
    """The sentences a receiver sends each second beside GGA/GST are found skipped (the point of
    the shortcut), and the wanted ones are not."""
    gsv = b"$GPGSV,3,3,10,26,41,139,45,31,58,071,48*76\r\n"
    wanted = frozenset({"GGA", "GST"})
    assert skipped_sentence(gsv, wanted)
    assert not skipped_sentence(gsv, None)
    assert not skipped_sentence(GGA, wanted)
    assert skipped_sentence(b"$GPXYZ,1,2*00\r\n", None)  # no decoder: NmeaOther, not built
    assert not skipped_sentence(b"$PUBX,00,1*00\r\n", wanted)  # not a 5-character address
    assert not skipped_sentence(bytearray(gsv), wanted)  # not bytes: decode_wanted decides


def test_stream_decoder_counts_as_before() -> None:
    """StreamDecoder with and without the shortcut: the same messages and statistics on the
    bundled demo capture (its GSV, RMC, GSA, … skipped once ephemerides give the geometry)."""
    from unittest import mock

    from ionwarden.parsers import _stream

    def run(shortcut: bool) -> tuple[str, object]:
        pipe = StationPipeline("demo")
        outs: list[object] = []
        with mock.patch.object(
            _stream, "skipped_sentence", _stream.skipped_sentence if shortcut else _never
        ):
            data = demo_capture()
            for i in range(0, len(data), 4096):
                outs += pipe.feed(data[i : i + 4096])
        return repr([o for o in outs if isinstance(o, FixStatus)]), pipe.decoder.statistics()

    with_it, without = run(True), run(False)
    assert with_it == without
    assert with_it[1].nmea_skipped > 0  # type: ignore[attr-defined]


def _never(_raw: bytes, _wanted: object) -> bool:
    return False
