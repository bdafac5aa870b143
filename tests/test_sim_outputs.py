"""Simulator outputs: RTCM/NMEA stream, RINEX, truth tables, determinism, events, CLI."""

from __future__ import annotations

import io
import warnings
from pathlib import Path

import numpy as np
import pytest

from ionwarden.daemon.sim import (
    Simulator,
    Sinks,
    build_scenario,
    iter_stream,
    nav_ephemerides,
    run_to_sinks,
)
from ionwarden.parsers import signal_code
from ionwarden.parsers._stream import StreamDecoder

C = 299_792_458.0


def _split(data: bytes) -> tuple[list[bytes], list[bytes], int]:
    """RTCM frames and NMEA sentences of a stream, plus bytes that are neither."""
    rtcm, nmea, junk, i = [], [], 0, 0
    while i < len(data):
        if data[i] == 0xD3 and i + 3 <= len(data):
            n = ((data[i + 1] & 3) << 8) | data[i + 2]
            rtcm.append(data[i : i + 6 + n])
            i += 6 + n
        elif data[i : i + 1] == b"$":
            j = data.index(b"\n", i)
            nmea.append(data[i : j + 1])
            i = j + 1
        else:
            junk += 1
            i += 1
    return rtcm, nmea, junk


def _stream(name: str, duration: float, msm: int = 7, seed: int = 1) -> bytes:
    sim = Simulator(build_scenario(name, duration_s=duration, seed=seed))
    return b"".join(d for _, d in iter_stream(sim, 0, msm_level=msm))


@pytest.mark.parametrize("msm", [4, 7])
def test_stream_every_rtcm_frame_decodes_in_pyrtcm(msm: int) -> None:
    """Every RTCM frame of the stream parses in pyrtcm with a valid CRC (pyrtcm decode)."""
    from pyrtcm import RTCMReader

    rtcm, nmea, junk = _split(_stream("storm-front", 20.0, msm))
    assert junk == 0
    kinds = set()
    for raw in rtcm:
        msg = RTCMReader.parse(raw, validate=1)  # validate=1 raises on a CRC error
        kinds.add(msg.identity)
    base = 1070 + 10 * 0 + msm
    assert {str(base), str(base + 10), str(base + 20), str(base + 50)} <= kinds  # MSM G R E C
    assert {"1005", "1019", "1020", "1042", "1045"} <= kinds
    assert len(nmea) > 0


def test_stream_every_nmea_sentence_parses_in_pynmeagps() -> None:
    """Every NMEA sentence parses in pynmeagps with a valid checksum (pynmeagps)."""
    from pynmeagps import NMEAReader

    _, nmea, _ = _split(_stream("quiet-day", 5.0))
    ids = set()
    for raw in nmea:
        msg = NMEAReader.parse(raw, validate=1)  # validate=1 checks the checksum
        ids.add(msg.msgID)
    assert {"GGA", "RMC", "GSV", "GST"} <= ids


def test_stream_msm7_values_match_pyrtcm_decode() -> None:
    """pyrtcm's decoded GPS MSM7 pseudorange equals ours to the DF405 resolution (pyrtcm decode)."""
    from pyrtcm import RTCMReader

    sim = Simulator(build_scenario("quiet-day", duration_s=1.0))
    block = next(iter(sim.run()))[0]
    data = next(iter_stream(sim, 0, msm_level=7))[1]
    rtcm, _, _ = _split(data)
    msg = RTCMReader.parse(next(r for r in rtcm if RTCMReader.parse(r).identity == "1077"))
    k1c = 0  # slot of 1C in the GPS plan
    checked = 0
    sat_row = {int(getattr(msg, f"PRN_{j:02d}")): j for j in range(1, msg.NSat + 1)}
    for i in range(1, msg.NCell + 1):
        prn = int(getattr(msg, f"CELLPRN_{i:02d}"))
        if getattr(msg, f"CELLSIG_{i:02d}") != "1C":
            continue
        col = int(np.flatnonzero(block.sat == prn)[0])
        ours = block.pseudorange_m[0, col, k1c]
        j = sat_row[prn]
        rough = getattr(msg, f"DF397_{j:02d}") + getattr(msg, f"DF398_{j:02d}")
        theirs = (rough + getattr(msg, f"DF405_{i:02d}")) * C / 1000.0
        assert abs(theirs - ours) < 0.001  # DF405 LSB 2⁻²⁹ ms ≈ 0.6 mm
        checked += 1
    assert checked >= 4


