"""RINEX 3.04 writers for the simulator: observation files and mixed navigation files.

Pure formatting: every function returns text; the caller decides where it goes (no clock is read:
the PGM / RUN BY / DATE text comes from the header value). Layouts follow RINEX 3.04 Table A2/A3
(observation header/records) and Table A4–A14 (navigation header/records); the readers in
``_rinex_obs``/``_rinex_nav`` cite the same tables.

Lossy by design of the format: values are written with 3 decimals (F14.3) and ephemeris terms with
13 significant digits (D19.12). Doppler is written as −range_rate·f/c, so GLONASS FDMA cells without
a known channel (NaN frequency) get a blank Doppler. LLI is written only on phase observations
(bit 0 from ``lli``, bit 1 from ``half_cycle``); signal strength indicators are left blank.
"""

from __future__ import annotations

import datetime as _dt
import math
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
import numpy.typing as npt

from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._rinex_nav import BDT_WEEK_OFFSET
from ._rinex_time import civil_from_week, gps_to_civil
from ._signals import SYSTEMS, sat_name, signal_code

if TYPE_CHECKING:
    from collections.abc import Iterable, Mapping, Sequence

    from ._epoch import ObsEpoch
    from ._rinex_nav import Ephemeris
    from ._rinex_obs_header import RinexObsHeader

__all__ = [
    "TextSink",
    "format_nav_header",
    "format_nav_record",
    "format_obs_epoch",
    "format_obs_header",
    "write_rinex_nav",
    "write_rinex_obs",
]


class TextSink(Protocol):
    """Where the ``write_*`` helpers put text: any text file or ``io.StringIO`` (``IO[str]``)."""

    def write(self, s: str, /) -> int: ...


_C_MPS = 299_792_458.0  # IS-GPS-200 §20.3.4.3
_F14_MAX = 9_999_999_999.999  # largest magnitude F14.3 holds
_F14_MIN = -999_999_999.999


def _label(body: str, label: str) -> str:
    """One header line: 60 columns of content, then the label in columns 61–80."""
    if len(body) > 60:
        raise ValueError(f"header record {label!r} longer than 60 columns: {body!r}")
    return f"{body:<60}{label:<20}".rstrip() + "\n"


def format_obs_header(header: RinexObsHeader) -> str:
    """RINEX 3.04 observation header (Table A2) from a :class:`RinexObsHeader`."""
    h = header
    systems = "".join(s for s in SYSTEMS if s in h.obs_types)
    sys_char = systems if len(systems) == 1 else "M"
    out = [
        _label(f"{3.04:9.2f}{'':11}O{'':19}{sys_char}", "RINEX VERSION / TYPE"),
        _label(f"{h.program:<20.20}{h.run_by:<20.20}{h.date:<20.20}", "PGM / RUN BY / DATE"),
    ]
    out += [_label(c, "COMMENT") for c in h.comments]
    out.append(_label(h.marker_name[:60], "MARKER NAME"))
    if h.marker_number:
        out.append(_label(h.marker_number[:20], "MARKER NUMBER"))
    out.append(_label(h.marker_type[:20] or "GEODETIC", "MARKER TYPE"))
    out.append(_label(f"{h.observer:<20.20}{h.agency:<40.40}", "OBSERVER / AGENCY"))
    rec = f"{h.receiver_number:<20.20}{h.receiver_type:<20.20}{h.receiver_version:<20.20}"
    out.append(_label(rec, "REC # / TYPE / VERS"))
    out.append(_label(f"{h.antenna_number:<20.20}{h.antenna_type:<20.20}", "ANT # / TYPE"))
    pos = h.approx_position_m or (0.0, 0.0, 0.0)
    out.append(_label("".join(f"{v:14.4f}" for v in pos), "APPROX POSITION XYZ"))
    out.append(_label("".join(f"{v:14.4f}" for v in h.antenna_delta_hen_m), "ANTENNA: DELTA H/E/N"))
    for s in systems:  # A1,2X,I3,13(1X,A3), continuation 6X,13(1X,A3)
        codes = h.obs_types[s]
        for i in range(0, max(len(codes), 1), 13):
            head = f"{s}  {len(codes):3d}" if i == 0 else " " * 6
            out.append(
                _label(head + "".join(f" {c:3}" for c in codes[i : i + 13]), "SYS / # / OBS TYPES")
            )
    out.append(_label("DBHZ", "SIGNAL STRENGTH UNIT"))
    if h.interval_s is not None:
        out.append(_label(f"{h.interval_s:10.3f}", "INTERVAL"))
    if h.time_of_first_obs is not None:  # 5I6,F13.7,5X,A3
        y, mo, d, hh, mi, sec = gps_to_civil(h.time_of_first_obs, h.time_system)
        first = f"{y:6d}{mo:6d}{d:6d}{hh:6d}{mi:6d}{sec:13.7f}{'':5}{h.time_system:3}"
        out.append(_label(first, "TIME OF FIRST OBS"))
    for s in systems:  # A1,1X,A3,1X,F8.5: blank correction = none applied (Table A2)
        out += [_label(f"{s} {c}", "SYS / PHASE SHIFT") for c in h.obs_types[s] if c[0] == "L"]
    if "R" in systems or h.glonass_channels:  # I3,1X,8(A3,1X,I2,1X)
        items = sorted(h.glonass_channels.items())
        for i in range(0, max(len(items), 1), 8):
            head = f"{len(items):3d} " if i == 0 else " " * 4
            cells = "".join(f"{sat_name(sat)} {k:2d} " for sat, k in items[i : i + 8])
            out.append(_label(head + cells, "GLONASS SLOT / FRQ #"))
        out.append(_label(" C1C         C1P         C2C         C2P", "GLONASS COD/PHS/BIS"))
    if h.leap_seconds is not None:
        out.append(_label(f"{h.leap_seconds:6d}", "LEAP SECONDS"))
    out.append(_label("", "END OF HEADER"))
    return "".join(out)


