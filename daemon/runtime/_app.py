"""From the validated config to a running :class:`Daemon`: station configs, the per-station
factory (framer + estimator + alarms), the exporter snapshot, secrets.

Kept apart from the supervisor so the supervisor stays testable with stand-ins. Not re-exported by
the package ``__init__``: it imports ``outputs``, which itself imports the runtime's backoff.
"""

from __future__ import annotations

import datetime as dt
import math
import os
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

from ionwarden.daemon._records import fast_constructor
from ionwarden.daemon.alarms import StationAlarms
from ionwarden.daemon.errors import ConfigError
from ionwarden.daemon.estimator import StationPipeline
from ionwarden.daemon.ingest import FileSource, NtripSource, StdinSource, parse_source
from ionwarden.daemon.outputs import (
    DaemonSnapshot,
    Exporter,
    IngestFigures,
    QueueFigures,
    StationFigures,
)
from ionwarden.parsers import utc_to_gps

from ._checkpoint import fingerprint
from ._core import FramingCore
from ._stall import StallLimits
from ._station_records import StationConfig
from ._supervisor import Daemon, DaemonOptions, StationBundle

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping, Sequence

    from ionwarden.daemon.alarms import AlarmStatus
    from ionwarden.daemon.config import Settings, StationSettings
    from ionwarden.daemon.outputs import MqttPublisher

    from ._notify import SdNotifier
    from ._station_records import StationStatistics
    from ._supervisor import SnapshotSink

__all__ = [
    "build_daemon_snapshot",
    "daemon_from_settings",
    "exporter_from_settings",
    "make_factory",
    "ntrip_password",
    "options_from_settings",
]

#: File name, inside ``$CREDENTIALS_DIRECTORY``, of a station's NTRIP password (systemd
#: ``LoadCredential=ntrip_password.<station>:/etc/ionwarden/…``).
NTRIP_CREDENTIAL = "ntrip_password.{station}"


def ntrip_password(st: StationSettings, environ: Mapping[str, str] | None = None) -> str:
    """The station's NTRIP password: the config secret, else its systemd credential, else ""."""
    if st.ntrip_password is not None:
        return st.ntrip_password.get_secret_value()
    env = os.environ if environ is None else environ
    creds = env.get("CREDENTIALS_DIRECTORY", "")
    if creds:
        path = Path(creds) / NTRIP_CREDENTIAL.format(station=st.name)
        if path.is_file():
            return path.read_text().strip()
    return ""


def _station_config(i: int, st: StationSettings, settings: Settings, pw: str) -> StationConfig:
    rt = settings.runtime
    try:
        source = parse_source(st.source)
    except ConfigError as exc:
        raise ConfigError(f"stations[{i}].source", exc.reason) from exc
    if isinstance(source, NtripSource) and st.ntrip_gga_interval_s > 0:
        lat, lon, h = source.lat_deg, source.lon_deg, source.height_m
        if st.position_ecef_m is not None and (math.isnan(lat) or math.isnan(lon)):
            from ionwarden.daemon.geo import ecef_to_geodetic  # noqa: PLC0415 - only for NTRIP GGA

            la, lo, hh = ecef_to_geodetic(st.position_ecef_m)
            lat, lon, h = math.degrees(float(la)), math.degrees(float(lo)), float(hh)
        if math.isnan(lat) or math.isnan(lon):
            raise ConfigError(
                f"stations[{i}].ntrip_gga_interval_s",
                "a GGA upline needs a position: set position_ecef_m or lat/lon in the URL",
            )
        source = replace(
            source, gga_interval_s=st.ntrip_gga_interval_s, lat_deg=lat, lon_deg=lon, height_m=h
        )
    fp = fingerprint(st.model_dump_json(), fingerprint(pw), settings.estimator.model_dump_json())
    return StationConfig(
        name=st.name,
        source=source,
        password=pw,
        read_size=rt.read_size_bytes,
        queue_size=rt.queue_size,
        stall=StallLimits(
            no_data_s=rt.stall_no_data_s,
            no_frame_s=rt.stall_no_frame_s,
            no_epoch_s=rt.stall_no_epoch_s,
        ),
        backoff_initial_s=rt.backoff_initial_s,
        backoff_cap_s=max(rt.backoff_cap_s, rt.backoff_initial_s),
        fingerprint=fp,
    )


def options_from_settings(
    settings: Settings, *, environ: Mapping[str, str] | None = None
) -> DaemonOptions:
    """The daemon options for the enabled stations; ``$STATE_DIRECTORY`` wins over ``state_dir``."""
    env = os.environ if environ is None else environ
    rt = settings.runtime
    stations = tuple(
        _station_config(i, st, settings, ntrip_password(st, env))
        for i, st in enumerate(settings.stations)
        if st.enabled
    )
    state = env.get("STATE_DIRECTORY", "").split(":")[0]
    return DaemonOptions(
        stations=stations,
        state_dir=Path(state) if state else rt.state_dir,
        checkpoint_interval_s=rt.checkpoint_interval_s,
        checkpoint_max_age_s=rt.checkpoint_max_age_s,
        summary_interval_s=rt.summary_interval_s,
        batch_estimates=rt.batch_estimates,
        ack_priority_s=rt.ack_priority_ms / 1000.0,
        stop_timeout_s=rt.stop_timeout_s,
    )


