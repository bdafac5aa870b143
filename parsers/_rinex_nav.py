"""Streaming RINEX navigation readers: RINEX 3.0x mixed/single-system and RINEX 2.11 GPS/GLONASS.

Records become :class:`KeplerEphemeris` (GPS, QZSS, Galileo, BeiDou) or :class:`GlonassEphemeris`
in SI units. Layouts:

* RINEX 3.05 Table A5/A6 (GPS), A7/A8 (Galileo), A9/A10 (GLONASS), A11/A12 (QZSS), A13/A14
  (BeiDou): first line ``A1,I2.2`` satellite, ``1X,I4,5(1X,I2.2)`` epoch, ``3D19.12``; broadcast
  orbit lines ``4X,4D19.12``. GLONASS has 3 orbit lines (4 from RINEX 3.05), SBAS 3, others 7.
* RINEX 2.11 Table A4 (GPS) / A11 (GLONASS): first line ``I2,5I3,F5.1,3D19.12``; orbit lines
  ``3X,4D19.12``; years have two digits.

Weeks (RINEX 3.05 Table A6/A8/A14 notes): the GPS and QZSS week in RINEX is continuous (not mod
1024); the Galileo week is already aligned to the GPS week; the BeiDou week is a BDT week, so the
GPS week is BDT week + 1356 (``_ephemeris`` contract). Exponents may be written ``D`` or ``E``.
SBAS and NavIC records are skipped and counted.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import TYPE_CHECKING

from ._ephemeris import GlonassEphemeris, KeplerEphemeris
from ._errors import ParseError
from ._rinex_open import open_rinex_text
from ._rinex_time import Civil, civil_tow_s, two_digit_year
from ._signals import sat_id

if TYPE_CHECKING:
    from collections.abc import Iterable, Iterator, Mapping
    from os import PathLike

__all__ = ["BDT_WEEK_OFFSET", "Ephemeris", "RinexNavHeader", "RinexNavParser", "iter_rinex_nav"]

Ephemeris = KeplerEphemeris | GlonassEphemeris
#: GPS week of the BDT epoch 2006-01-01 (BDS-SIS-ICD-B1I-3.0 §5.1.3): GPS week = BDT week + 1356.
BDT_WEEK_OFFSET = 1356
#: Orbit lines after the first record line, per system (RINEX 3.05 Tables A5–A16).
_ORBIT_LINES = {"G": 7, "E": 7, "C": 7, "J": 7, "I": 7, "R": 3, "S": 3}
_GLONASS_UTC_OFFSET_S = 10_800.0  # GLONASS time = UTC(SU) + 3 h (GLONASS ICD Ed. 5.1 §3.3.3)


@dataclass(frozen=True, slots=True, kw_only=True)
class RinexNavHeader:
    """Navigation header: Klobuchar/NeQuick/BDS ionosphere terms and leap seconds when present.

    ``ionospheric_corr`` maps the RINEX 3 correction type ("GPSA", "GPSB", "GAL", "BDSA", …) to its
    coefficients; RINEX 2 ``ION ALPHA``/``ION BETA`` appear as "GPSA"/"GPSB".
    """

    version: float
    file_type: str
    satellite_system: str
    ionospheric_corr: Mapping[str, tuple[float, ...]] = field(
        default_factory=lambda: MappingProxyType({})
    )
    time_system_corr: tuple[str, ...] = ()
    leap_seconds: int | None = None
    comments: tuple[str, ...] = ()

    @property
    def ion_alpha(self) -> tuple[float, ...] | None:
        return self.ionospheric_corr.get("GPSA")

    @property
    def ion_beta(self) -> tuple[float, ...] | None:
        return self.ionospheric_corr.get("GPSB")


def _num(text: str) -> float:
    """One D19.12 field; blank → NaN (RINEX: missing values are blank)."""
    s = text.strip()
    if not s:
        return math.nan
    return float(s.replace("D", "E").replace("d", "e"))


def _int(value: float, default: int = -1) -> int:
    return default if math.isnan(value) else round(value)


def _kepler(sys: str, prn: int, epoch: Civil, v: list[float]) -> KeplerEphemeris:
    """v[0:3] clock, v[3:] orbit lines 1–7 × 4 fields (RINEX 3.05 Table A6/A8/A12/A14 order)."""
    _wk, toc = civil_tow_s(epoch)  # seconds of week in the record's own time system
    o = v[3:]
    if sys == "C":  # BeiDou (Table A14): AODE, TGD1/TGD2, AODC, week in BDT
        week = _int(o[18]) + BDT_WEEK_OFFSET
        iode, iodc, tgd = _int(o[0]), _int(o[25]), (o[22], o[23])
        fit, tsys = math.nan, "BDT"
    elif sys == "E":  # Galileo (Table A8): IODnav, BGD E5a/E1 and E5b/E1, week aligned to GPS
        week = _int(o[18])
        iode, iodc, tgd = _int(o[0]), -1, (o[22], o[23])
        fit, tsys = math.nan, "GPS"
    else:  # GPS (Table A6) and QZSS (Table A12)
        week = _int(o[18])
        iode, iodc, tgd = _int(o[0]), _int(o[23]), (o[22], math.nan)
        fit, tsys = o[25], "GPS"
        if sys == "J" and not math.isnan(fit):  # QZSS: fit interval flag 0 → 2 h, 1 → > 2 h
            fit = 2.0 if fit == 0 else math.nan
    return KeplerEphemeris(
        sat=sat_id(sys, prn),
        week=week,
        toe_s=o[8],
        toc_s=toc,
        sqrt_a=o[7],
        e=o[5],
        i0=o[12],
        omega0=o[10],
        omega=o[14],
        m0=o[3],
        delta_n=o[2],
        idot=o[16],
        omega_dot=o[15],
        cuc=o[4],
        cus=o[6],
        crc=o[13],
        crs=o[1],
        cic=o[9],
        cis=o[11],
        af0=v[0],
        af1=v[1],
        af2=v[2],
        iode=iode,
        iodc=iodc,
        tgd_s=tgd,
        health=_int(o[21], 0),
        fit_interval_h=fit,
        accuracy_m=o[20],
        time_system=tsys,
        source="RINEX",
    )


def _glonass(prn: int, epoch: Civil, v: list[float]) -> GlonassEphemeris:
    """RINEX 3.05 Table A10 / RINEX 2.11 Table A11: epoch in UTC, −τ_n, γ_n, t_k; X/Y/Z in km."""
    y, mo, d, h, mi, sec = epoch
    moscow = _dt.datetime(y, mo, d, h, mi, tzinfo=_dt.UTC) + _dt.timedelta(
        seconds=sec + _GLONASS_UTC_OFFSET_S
    )
    tb = moscow.hour * 3600.0 + moscow.minute * 60.0 + moscow.second + moscow.microsecond * 1e-6
    n4 = (moscow.year - 1996) // 4 + 1  # four-year interval, 1 = 1996–1999 (GLONASS ICD §4.5)
    nt = (moscow.date() - _dt.date(1996 + 4 * (n4 - 1), 1, 1)).days + 1
    o = v[3:]
    return GlonassEphemeris(
        sat=sat_id("R", prn),
        channel=_int(o[7], 0),
        tb_s=tb,
        day_number=nt,
        four_year=n4,
        x_m=o[0] * 1e3,
        y_m=o[4] * 1e3,
        z_m=o[8] * 1e3,
        vx_mps=o[1] * 1e3,
        vy_mps=o[5] * 1e3,
        vz_mps=o[9] * 1e3,
        ax_mps2=o[2] * 1e3,
        ay_mps2=o[6] * 1e3,
        az_mps2=o[10] * 1e3,
        tau_n_s=-v[0],
        gamma_n=v[1],
        health=_int(o[3], 0),
        age_days=_int(o[11], 0),
        source="RINEX",
    )


class RinexNavParser:
    """Line-fed RINEX 2.11 / 3.0x navigation parser; ``feed_line("")`` marks end of input."""

    def __init__(self) -> None:
        self._line_no = 0
        self._in_header = True
        self._hdr: dict[str, object] = {}
        self._iono: dict[str, list[float]] = {}
        self._tsc: list[str] = []
        self._comments: list[str] = []
        self._header: RinexNavHeader | None = None
        self._rec: list[str] = []
        self._rec_line = 0
        self._need = 0
        self.skipped_records = 0

    @property
    def header(self) -> RinexNavHeader | None:
        return self._header

    def feed_lines(self, lines: Iterable[str]) -> list[Ephemeris]:
        out: list[Ephemeris] = []
        for line in lines:
            out.extend(self.feed_line(line))
        return out

    def feed_line(self, line: str) -> list[Ephemeris]:
        self._line_no += 1
        if not line:
            if self._in_header or self._rec:
                raise self._fail(
                    "end of input inside " + ("the header" if self._in_header else "a record")
                )
            return []
        if self._in_header:
            self._header_line(line)
            return []
        if not self._rec:
            if not line.strip():
                return []
            self._start(line)
        else:
            self._rec.append(line)
        if len(self._rec) <= self._need:
            return []
        rec, self._rec = self._rec, []
        eph = self._record(rec)
        return [] if eph is None else [eph]

    def _fail(self, reason: str, offset: int | None = None) -> ParseError:
        return ParseError(reason, message_id="RINEX nav", offset=offset or self._line_no)

    def _header_line(self, line: str) -> None:
        label = line[60:80].strip()
        body = line[:60]
        try:
            if label == "RINEX VERSION / TYPE":  # F9.2,11X,A1,19X,A1 (3.05 Table A4; 2.11 Table A3)
                self._hdr.update(
                    version=float(line[0:9]), file_type=line[20], system=line[40].strip()
                )
            elif label == "IONOSPHERIC CORR":  # A4,1X,4D12.4 (3.05 Table A4)
                key = body[0:4].strip()
                self._iono.setdefault(key, []).extend(
                    _num(body[5 + 12 * i : 17 + 12 * i]) for i in range(4)
                )
            elif label in ("ION ALPHA", "ION BETA"):  # 2X,4D12.4 (2.11 Table A3)
                key = "GPSA" if label == "ION ALPHA" else "GPSB"
                self._iono[key] = [_num(body[2 + 12 * i : 14 + 12 * i]) for i in range(4)]
            elif label in ("TIME SYSTEM CORR", "DELTA-UTC: A0,A1,T,W", "CORR TO SYSTEM TIME"):
                self._tsc.append(body.rstrip())
            elif label == "LEAP SECONDS":  # I6
                self._hdr["leap_seconds"] = int(body[0:6])
            elif label == "COMMENT":
                self._comments.append(body.rstrip())
            elif label == "END OF HEADER":
                self._end_header()
        except (ValueError, IndexError) as exc:
            raise self._fail(f"bad RINEX nav header record {label!r}: {exc}") from exc

    def _end_header(self) -> None:
        version = self._hdr.get("version")
        ftype = str(self._hdr.get("file_type", ""))
        if not isinstance(version, float) or not (2.0 <= version < 4.0):
            raise self._fail(f"unsupported RINEX navigation version {version}")
        if ftype not in ("N", "G"):
            raise self._fail(f"not a GPS/GLONASS/mixed navigation file (type {ftype!r})")
        system = str(self._hdr.get("system") or "")
        if version < 3.0:
            system = "R" if ftype == "G" else "G"
        self._header = RinexNavHeader(
            version=version,
            file_type=ftype,
            satellite_system=system or "G",
            ionospheric_corr=MappingProxyType({k: tuple(v) for k, v in self._iono.items()}),
            time_system_corr=tuple(self._tsc),
            leap_seconds=self._hdr.get("leap_seconds"),  # type: ignore[arg-type]
            comments=tuple(self._comments),
        )
        self._in_header = False

    def _start(self, line: str) -> None:
        h = self._header
        assert h is not None
        self._rec = [line]
        self._rec_line = self._line_no
        if h.version >= 3.0:
            sys = line[0]
            if sys not in _ORBIT_LINES:
                raise self._fail(f"bad satellite system {line[:3]!r} in a navigation record")
            need = _ORBIT_LINES[sys]
            self._need = 4 if sys == "R" and h.version >= 3.05 else need
        else:
            self._need = 3 if h.satellite_system == "R" else 7

    def _record(self, rec: list[str]) -> Ephemeris | None:
        h = self._header
        assert h is not None
        first = rec[0]
        try:
            if h.version >= 3.0:  # A1,I2.2,1X,I4,5(1X,I2.2),3D19.12
                sys, prn = first[0], int(first[1:3])
                epoch: Civil = (
                    int(first[4:8]),
                    int(first[9:11]),
                    int(first[12:14]),
                    int(first[15:17]),
                    int(first[18:20]),
                    float(first[21:23]),
                )
                v = [_num(first[23 + 19 * i : 42 + 19 * i]) for i in range(3)]
                start = 4
            else:  # I2,5I3,F5.1,3D19.12
                sys, prn = h.satellite_system, int(first[0:2])
                yy = two_digit_year(int(first[2:5]))
                epoch = (
                    yy,
                    int(first[5:8]),
                    int(first[8:11]),
                    int(first[11:14]),
                    int(first[14:17]),
                    float(first[17:22]),
                )
                v = [_num(first[22 + 19 * i : 41 + 19 * i]) for i in range(3)]
                start = 3
            for line in rec[1:]:
                v.extend(_num(line[start + 19 * i : start + 19 * (i + 1)]) for i in range(4))
            if sys in ("S", "I"):
                self.skipped_records += 1
                return None
            if sys == "R":
                return _glonass(prn, epoch, v)
            return _kepler(sys, prn, epoch, v)
        except (ValueError, IndexError, OverflowError) as exc:
            raise self._fail(f"bad navigation record: {exc}", self._rec_line) from exc


def iter_rinex_nav(
    path: str | PathLike[str], *, parser: RinexNavParser | None = None
) -> Iterator[Ephemeris]:
    """Yield the ephemerides of a RINEX 2.11/3.0x navigation file (plain, .gz, .bz2, .Z)."""
    p = parser if parser is not None else RinexNavParser()
    with open_rinex_text(path) as lines:
        for line in lines:
            yield from p.feed_line(line)
        p.feed_line("")