def _obs_field(value: float, lli: int) -> str:
    if math.isnan(value):
        return " " * 16
    if not _F14_MIN <= value <= _F14_MAX:
        raise ValueError(f"observation {value!r} does not fit RINEX F14.3")
    return f"{value:14.3f}{lli if lli else ' '} "


def format_obs_epoch(
    epoch: ObsEpoch,
    obs_types: Mapping[str, Sequence[str]],
    *,
    time_system: str = "GPS",
    flag: int = 0,
) -> str:
    """One epoch (Table A3): the ``>`` record, then one line per satellite in cell order.

    Cells whose system has no observation types, or whose signal has no code of a kind, are not
    written (the header decides what the file carries).
    """
    lookup = {
        (int(s), int(g)): k for k, (s, g) in enumerate(zip(epoch.sat, epoch.sig, strict=True))
    }
    plan = {
        s: [(c[0], signal_code(c[1:3])) for c in codes] for s, codes in obs_types.items()
    }  # per system: (kind, packed signal) of each column
    doppler = -epoch.range_rate_mps * epoch.freq_hz / _C_MPS
    lli_all = (epoch.lli & 1) | (epoch.half_cycle.astype(np.uint8) << 1)
    columns: dict[str, npt.NDArray[Any]] = {
        "C": epoch.pseudorange_m,
        "L": epoch.phase_cycles,
        "D": doppler,
        "S": epoch.cn0_dbhz,
    }
    lines = []
    for sat in dict.fromkeys(epoch.sat.tolist()):  # satellites in the order of the cells
        name = sat_name(sat)
        cols = plan.get(name[0])
        if cols is None:
            continue
        parts = [name]
        for kind, sig in cols:
            k = lookup.get((sat, sig))
            arr = columns.get(kind)
            if k is None or arr is None:
                parts.append(" " * 16)
                continue
            parts.append(_obs_field(float(arr[k]), int(lli_all[k]) if kind == "L" else 0))
        lines.append("".join(parts).rstrip() + "\n")
    y, mo, d, h, mi, sec = gps_to_civil(epoch.time, time_system)
    head = f"> {y:4d} {mo:02d} {d:02d} {h:02d} {mi:02d}{sec:11.7f}  {flag:1d}{len(lines):3d}\n"
    return head + "".join(lines)


def write_rinex_obs(stream: TextSink, header: RinexObsHeader, epochs: Iterable[ObsEpoch]) -> int:
    """Write a whole observation file to ``stream``; returns the number of epochs written."""
    stream.write(format_obs_header(header))
    n = 0
    for epoch in epochs:
        stream.write(format_obs_epoch(epoch, header.obs_types, time_system=header.time_system))
        n += 1
    return n


# --- navigation -----------------------------------------------------------------------------------


def _d19(value: float) -> str:
    """D19.12 (written with E, as RINEX 3 allows); NaN → blank (missing)."""
    return " " * 19 if math.isnan(value) else f"{value:19.12E}"


def format_nav_header(
    *,
    ionospheric_corr: Mapping[str, Sequence[float]] | None = None,
    leap_seconds: int | None = None,
    program: str = "ionwarden",
    run_by: str = "",
    date: str = "",
) -> str:
    """RINEX 3.04 mixed navigation header (Table A4)."""
    out = [
        _label(f"{3.04:9.2f}{'':11}N: GNSS NAV DATA    M: MIXED", "RINEX VERSION / TYPE"),
        _label(f"{program:<20.20}{run_by:<20.20}{date:<20.20}", "PGM / RUN BY / DATE"),
    ]
    for key, values in (ionospheric_corr or {}).items():  # A4,1X,4D12.4
        out.append(_label(f"{key:<4} " + "".join(f"{v:12.4E}" for v in values), "IONOSPHERIC CORR"))
    if leap_seconds is not None:
        out.append(_label(f"{leap_seconds:6d}", "LEAP SECONDS"))
    out.append(_label("", "END OF HEADER"))
    return "".join(out)