def make_factory(
    settings: Settings, *, utc_now: Callable[[], dt.datetime] | None = None
) -> Callable[[StationConfig], StationBundle]:
    """Each station gets its own framer, estimator pipeline and alarms.

    Live sources give the decoder today's date as the reference for MSM times of week; replays
    leave it to the data (a capture may be years old).
    """
    by_name = {st.name: st for st in settings.stations}
    now = utc_now or (lambda: dt.datetime.now(dt.UTC))

    def build(cfg: StationConfig) -> StationBundle:
        st = by_name.get(cfg.name)
        live = not isinstance(cfg.source, (FileSource, StdinSource))

        def pipeline() -> StationPipeline:
            return StationPipeline(
                cfg.name,
                settings.estimator,
                position_ecef_m=st.position_ecef_m if st is not None else None,
                reference_time=utc_to_gps(now()) if live else None,
                defer=True,  # the runtime settles in a background step (StepLane)
                slack=True,  # and the fit and orbits ahead midway to the next epoch
            )

        return StationBundle(
            core=FramingCore(consumer=pipeline(), rebuild=pipeline, defer=True),
            produces_epochs=True,
            alarms=StationAlarms(cfg.name, settings.alarms),
        )

    return build


# The status tick builds these for every station each second: without the frozen ``__init__``'s
# ``object.__setattr__`` per field (every field given).
_new_station_figures = fast_constructor(StationFigures)
_new_ingest_figures = fast_constructor(IngestFigures)
_new_queue_figures = fast_constructor(QueueFigures)
_new_daemon_snapshot = fast_constructor(DaemonSnapshot)


def build_daemon_snapshot(
    daemon: Daemon,
    publisher: MqttPublisher | None,
    started_s: float,
    stats: Sequence[StationStatistics] | None = None,
) -> DaemonSnapshot:
    """What the exporter serves, from every stage's ``statistics()`` (the stations' own:
    ``stats`` when the caller took them already, else ``daemon.statistics()``)."""
    stations = []
    queues = []
    alarms: list[AlarmStatus] = []
    for st in daemon.statistics() if stats is None else stats:
        d = st.decoder
        stations.append(
            _new_station_figures(
                station=st.station,
                snapshot=st.latest,
                fix=st.latest_fix,
                ingest=_new_ingest_figures(
                    bytes_total=st.bytes_total,
                    frames_total=d.frames_total,
                    crc_errors_total=d.crc_errors_total + d.checksum_errors_total,
                    discarded_bytes_total=d.discarded_bytes_total,
                    reconnects_total=st.reconnects_total,
                    connected=st.connected,
                ),
                last_epoch_monotonic_s=st.last_epoch_monotonic_s,
                epochs_total=st.epochs_total,
                pipeline_errors_total=st.pipeline_errors_total,
                pipeline_resets_total=st.pipeline_resets_total,
            )
        )
        q = st.queue
        queues.append(
            _new_queue_figures(
                stage=q.stage,
                station=q.station,
                depth=q.depth,
                capacity=q.capacity,
                peak=q.peak,
                dropped_total=q.dropped_total,
            )
        )
    for a in daemon.station_alarms():
        alarms.extend(a.statuses())
    return _new_daemon_snapshot(
        stations=tuple(stations),
        alarms=tuple(alarms),
        queues=tuple(queues),
        mqtt=publisher.statistics() if publisher is not None else None,
        started_monotonic_s=started_s,
    )


def exporter_from_settings(settings: Settings, monotonic: Callable[[], float]) -> Exporter | None:
    """The Prometheus exporter of ``[prometheus]`` on a registry of its own (None when off)."""
    if not settings.prometheus.enabled:
        return None
    from prometheus_client import CollectorRegistry  # noqa: PLC0415

    return Exporter(settings.prometheus, registry=CollectorRegistry(), monotonic=monotonic)


def daemon_from_settings(
    settings: Settings,
    path: Path | None,
    options: DaemonOptions,
    *,
    notifier: SdNotifier,
    exporter: SnapshotSink | None,
    publisher: MqttPublisher | None,
    started_s: float,
    summary: Callable[[str], None] | None,
    only: Callable[[], frozenset[str]] | None = None,
) -> Daemon:
    """The daemon of ``settings`` (``options`` from :func:`options_from_settings`, adjusted by the
    caller). Stations (sources, estimator, alarms) follow a SIGHUP reload of ``path`` (none
    without it); MQTT and the exporter keep the settings they started with. ``only``: the names
    of the stations to run, asked again at each reload (a worker's share)."""

    def select(o: DaemonOptions) -> DaemonOptions:
        if only is None:
            return o
        names = only()
        return replace(o, stations=tuple(c for c in o.stations if c.name in names))

    current = {"factory": make_factory(settings)}

    def reload() -> DaemonOptions:
        from ionwarden.daemon.config import load_settings  # noqa: PLC0415

        assert path is not None
        fresh = load_settings(path)
        current["factory"] = make_factory(fresh)
        new = select(options_from_settings(fresh))
        return replace(new, summary_interval_s=options.summary_interval_s)

    return Daemon(
        select(options),
        factory=lambda cfg: current["factory"](cfg),  # noqa: PLW0108 - late-bound on reload
        notifier=notifier,
        exporter=exporter,
        publisher=publisher,
        build_snapshot=lambda d, stats: build_daemon_snapshot(d, publisher, started_s, stats),
        summary=summary if options.summary_interval_s else None,
        reload=reload if path is not None else None,
        utc_now=lambda: dt.datetime.now(dt.UTC),
    )