def test_stream_decodes_in_our_stream_decoder() -> None:
    """Our StreamDecoder turns the stream back into epochs with the simulated pseudoranges."""
    sim = Simulator(build_scenario("quiet-day", duration_s=3.0))
    blocks = next(iter(sim.run()))
    dec = StreamDecoder(reference_time=sim.scenario.start)
    epochs = []
    for _, data in iter_stream(sim, 0, msm_level=7):
        epochs += [m for m in dec.feed(data) if hasattr(m, "pseudorange_m")]
    epochs += [m for m in dec.feed(b"") if hasattr(m, "pseudorange_m")]
    assert len(epochs) == 3
    ep = epochs[1]
    b = blocks[0]
    for cell in range(len(ep)):
        col = int(np.flatnonzero(b.sat == ep.sat[cell])[0])
        k = int(np.flatnonzero(b.code[col] == ep.sig[cell])[0])
        assert abs(ep.pseudorange_m[cell] - b.pseudorange_m[1, col, k]) < 0.001  # MSM7 DF405


def test_stream_msm4_glonass_channels_known_from_first_epoch() -> None:
    """With MSM4 (no channel field) the 1020s come first, so every GLONASS cell has a frequency."""
    import dataclasses

    sim = Simulator(build_scenario("quiet-day", duration_s=2.0))
    dec = StreamDecoder(reference_time=sim.scenario.start)
    epochs = []
    for _, data in iter_stream(sim, 0, msm_level=4):
        epochs += [m for m in dec.feed(data) if hasattr(m, "pseudorange_m")]
    glo = epochs[0].sat // 100 == 1
    assert glo.any()
    assert np.isfinite(epochs[0].freq_hz[glo]).all()  # GLONASS ICD §3.3.1.4 via 1020 channel
    block = next(iter(sim.run()))[0]
    from ionwarden.daemon.sim import epoch_of

    dataclasses.replace(epoch_of(block, 0, 41), _validate=True)  # dtypes and shapes hold


def test_stream_is_deterministic_per_seed() -> None:
    """Same scenario and seed give byte-identical streams; another seed changes them."""
    a = _stream("band-outage", 15.0, seed=7)
    b = _stream("band-outage", 15.0, seed=7)
    c = _stream("band-outage", 15.0, seed=8)
    assert a == b
    assert a != c


def test_all_outputs_deterministic(tmp_path: Path) -> None:
    """RINEX, truth, biases and gradients are byte-identical between two runs."""

    def once() -> list[str]:
        sim = Simulator(build_scenario("two-stations-60km", duration_s=10.0, seed=4))
        sinks = Sinks(
            streams=[io.BytesIO(), io.BytesIO()],
            rinex_obs=[io.StringIO(), io.StringIO()],
            rinex_nav=io.StringIO(),
            truth=io.StringIO(),
            biases=io.StringIO(),
            gradients=io.StringIO(),
        )
        run_to_sinks(sim, sinks)
        texts = [s.getvalue().hex() for s in sinks.streams if isinstance(s, io.BytesIO)]
        texts += [s.getvalue() for s in sinks.rinex_obs if isinstance(s, io.StringIO)]
        for s in (sinks.rinex_nav, sinks.truth, sinks.biases, sinks.gradients):
            assert isinstance(s, io.StringIO)
            texts.append(s.getvalue())
        return texts

    first, second = once(), once()
    assert first == second
    assert all(first)