def _record(
    name: str,
    civil: tuple[int, int, int, int, int, float],
    clock: Sequence[float],
    orbit: Sequence[float],
) -> str:
    y, mo, d, h, mi, sec = civil
    lines = [
        f"{name} {y:4d} {mo:02d} {d:02d} {h:02d} {mi:02d} {round(sec):02d}"
        + "".join(_d19(v) for v in clock)
    ]
    lines += ["    " + "".join(_d19(v) for v in orbit[i : i + 4]) for i in range(0, len(orbit), 4)]
    return "\n".join(line.rstrip() for line in lines) + "\n"


def _kepler_record(e: KeplerEphemeris) -> str:
    sys = sat_name(e.sat)[0]
    toc = e.toc_s  # toc in the week nearest toe (a clock epoch may sit across the week boundary)
    week = e.week
    if toc - e.toe_s > 302_400.0:
        week -= 1
    elif e.toe_s - toc > 302_400.0:
        week += 1
    civil = civil_from_week(week, toc)
    no_tx = 0.9999e9  # "transmission time unknown" (RINEX 3.04 Table A6 note)
    if sys == "C":  # Table A14
        line5 = [e.idot, 0.0, float(e.week - BDT_WEEK_OFFSET), 0.0]
        line6 = [e.accuracy_m, float(e.health), e.tgd_s[0], e.tgd_s[1]]
        line7 = [no_tx, float(e.iodc)]
    elif sys == "E":  # Table A8 (data sources unknown here: 0)
        line5 = [e.idot, 0.0, float(e.week), 0.0]
        line6 = [e.accuracy_m, float(e.health), e.tgd_s[0], e.tgd_s[1]]
        line7 = [no_tx]
    else:  # GPS Table A6, QZSS Table A12
        fit = e.fit_interval_h
        if sys == "J":
            fit = 0.0 if fit == 2.0 else 1.0
        line5 = [e.idot, 0.0, float(e.week), 0.0]
        line6 = [e.accuracy_m, float(e.health), e.tgd_s[0], float(e.iodc)]
        line7 = [no_tx, 0.0 if math.isnan(fit) else fit]
    orbit = [
        float(e.iode), e.crs, e.delta_n, e.m0,
        e.cuc, e.e, e.cus, e.sqrt_a,
        e.toe_s, e.cic, e.omega0, e.cis,
        e.i0, e.crc, e.omega, e.omega_dot,
        *line5, *line6, *line7,
    ]  # fmt: skip
    return _record(sat_name(e.sat), civil, (e.af0, e.af1, e.af2), orbit)


def _glonass_record(e: GlonassEphemeris) -> str:
    if e.day_number < 1 or e.four_year < 1:
        raise ValueError(
            f"{sat_name(e.sat)}: GLONASS ephemeris needs day_number and four_year to be written"
        )
    moscow = _dt.datetime(1996 + 4 * (e.four_year - 1), 1, 1, tzinfo=_dt.UTC) + _dt.timedelta(
        days=e.day_number - 1, seconds=e.tb_s
    )
    utc = moscow - _dt.timedelta(hours=3)  # GLONASS time = UTC(SU) + 3 h (ICD §3.3.3)
    civil = (
        utc.year,
        utc.month,
        utc.day,
        utc.hour,
        utc.minute,
        utc.second + utc.microsecond * 1e-6,
    )
    # t_k is not carried by GlonassEphemeris: the UTC second of week of the epoch stands in for it.
    tk = (utc.weekday() + 1) % 7 * 86_400.0 + utc.hour * 3600.0 + utc.minute * 60.0 + utc.second
    orbit = [
        e.x_m / 1e3, e.vx_mps / 1e3, e.ax_mps2 / 1e3, float(e.health),
        e.y_m / 1e3, e.vy_mps / 1e3, e.ay_mps2 / 1e3, float(e.channel),
        e.z_m / 1e3, e.vz_mps / 1e3, e.az_mps2 / 1e3, float(e.age_days),
    ]  # fmt: skip
    return _record(sat_name(e.sat), civil, (-e.tau_n_s, e.gamma_n, tk), orbit)


def format_nav_record(eph: Ephemeris) -> str:
    """One RINEX 3.04 navigation record (GPS/QZSS/Galileo/BeiDou Kepler, or GLONASS)."""
    if isinstance(eph, GlonassEphemeris):
        return _glonass_record(eph)
    return _kepler_record(eph)


def write_rinex_nav(
    stream: TextSink,
    ephemerides: Iterable[Ephemeris],
    *,
    ionospheric_corr: Mapping[str, Sequence[float]] | None = None,
    leap_seconds: int | None = None,
    date: str = "",
) -> int:
    """Write a whole mixed navigation file to ``stream``; returns the number of records."""
    stream.write(
        format_nav_header(ionospheric_corr=ionospheric_corr, leap_seconds=leap_seconds, date=date)
    )
    n = 0
    for eph in ephemerides:
        stream.write(format_nav_record(eph))
        n += 1
    return n
