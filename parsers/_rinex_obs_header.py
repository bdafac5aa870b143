"""RINEX 3 observation header: the typed value and the line-by-line builder.

Labels and column layouts follow RINEX 3.05 Table A2 ("GNSS observation data file – header section
description"); each label's handler cites its format string. Unknown labels are kept verbatim in
``other`` so nothing a user might need is lost.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import TYPE_CHECKING

from ._errors import ParseError
from ._rinex_time import civil_to_gps
from ._signals import sat_id

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping

    from ._gnsstime import GpsTime

__all__ = ["MAX_HEADER_LINES", "RinexObsHeader", "_ObsHeaderBuilder"]

#: Bound on header lines (including header records inside epoch-flag 3/4 events): real headers
#: hold well under 200 lines; past this the input is not a RINEX header (bounded memory, rule 5).
MAX_HEADER_LINES = 5000

#: Default time system of single-system files (RINEX 3.05 Table A2, TIME OF FIRST OBS note).
_DEFAULT_TIME_SYSTEM = {"R": "GLO", "E": "GAL", "C": "BDT", "J": "QZS", "I": "IRN"}


@dataclass(frozen=True, slots=True, kw_only=True)
class RinexObsHeader:
    """What a RINEX 3 observation header says about the file.

    ``obs_types`` maps a system letter to its observation codes in file order ("C1C", "L1C", …).
    ``glonass_channels`` maps a GLONASS satellite id (``sat_id("R", n)``) to its FDMA channel k.
    ``time_system`` is the system of every epoch tag in the file (GPS, GAL, BDT, GLO, QZS, IRN).
    """

    version: float
    file_type: str = "O"
    satellite_system: str = "M"
    program: str = ""
    run_by: str = ""
    date: str = ""
    marker_name: str = ""
    marker_number: str = ""
    marker_type: str = ""
    observer: str = ""
    agency: str = ""
    receiver_number: str = ""
    receiver_type: str = ""
    receiver_version: str = ""
    antenna_number: str = ""
    antenna_type: str = ""
    approx_position_m: tuple[float, float, float] | None = None
    antenna_delta_hen_m: tuple[float, float, float] = (0.0, 0.0, 0.0)
    obs_types: Mapping[str, tuple[str, ...]] = field(default_factory=lambda: MappingProxyType({}))
    interval_s: float | None = None
    time_of_first_obs: GpsTime | None = None
    time_system: str = "GPS"
    glonass_channels: Mapping[int, int] = field(default_factory=lambda: MappingProxyType({}))
    #: SYS / SCALE FACTOR: per system, observation code → divisor applied on reading (1 if absent).
    scale_factors: Mapping[str, Mapping[str, int]] = field(
        default_factory=lambda: MappingProxyType({})
    )
    signal_strength_unit: str = "DBHZ"
    leap_seconds: int | None = None
    comments: tuple[str, ...] = ()
    other: tuple[str, ...] = ()


def _floats(text: str, width: int, count: int) -> tuple[float, ...]:
    return tuple(float(text[i * width : (i + 1) * width]) for i in range(count))


class _ObsHeaderBuilder:
    """Accumulates header lines (also the ones inside epoch-flag 3/4 records) into a header."""

    def __init__(self) -> None:
        self.fields: dict[str, object] = {}
        self.obs_types: dict[str, list[str]] = {}
        self.glonass_channels: dict[int, int] = {}
        self.comments: list[str] = []
        self.other: list[str] = []
        self.scale: dict[str, dict[str, int]] = {}
        self._scale_sys = ""  # SYS / SCALE FACTOR record being continued
        self._scale_factor = 1
        self._scale_left = 0
        self.lines = 0
        self._obs_sys = ""  # system of the SYS / # / OBS TYPES record being continued
        self._obs_left = 0
        self._first_obs: tuple[int, int, int, int, int, float] | None = None

    def feed(self, line: str, line_no: int) -> bool:
        """Take one header line; True once END OF HEADER is seen."""
        label = line[60:80].strip()
        handler = _HANDLERS.get(label)
        self.lines += 1
        if self.lines > MAX_HEADER_LINES:
            raise ParseError(
                f"header longer than {MAX_HEADER_LINES} lines (no END OF HEADER?)",
                message_id="RINEX obs header",
                offset=line_no,
            )
        try:
            if label == "END OF HEADER":
                return True
            if handler is None:
                self.other.append(line.rstrip("\r\n"))
            else:
                handler(self, line)
        except (ValueError, IndexError, KeyError) as exc:
            raise ParseError(
                f"bad RINEX header record {label!r}: {exc}",
                message_id="RINEX obs header",
                offset=line_no,
            ) from exc
        return False

    # --- one method per label; formats from RINEX 3.05 Table A2 -----------------------------

    def _version(self, line: str) -> None:  # F9.2,11X,A1,19X,A1,19X
        self.fields["version"] = float(line[0:9])
        self.fields["file_type"] = line[20]
        self.fields["satellite_system"] = line[40].strip() or "G"

    def _pgm(self, line: str) -> None:  # A20,A20,A20
        self.fields.update(program=line[0:20].strip(), run_by=line[20:40].strip())
        self.fields["date"] = line[40:60].strip()

    def _marker_name(self, line: str) -> None:  # A60
        self.fields["marker_name"] = line[0:60].strip()

    def _marker_number(self, line: str) -> None:  # A20
        self.fields["marker_number"] = line[0:20].strip()

    def _marker_type(self, line: str) -> None:  # A20
        self.fields["marker_type"] = line[0:20].strip()

    def _observer(self, line: str) -> None:  # A20,A40
        self.fields.update(observer=line[0:20].strip(), agency=line[20:60].strip())

    def _receiver(self, line: str) -> None:  # 3A20
        self.fields.update(receiver_number=line[0:20].strip(), receiver_type=line[20:40].strip())
        self.fields["receiver_version"] = line[40:60].strip()

    def _antenna(self, line: str) -> None:  # 2A20
        self.fields.update(antenna_number=line[0:20].strip(), antenna_type=line[20:40].strip())

    def _position(self, line: str) -> None:  # 3F14.4
        self.fields["approx_position_m"] = _floats(line, 14, 3)

    def _delta(self, line: str) -> None:  # 3F14.4
        self.fields["antenna_delta_hen_m"] = _floats(line, 14, 3)

    def _obs(self, line: str) -> None:  # A1,2X,I3,13(1X,A3); continuation 6X,13(1X,A3)
        if line[0] != " ":
            self._obs_sys = line[0]
            self._obs_left = int(line[3:6])
            self.obs_types[self._obs_sys] = []
        elif not self._obs_sys:
            raise ValueError("continuation line without a system")
        codes = self.obs_types[self._obs_sys]
        for i in range(13):
            if self._obs_left == 0:
                break
            code = line[7 + 4 * i : 10 + 4 * i].strip()
            if len(code) != 3:
                raise ValueError(f"observation code {code!r}")
            codes.append(code)
            self._obs_left -= 1

    def _interval(self, line: str) -> None:  # F10.3
        self.fields["interval_s"] = float(line[0:10])

    def _first(self, line: str) -> None:  # 5I6,F13.7,5X,A3
        y, mo, d, h, mi = (int(line[6 * i : 6 * i + 6]) for i in range(5))
        self._first_obs = (y, mo, d, h, mi, float(line[30:43]))
        if line[48:51].strip():
            self.fields["time_system"] = line[48:51].strip()

    def _glonass_slots(self, line: str) -> None:  # I3,1X,8(A3,1X,I2,1X)
        for i in range(8):
            cell = line[4 + 7 * i : 11 + 7 * i]
            if not cell.strip():
                break
            self.glonass_channels[sat_id("R", int(cell[1:3]))] = int(cell[4:6])

    def _ss_unit(self, line: str) -> None:  # A20
        self.fields["signal_strength_unit"] = line[0:20].strip()

    def _leap(self, line: str) -> None:  # I6 (then optional future/week/day fields)
        self.fields["leap_seconds"] = int(line[0:6])

    def _scale(self, line: str) -> None:  # A1,1X,I4,2X,I2,12(1X,A3); continuation 10X,12(1X,A3)
        if line[0] != " ":
            self._scale_sys = line[0]
            self._scale_factor = int(line[2:6])
            self._scale_left = int(line[8:10] or 0)
            if self._scale_left == 0:  # 0 = every observation type of the system
                self.scale[self._scale_sys] = {"*": self._scale_factor}
                return
        elif not self._scale_sys:
            raise ValueError("continuation line without a system")
        for i in range(12):
            if self._scale_left == 0:
                break
            code = line[11 + 4 * i : 14 + 4 * i].strip()
            self.scale.setdefault(self._scale_sys, {})[code] = self._scale_factor
            self._scale_left -= 1

    def _comment(self, line: str) -> None:  # A60
        self.comments.append(line[0:60].rstrip())

    def build(self) -> RinexObsHeader:
        if "version" not in self.fields:
            raise ValueError("missing RINEX VERSION / TYPE")
        fields = dict(self.fields)
        if "time_system" not in fields:
            fields["time_system"] = _DEFAULT_TIME_SYSTEM.get(
                str(fields.get("satellite_system", "G")), "GPS"
            )
        if self._first_obs is not None:
            fields["time_of_first_obs"] = civil_to_gps(self._first_obs, str(fields["time_system"]))
        obs = {k: tuple(v) for k, v in self.obs_types.items()}
        return RinexObsHeader(
            obs_types=MappingProxyType(obs),
            glonass_channels=MappingProxyType(dict(self.glonass_channels)),
            scale_factors=MappingProxyType(
                {k: MappingProxyType(dict(v)) for k, v in self.scale.items()}
            ),
            comments=tuple(self.comments),
            other=tuple(self.other),
            **fields,  # type: ignore[arg-type]
        )


_HANDLERS: dict[str, Callable[[_ObsHeaderBuilder, str], None]] = {
    "RINEX VERSION / TYPE": _ObsHeaderBuilder._version,
    "PGM / RUN BY / DATE": _ObsHeaderBuilder._pgm,
    "MARKER NAME": _ObsHeaderBuilder._marker_name,
    "MARKER NUMBER": _ObsHeaderBuilder._marker_number,
    "MARKER TYPE": _ObsHeaderBuilder._marker_type,
    "OBSERVER / AGENCY": _ObsHeaderBuilder._observer,
    "REC # / TYPE / VERS": _ObsHeaderBuilder._receiver,
    "ANT # / TYPE": _ObsHeaderBuilder._antenna,
    "APPROX POSITION XYZ": _ObsHeaderBuilder._position,
    "ANTENNA: DELTA H/E/N": _ObsHeaderBuilder._delta,
    "SYS / # / OBS TYPES": _ObsHeaderBuilder._obs,
    "INTERVAL": _ObsHeaderBuilder._interval,
    "TIME OF FIRST OBS": _ObsHeaderBuilder._first,
    "GLONASS SLOT / FRQ #": _ObsHeaderBuilder._glonass_slots,
    "SIGNAL STRENGTH UNIT": _ObsHeaderBuilder._ss_unit,
    "LEAP SECONDS": _ObsHeaderBuilder._leap,
    "SYS / SCALE FACTOR": _ObsHeaderBuilder._scale,
    "COMMENT": _ObsHeaderBuilder._comment,
}