def test_rinex_obs_loads_in_georinex_with_identical_values(tmp_path: Path) -> None:
    """georinex reads our RINEX 3.04 observation file with the values we wrote (georinex)."""
    import georinex

    sim = Simulator(build_scenario("quiet-day", duration_s=5.0))
    obs = tmp_path / "HARC.rnx"
    with obs.open("w") as f:
        run_to_sinks(sim, Sinks(rinex_obs=[f]))
    block = next(iter(Simulator(build_scenario("quiet-day", duration_s=5.0)).run()))[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = georinex.load(obs)
    assert ds.sizes["time"] == 5
    checked = 0
    for col, sat in enumerate(block.sat.tolist()):
        name = f"{'GREC'[sat // 100]}{sat % 100:02d}"
        for k, code in enumerate(block.code[col].tolist()):
            if not block.present[:, col, k].all():
                continue
            sig = f"{code // 32}{chr(65 + code % 32)}"
            got_c = ds[f"C{sig}"].sel(sv=name).values
            got_l = ds[f"L{sig}"].sel(sv=name).values
            np.testing.assert_allclose(
                got_c, np.round(block.pseudorange_m[:, col, k], 3), atol=6e-4
            )
            np.testing.assert_allclose(got_l, np.round(block.phase_cycles[:, col, k], 3), atol=6e-4)
            checked += 1
    assert checked > 50


def test_rinex_nav_loads_in_georinex_with_identical_values(tmp_path: Path) -> None:
    """georinex reads our RINEX 3.04 navigation file with our ephemeris values (georinex)."""
    import georinex

    sim = Simulator(build_scenario("quiet-day", duration_s=5.0))
    nav = tmp_path / "nav.rnx"
    with nav.open("w") as f:
        run_to_sinks(sim, Sinks(rinex_nav=f))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = georinex.load(nav)
    ephs = nav_ephemerides(sim)
    gps = [e for e in ephs if getattr(e, "sat", 0) // 100 == 0 and hasattr(e, "sqrt_a")]
    assert gps
    for e in gps[:5]:
        sv = f"G{e.sat % 100:02d}"
        got = ds["sqrtA"].sel(sv=sv).dropna("time").values
        assert np.any(np.abs(got - e.sqrt_a) < 1e-9 * e.sqrt_a)  # D19.12: 13 significant digits


def test_truth_csv_columns_and_rows() -> None:
    """Truth CSV has one row per epoch × satellite above the horizon, with every column."""
    from ionwarden.daemon.sim import TRUTH_COLUMNS

    sim = Simulator(build_scenario("storm-front", duration_s=3.0))
    sinks = Sinks(truth=io.StringIO(), biases=io.StringIO(), gradients=io.StringIO())
    run_to_sinks(sim, sinks)
    assert isinstance(sinks.truth, io.StringIO)
    lines = sinks.truth.getvalue().splitlines()
    assert lines[0].split(",") == list(TRUTH_COLUMNS)
    row = dict(zip(TRUTH_COLUMNS, lines[1].split(","), strict=True))
    assert float(row["el_deg"]) > 0.0
    assert float(row["stec_tecu"]) >= float(row["vtec_tecu"])  # mapping factor ≥ 1 (SCIENCE §6)
    assert isinstance(sinks.gradients, io.StringIO)
    grad = sinks.gradients.getvalue().splitlines()
    assert grad[0].startswith("week,tow_s,sat,base,rover")
    assert {g.split(",")[4] for g in grad[1:]} == {"HRV1", "HRV2", "HRV3"}


def _blocks(name: str, **kw: float) -> tuple[Simulator, list]:
    sim = Simulator(build_scenario(name, **kw))
    return sim, [b[0] for b in sim.run()]


def _dense(sim: Simulator, blocks: list, attr: str) -> np.ndarray:
    """(epochs, all satellites, K) array of a cell attribute (NaN / False where not computed)."""
    parts = []
    for b in blocks:
        v = getattr(b, attr)
        fill = False if v.dtype == bool else np.nan
        full = np.full((v.shape[0], sim.sats.shape[0], *v.shape[2:]), fill, dtype=v.dtype)
        full[:, b.geometry.cols] = v
        parts.append(full)
    return np.concatenate(parts)


def test_events_band_outage_drops_cn0_then_loses_band() -> None:
    """L2-band interference lowers GPS L2 / GLONASS G2 C/N0 by 20 dB, then removes them; L1 and
    BeiDou B1I ("2I", 1561.098 MHz per BDS-SIS-ICD-B1I §4.2.1) are untouched."""
    sim, blocks = _blocks("band-outage", duration_s=1800.0, rate_hz=0.1)
    cn0 = _dense(sim, blocks, "cn0_dbhz")
    f = np.nan_to_num(sim.signals.freq_hz)
    l2 = (f > 1215e6) & (f < 1254e6)  # GPS L2 1227.60 (IS-GPS-200), G2 1246+k·0.4375 (GLONASS ICD)
    l1 = np.abs(f - 1575.42e6) < 1.0  # GPS L1 / Galileo E1
    b1i = np.abs(f - 1561.098e6) < 1.0
    t = np.arange(cn0.shape[0]) * 10.0
    before = (t >= 300) & (t < 600)
    during = (t >= 700) & (t < 1200)
    lost = (t >= 1500) & (t < 1800)
    top = lambda m, sel: float(np.nanmax(cn0[m][:, sel]))  # noqa: E731
    # Weak L2 signals fall below the tracking threshold, so compare the strongest ones.
    assert 15.0 < top(before, l2) - top(during, l2) < 25.0
    assert abs(top(before, l1) - top(during, l1)) < 3.0
    assert abs(top(before, b1i) - top(during, b1i)) < 3.0
    assert not np.isfinite(cn0[lost][:, l2]).any()
    assert np.isfinite(cn0[lost][:, l1]).any()
    assert np.isfinite(cn0[lost][:, b1i]).any()


def test_events_slip_cycles_appear_in_phase() -> None:
    """A 2500-cycle slip on one band changes that ambiguity by 2500 and flags the epoch."""
    sim, blocks = _blocks("storm-front", duration_s=1560.0)
    ev = sim.slips[1]
    assert ev.cycles == 2500
    i = round(ev.t_s)
    amb = _dense(sim, blocks, "ambiguity_cycles")
    slipped = _dense(sim, blocks, "slipped")
    col = int(np.flatnonzero(sim.sats == ev.sat)[0])
    codes = [signal_code(x) for x in ev.signals]
    k = int(np.flatnonzero(np.isin(sim.signals.code[col], codes))[0])
    assert amb[i, col, k] - amb[i - 1, col, k] == 2500
    assert amb[i, col, 0] == amb[i - 1, col, 0]  # L1 untouched
    assert slipped[i, col, k]


def test_events_silent_slip_keeps_lock_time() -> None:
    """A silent slip (lock_reset=False) moves the ambiguity by one cycle but not the lock time."""
    sim, blocks = _blocks("storm-front", duration_s=3010.0, rate_hz=1.0)
    ev = sim.slips[2]
    assert not ev.lock_reset
    amb = _dense(sim, blocks, "ambiguity_cycles")
    lock = _dense(sim, blocks, "lock_time_s")
    col = int(np.flatnonzero(sim.sats == ev.sat)[0])
    i = round(ev.t_s)
    assert amb[i, col, 0] - amb[i - 1, col, 0] == 1
    assert lock[i, col, 0] == lock[i - 1, col, 0] + 1.0


def test_events_half_cycle_flag_and_restart_and_gap() -> None:
    """Half-cycle slip raises the flag; a restart empties epochs; a gap silences the stream."""
    sim, blocks = _blocks("scintillation", duration_s=1030.0)
    half = _dense(sim, blocks, "half_cycle")
    assert half[1005].any()
    assert not half[990].any()
    sim2 = Simulator(build_scenario("band-outage", duration_s=3140.0, rate_hz=0.5))
    pres, stream = [], []
    for bl in sim2.run():
        pres.append(bl[0].present.any(axis=(1, 2)))
        stream.append(bl[0].in_stream)
    p = np.concatenate(pres)
    s = np.concatenate(stream)
    t = np.arange(p.shape[0]) * 2.0
    assert not p[(t >= 2700) & (t < 2730)].any()
    assert p[(t >= 2740) & (t < 2800)].all()
    assert not s[(t >= 3100) & (t < 3130)].any()
    assert s[t < 3100].all()


def test_cli_simulate_writes_every_output(tmp_path: Path) -> None:
    """`ionwarden simulate` writes stream, RINEX and truth files and exits 0."""
    from ionwarden.daemon.cli import main

    out = tmp_path / "s.bin"
    rc = main(
        [
            "simulate", "--scenario", "two-stations-60km", "--duration", "3", "--out", str(out),
            "--rinex", str(tmp_path / "rnx"), "--truth", str(tmp_path / "truth.csv"),
        ]
    )  # fmt: skip
    assert rc == 0
    assert (tmp_path / "s-HARC.bin").stat().st_size > 1000
    assert (tmp_path / "s-HRV6.bin").stat().st_size > 1000
    assert (tmp_path / "rnx" / "HARC.rnx").exists()
    assert (tmp_path / "rnx" / "nav.rnx").exists()
    assert (tmp_path / "truth-gradients.csv").exists()


def test_cli_simulate_bad_station_is_one_line_error(capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden simulate --station X` names the bad station and exits 2."""
    from ionwarden.daemon.cli import main

    rc = main(["simulate", "--duration", "2", "--station", "NOPE", "--out", "-"])
    assert rc == 2
    assert "NOPE" in capsys.readouterr().err


def test_cli_simulate_help_lists_scenarios(capsys: pytest.CaptureFixture[str]) -> None:
    """`ionwarden simulate --help` documents every scenario."""
    from ionwarden.daemon.cli import main
    from ionwarden.daemon.sim import scenario_names

    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    text = capsys.readouterr().out
    for name in scenario_names():
        assert name in text


def test_biases_csv_lists_every_satellite_and_signal() -> None:
    """biases.csv covers every satellite × transmitted signal, with GPS T_GD-consistent L1/L2
    biases: b(2W) = γ·b(1C), γ = (1575.42/1227.60)² (IS-GPS-200 §20.3.3.3.3.2)."""
    sim = Simulator(build_scenario("quiet-day", duration_s=1.0))
    sinks = Sinks(biases=io.StringIO())
    run_to_sinks(sim, sinks)
    assert isinstance(sinks.biases, io.StringIO)
    rows = [r.split(",") for r in sinks.biases.getvalue().splitlines()[1:]]
    assert len(rows) == int(sim.signals.valid.sum())
    by = {(r[1], r[2]): float(r[4]) for r in rows}
    gamma = (1575.42 / 1227.60) ** 2
    for prn in range(1, 33):
        b1, b2 = by[(f"G{prn:02d}", "1C")], by[(f"G{prn:02d}", "2W")]
        assert b2 == pytest.approx(gamma * b1, abs=2e-4)


def test_geometry_free_stec_from_decoded_stream_matches_truth() -> None:
    """STEC = K·(P2 − P1) from the *decoded* MSM7 stream, minus the truth code biases, equals
    the truth STEC within the code noise (SCIENCE.md §3 K for GPS L1/L2 = 9.520 TECU/m; GPS L1
    1575.42, L2 1227.60 MHz per IS-GPS-200 §3.3.1.1)."""
    sim = Simulator(build_scenario("storm-front", duration_s=60.0, seed=9))
    blocks = [b[0] for b in sim.run()]
    dec = StreamDecoder(reference_time=sim.scenario.start)
    epochs = []
    for _, data in iter_stream(sim, 0, msm_level=7):
        epochs += [m for m in dec.feed(data) if hasattr(m, "pseudorange_m")]
    epochs += [m for m in dec.feed(b"") if hasattr(m, "pseudorange_m")]
    assert len(epochs) == 60
    b = blocks[0]
    k_tecu = 9.520  # SCIENCE.md §3 table, GPS L1/L2
    c1c, c2w = signal_code("1C"), signal_code("2W")
    res = []
    for e, ep in enumerate(epochs):
        for sat in np.unique(ep.sat[ep.sat // 100 == 0]).tolist():
            p1 = ep.pseudorange_m[(ep.sat == sat) & (ep.sig == c1c)]
            p2 = ep.pseudorange_m[(ep.sat == sat) & (ep.sig == c2w)]
            col = int(np.flatnonzero(b.sat == sat)[0])
            if p1.size != 1 or p2.size != 1 or b.geometry.el_rad[e, col] < np.radians(30.0):
                continue
            bias = (b.sat_bias_m[col, 1] + b.rx_bias_m[col, 1]) - (
                b.sat_bias_m[col, 0] + b.rx_bias_m[col, 0]
            )
            res.append(k_tecu * (p2[0] - p1[0] - bias) - b.geometry.stec_tecu[e, col])
    r = np.asarray(res)
    assert r.size > 200
    # Code σ about 0.3–0.5 m per signal above 30° plus multipath ≤ 0.8 m: ≲ 10 TECU per sample.
    assert abs(float(np.mean(r))) < 1.5
    assert float(np.std(r)) < 10.0


def test_stream_is_silent_during_restart_and_gap() -> None:
    """No byte at all (RTCM or NMEA) is sent while the receiver reboots or the stream is cut."""
    import dataclasses

    from ionwarden.daemon.sim import ReceiverRestart, StreamGap

    sc = dataclasses.replace(
        build_scenario("band-outage", duration_s=90.0, rate_hz=0.5),
        restarts=(ReceiverRestart(t_s=20.0, duration_s=30.0),),
        gaps=(StreamGap(start_s=60.0, end_s=80.0),),
    )
    silent = [t for t, data in iter_stream(Simulator(sc), 0) if not data]
    s = np.asarray(silent)
    restart = (s >= 20) & (s < 50)
    gap = (s >= 60) & (s < 80)
    assert restart.sum() == 15
    assert gap.sum() == 10
    assert (restart | gap).all()
