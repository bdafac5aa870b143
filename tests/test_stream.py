"""StreamDecoder: epoch assembly, time resolution, pass-through and counters on real captures."""

from __future__ import annotations

import numpy as np
import pytest

from ionwarden.parsers import GpsTime, ObsEpoch
from ionwarden.parsers._crc import frame_rtcm
from ionwarden.parsers._ephemeris import GlonassEphemeris
from ionwarden.parsers._framer import Framer, RtcmFrame
from ionwarden.parsers._msm import decode_msm
from ionwarden.parsers._msm_encode import encode_msm
from ionwarden.parsers._stream import MAX_HELD_EPOCHS, RawRtcm, StreamDecoder


def _run(data: bytes, **kw) -> tuple[list, StreamDecoder]:
    dec = StreamDecoder(**kw)
    return dec.feed(data) + dec.feed(b""), dec


def _epochs(msgs) -> list[ObsEpoch]:
    return [m for m in msgs if isinstance(m, ObsEpoch)]


def _frames(data: bytes) -> list[RtcmFrame]:
    framer = Framer()
    return [f for f in framer.feed(data) + framer.feed(b"") if isinstance(f, RtcmFrame)]


def test_stream_ntrip_capture_epochs_and_week(real_data):
    """StreamDecoder resolves ntrip_encode_none.bin to 33 epochs from 2024-08-18 21:14:25 GPS, week 2328 (PROVENANCE.md)."""
    msgs, dec = _run((real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes())
    eps = _epochs(msgs)
    assert len(eps) == 33
    assert eps[0].time == GpsTime(2328, 76465.0)  # Sunday 21:14:25 = 76 465 s of week
    assert eps[-1].time == GpsTime(2328, 76497.0)  # 21:14:57
    assert all(np.diff([e.time.total_s for e in eps]) == 1.0)
    # PROVENANCE.md: GPS 9, GLONASS 8, Galileo 7, BeiDou 10 SVs, all MSM7.
    full = eps[5]
    assert set(full.sources) == {1077, 1087, 1097, 1127}
    assert {int(s) // 100: len(set(full.sat[full.sat // 100 == s // 100])) for s in full.sat} == {
        0: 9,
        1: 8,
        2: 7,
        3: 10,
    }
    stats = dec.statistics()
    assert stats.framer.bytes_discarded == 420  # cut-frame tail at the start (PROVENANCE.md)
    assert dict(stats.raw_by_type) == {1230: 7, 4094: 7, 1013: 1}
    assert stats.epochs_unresolved == 0
    assert stats.reference_source in {"galileo", "beidou"}
    # GLONASS frequencies come from MSM7 DF419: every GLONASS cell has one.
    assert not np.isnan(full.freq_hz).any()


def test_stream_rtk134_week_from_galileo_despite_stale_1019(real_data):
    """StreamDecoder puts RTK134 in GPS week 2143, TOW 488649–489618 (PROVENANCE.md) although many 1019s are stale."""
    msgs, dec = _run((real_data / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes())
    eps = _epochs(msgs)
    gps_epochs = [e for e in eps if 1075 in e.sources]
    assert len(gps_epochs) == 970
    assert gps_epochs[0].time == GpsTime(2143, 488649.0)
    assert gps_epochs[-1].time == GpsTime(2143, 489618.0)
    # The capture starts mid-epoch: 488 648 s has GLONASS/Galileo/BeiDou only.
    assert eps[0].time == GpsTime(2143, 488648.0)
    assert 1075 not in eps[0].sources
    assert dec.statistics().raw_by_type == {4011: 970}
    assert isinstance(next(m for m in msgs if isinstance(m, GlonassEphemeris)), GlonassEphemeris)


def test_stream_rtk134_week_from_gps_1019_fallback(real_data):
    """StreamDecoder falls back to the newest GPS 1019 when RTK134 has no 1045, still week 2143 (PROVENANCE.md)."""
    data = (real_data / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    kept = b"".join(frame_rtcm(f.payload) for f in _frames(data)[:800] if f.msg_type != 1045)
    msgs, dec = _run(kept)
    eps = _epochs(msgs)
    assert dec.statistics().reference_source == "gps-1019"
    assert eps[1].time == GpsTime(2143, 488649.0)
    assert dec.statistics().epochs_unresolved == 0


def test_stream_ublox_one_ms_offset_kept_in_one_epoch(real_data):
    """StreamDecoder keeps u-blox's +1 ms epoch time and one epoch per second (pygpsdata-rtcm3.log, PROVENANCE.md)."""
    data = (real_data / "rtcm" / "pygnssutils_pygpsdata-rtcm3.log").read_bytes()
    msgs, dec = _run(data, reference_time=GpsTime(2196, 204000.0))
    eps = _epochs(msgs)
    assert len(eps) == 158
    assert eps[0].time == GpsTime(2196, 204137.001)
    assert eps[-1].time == GpsTime(2196, 204294.001)
    assert all(set(e.sources) == {1077, 1087, 1097, 1127} for e in eps)
    assert dict(dec.statistics().raw_by_type) == {4072: 158, 1230: 158}


def test_stream_without_reference_counts_unresolved(real_data):
    """StreamDecoder emits no epoch and counts 9 unresolved when pygpsdata-NTRIP.log gives no week (PROVENANCE.md)."""
    msgs, dec = _run((real_data / "rtcm" / "pyrtcm_pygpsdata-NTRIP.log").read_bytes())
    assert _epochs(msgs) == []
    assert dec.statistics().epochs_unresolved == 9
    assert dec.statistics().reference_source == ""


def test_stream_held_epochs_are_bounded():
    """StreamDecoder holds at most MAX_HELD_EPOCHS epochs while no reference time is known."""
    dec = StreamDecoder()
    template = decode_msm(_frames(_small_epoch_stream(GpsTime(2300, 0.0)))[0].payload)
    assert template.msg_type == 1077
    for k in range(MAX_HELD_EPOCHS + 20):
        dec.feed(_small_epoch_stream(GpsTime(2300, float(k))))
        assert dec.statistics().epochs_waiting <= MAX_HELD_EPOCHS
    assert dec.statistics().epochs_unresolved == 20


def test_stream_duplicate_msm6_msm7_cells_kept_once(real_data):
    """StreamDecoder keeps one cell per satellite×signal when USCL00CHL0 sends MSM6 and MSM7 of one epoch."""
    data = (real_data / "rtcm" / "pyrtcm_pygpsdata-NTRIP-USCL00CHL0.log").read_bytes()
    msgs, dec = _run(data)
    (epoch,) = _epochs(msgs)
    assert epoch.time == GpsTime(2305, 318945.0)  # 2024-03-13 16:35:45 GPS (PROVENANCE.md)
    key = epoch.sat.astype(int) * 1024 + epoch.sig
    assert np.unique(key).size == key.size
    assert dec.statistics().duplicate_cells == key.size  # every MSM6 cell is repeated by MSM7
    # The QZSS (1116/1117) and NavIC (1136/1137) messages of this file carry no satellite (pyrtcm
    # decode: NSat = 0); GPS, GLONASS, Galileo, BeiDou and SBAS (S31, S58) have cells.
    assert set((epoch.sat // 100).tolist()) == {0, 1, 2, 3, 5}
    assert {1116, 1117, 1136, 1137} <= set(epoch.sources)
    # The kept cells are the MSM7 ones (later in the stream): compare one GPS cell with pyrtcm-checked decode.
    msm7 = decode_msm(next(f for f in _frames(data) if f.msg_type == 1077).payload)
    i = int(np.flatnonzero((epoch.sat == msm7.sat[0]) & (epoch.sig == msm7.sig[0]))[0])
    assert epoch.pseudorange_m[i] == msm7.pseudorange_m[0]


def _small_epoch_stream(t: GpsTime) -> bytes:
    sat = np.array([3, 5, 103, 211, 305], np.int16)
    sig = np.array([34, 34, 34, 34, 2 * 32 + 8], np.uint16)
    n = sat.size
    freq = np.array([1575.42e6, 1575.42e6, 1602e6 + 2 * 0.5625e6, 1575.42e6, 1561.098e6])
    pr = np.array([2.1e7, 2.3e7, 2.0e7, 2.5e7, 3.7e7])
    epoch = ObsEpoch(
        time=t,
        station_id=7,
        sat=sat,
        sig=sig,
        pseudorange_m=pr,
        phase_cycles=pr * freq / 299_792_458.0,
        range_rate_mps=np.full(n, 100.0),
        cn0_dbhz=np.full(n, 45, np.float32),
        lock_time_s=np.full(n, 10, np.float32),
        lock_indicator=np.full(n, -1, np.int16),
        half_cycle=np.zeros(n, bool),
        lli=np.zeros(n, np.uint8),
        freq_hz=freq,
    )
    return b"".join(encode_msm(epoch, level=7))


@pytest.mark.parametrize(
    ("truth", "reference"),
    [
        # GLONASS day and GPS week both roll over between Saturday 23:59:59 and the reference.
        (GpsTime(2300, 604_799.0), GpsTime(2301, 100.0)),
        (GpsTime(2301, 1.0), GpsTime(2300, 604_700.0)),
        # BeiDou (BDT = GPST − 14 s, BDS-SIS-ICD-B1I §5.1.3) crosses its week 14 s after GPS.
        (GpsTime(2300, 5.0), GpsTime(2299, 604_000.0)),
        # GLONASS day boundary in UTC(SU) + 3 h: 21:00:00 UTC = 00:00 Moscow (GLONASS ICD §3.3.3).
        (GpsTime(2300, 21 * 3600 + 18.0), GpsTime(2300, 0.0)),
    ],
)
def test_stream_resolves_rollovers(truth, reference):
    """StreamDecoder resolves GPS, GLONASS and BeiDou epoch times across week and day rollovers."""
    msgs, dec = _run(_small_epoch_stream(truth), reference_time=reference)
    (epoch,) = _epochs(msgs)
    assert epoch.time == truth
    assert set(epoch.sources) == {1077, 1087, 1097, 1127}
    assert dec.statistics().epochs == 1


def test_stream_glonass_channel_from_1020(real_data):
    """StreamDecoder gives MSM4 GLONASS cells a frequency once a 1020 has taught the channel (RTK134 1020s)."""
    rtk = (real_data / "rtcm" / "RTK134_202102051543.rtcm3").read_bytes()
    eph_1020 = b"".join(frame_rtcm(f.payload) for f in _frames(rtk) if f.msg_type == 1020)
    t = GpsTime(2143, 489000.0)
    epoch = _epochs(_run(_small_epoch_stream(t), reference_time=t)[0])[0]
    msm4 = b"".join(encode_msm(epoch, level=4))
    before = _epochs(_run(msm4, reference_time=t)[0])[0]
    assert np.isnan(before.freq_hz[before.sat == 103]).all()
    after = _epochs(_run(eph_1020 + msm4, reference_time=t)[0])[0]
    assert not np.isnan(after.freq_hz[after.sat == 103]).any()


@pytest.mark.parametrize(
    "name", ["pygnssutils_ntrip_encode_none.bin", "pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log"]
)
def test_stream_whole_bytewise_and_junk_agree(real_data, name):
    """StreamDecoder gives the same epochs fed whole, byte by byte and with junk between frames."""
    data = (real_data / "rtcm" / name).read_bytes()
    ref = GpsTime(2328, 76_000.0) if "ntrip" in name else GpsTime(2196, 204_000.0)

    def summary(msgs):
        return [
            (m.time, m.sat.tolist(), np.round(m.pseudorange_m, 6).tolist())
            if isinstance(m, ObsEpoch)
            else type(m).__name__
            for m in msgs
        ]

    whole = summary(_run(data, reference_time=ref)[0])
    dec = StreamDecoder(reference_time=ref)
    bytewise = [m for i in range(len(data)) for m in dec.feed(data[i : i + 1])] + dec.feed(b"")
    assert summary(bytewise) == whole
    junk = b"\xd3\x00\x09\x00$GPGGA,\xb5\x62"
    with_junk = b"".join(junk + frame_rtcm(f.payload) for f in _frames(data))
    # NMEA sentences of the MIXED file are not RTCM frames: compare only the RTCM part there.
    rtcm_only = summary(
        _run(b"".join(frame_rtcm(f.payload) for f in _frames(data)), reference_time=ref)[0]
    )
    assert summary(_run(with_junk, reference_time=ref)[0]) == rtcm_only


def test_stream_passes_unknown_types_raw(real_data):
    """StreamDecoder returns RawRtcm for MSM3 and counts it by type (pygpsdata-RTCMMSM3.log)."""
    msgs, dec = _run((real_data / "rtcm" / "pyrtcm_pygpsdata-RTCMMSM3.log").read_bytes())
    assert [m.msg_type for m in msgs if isinstance(m, RawRtcm)] == [1073, 1083, 1093]
    assert dict(dec.statistics().raw_by_type) == {1073: 1, 1083: 1, 1093: 1}


def test_stream_truncated_msm_counted_not_raised():
    """StreamDecoder counts an MSM whose payload is shorter than its masks and keeps going."""
    good = _small_epoch_stream(GpsTime(2300, 10.0))
    first = _frames(good)[0]
    cut = frame_rtcm(first.payload[:40])
    msgs, dec = _run(cut + good, reference_time=GpsTime(2300, 0.0))
    assert len(_epochs(msgs)) == 1
    assert dec.statistics().decode_errors_by_type == {1077: 1}
    assert "1077" in dec.statistics().last_error


def test_stream_reference_from_nmea_rmc(real_data):
    """StreamDecoder learns the date from RMC in pygpsdata-rtcm3.log: 158 epochs from 2022-02-08 08:41:59 UTC (PROVENANCE.md)."""
    msgs, dec = _run((real_data / "rtcm" / "pygnssutils_pygpsdata-rtcm3.log").read_bytes())
    eps = _epochs(msgs)
    assert len(eps) == 158
    assert dec.statistics().reference_source == "nmea"
    assert eps[0].time == GpsTime(2196, 204137.001)
    assert eps[0].time.to_utc().isoformat() == "2022-02-08T08:41:59.001000+00:00"
    assert dec.statistics().nmea_decoded == 4661  # every valid sentence (PROVENANCE.md)


def test_stream_wrong_clock_corrected_by_two_ephemerides(real_data):
    """StreamDecoder replaces a reference a year off once two Galileo ephemerides agree (ntrip_encode_none.bin, week 2328)."""
    data = (real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes()
    msgs, dec = _run(data, reference_time=GpsTime(2276, 76_000.0))  # 52 weeks early
    eps = _epochs(msgs)
    assert eps[-1].time == GpsTime(2328, 76497.0)  # 21:14:57 (PROVENANCE.md)
    assert dec.statistics().reference_corrections == 1
    assert dec.statistics().reference_source in {"galileo", "beidou"}


def test_stream_glonass_unknown_day_resolved_by_time_of_day():
    """StreamDecoder places a GLONASS MSM whose DF416 day is 7 (unknown, RTCM 10403.3) by its time of day."""
    truth = GpsTime(2300, 3 * 86_400 + 5 * 3600 + 18.0)
    frames = _frames(_small_epoch_stream(truth))
    glo = next(f for f in frames if f.msg_type == 1087)
    payload = bytearray(glo.payload)
    payload[3] = (payload[3] & 0x1F) | (7 << 5)  # bits 24–26 = DF416
    patched = b"".join(
        frame_rtcm(bytes(payload)) if f is glo else frame_rtcm(f.payload) for f in frames
    )
    dec = StreamDecoder(reference_time=truth + 7200.0, emit_msm=True)
    msgs = dec.feed(patched) + dec.feed(b"")
    assert next(m for m in msgs if getattr(m, "msg_type", 0) == 1087).glonass_day == 7
    (epoch,) = _epochs(msgs)
    assert epoch.time == truth
    assert 1087 in epoch.sources


def test_stream_feed_frames_equals_feed(real_data):
    """StreamDecoder.feed_frames on a caller's Framer output gives what feed gives on the bytes (ntrip_encode_none.bin)."""
    data = (real_data / "rtcm" / "pygnssutils_ntrip_encode_none.bin").read_bytes()
    by_bytes, _ = _run(data)
    framer = Framer()
    dec = StreamDecoder()
    by_frames = dec.feed_frames(framer.feed(data))
    by_frames += dec.feed_frames(framer.feed(b""), end_of_stream=True)
    assert [type(m) for m in by_frames] == [type(m) for m in by_bytes]
    assert [m.time for m in _epochs(by_frames)] == [m.time for m in _epochs(by_bytes)]
    assert dec.statistics().framer.bytes_total == 0  # the caller's framer did the framing
