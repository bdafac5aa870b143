"""The Prometheus exporter: a custom collector over an immutable snapshot (STYLE rule 19).

The runtime swaps in a new :class:`DaemonSnapshot` with :meth:`Exporter.update`; the HTTP thread's
scrape reads whichever complete snapshot is current — no locks, no shared mutable state. Names
follow ``ionwarden_<subsystem>_<name>_<unit>``, counters end in ``_total``; every label set is
bounded (station and alarm names come from config, satellites from the fixed RINEX id space,
queues and buffer classes from code). The metric list is in docs/metrics.md.

Issue 8 (scrape ≤ 50 ms at 20 stations × 40 satellites): the families are plain
:class:`~._exposition.Family` lists, turned into prometheus_client :class:`Metric` objects only for
``registry.collect()``; the HTTP scrape (``_scrape``) writes them as text directly, with the same
bytes prometheus_client would write. ``bench/bench_exporter.py`` measures both paths.
"""

from __future__ import annotations

import contextlib
import math
import threading
import time
from typing import TYPE_CHECKING, Any

import numpy as np
from prometheus_client import Histogram
from prometheus_client.registry import Collector

from ionwarden.daemon.alarms import AlarmKind, AlarmState
from ionwarden.daemon.errors import OutputError
from ionwarden.parsers import MAX_SAT_ID, sat_name

from ._exposition import Family, LabelCache, render, to_metric
from ._model import DaemonSnapshot
from ._scrape import Scraper, serve

if TYPE_CHECKING:
    from collections.abc import Callable, Iterator
    from wsgiref.simple_server import WSGIServer

    import numpy.typing as npt
    from prometheus_client import CollectorRegistry
    from prometheus_client.core import Metric

    from ionwarden.daemon.config import PrometheusSettings

__all__ = ["Exporter", "SnapshotCollector"]

_SAT_NAMES = [sat_name(i) for i in range(MAX_SAT_ID)]
_NS = "ionwarden"
_SAT_COLUMNS = ("stec_tecu", "rot_tecu_per_min", "roti_tecu_per_min", "el_deg")
_STATION_FIGURES = (
    "vtec_tecu",
    "roti_max_tecu_per_min",
    "roti_median_tecu_per_min",
    "rot_max_abs_tecu_per_min",
    "gradient_mm_per_km",
    "gradient_azimuth_deg",
    "dual_freq_fraction",
    "receiver_bias_tecu",
)


def _g(name: str, doc: str, labels: tuple[str, ...] = ("station",)) -> Family:
    return Family(f"{_NS}_{name}", doc, "gauge", labels)


def _c(name: str, doc: str, labels: tuple[str, ...] = ("station",)) -> Family:
    return Family(f"{_NS}_{name}", doc, "counter", labels)


class SnapshotCollector(Collector):
    """Serves the current :class:`DaemonSnapshot`; ``monotonic`` is the runtime's clock.

    :meth:`collect` hands prometheus_client :class:`Metric` objects (``generate_latest`` and the
    tests); :meth:`render` writes the same families as exposition text directly (the scrape path,
    see ``_exposition``). Both come from one :meth:`families`.
    """

    def __init__(self, *, per_satellite: bool, monotonic: Callable[[], float]) -> None:
        self._snapshot = DaemonSnapshot()
        self._per_satellite = per_satellite
        self._monotonic = monotonic
        self._label_text = LabelCache()
        #: Per station: the satellite ids (bytes) of the last snapshot and their label tuples.
        self._sat_labels: dict[str, tuple[bytes, list[tuple[str, str]]]] = {}
        self._local = threading.local()  # .silent: collect() yields nothing (see silenced)

    def update(self, snapshot: DaemonSnapshot) -> None:
        self._snapshot = snapshot  # one reference store: atomic for the scrape thread

    def describe(self) -> Iterator[Metric]:
        return map(to_metric, self.families(DaemonSnapshot(), 0.0))

    def collect(self) -> Iterator[Metric]:
        if getattr(self._local, "silent", False):
            return iter(())
        return map(to_metric, self.families(self._snapshot, self._monotonic()))

    def render(self, *, openmetrics: bool = False) -> str:
        """The current snapshot's families as exposition text (0.0.4, or OpenMetrics without the
        closing ``# EOF``), as ``generate_latest`` would write them."""
        fams = self.families(self._snapshot, self._monotonic())
        return render(fams, self._label_text, openmetrics=openmetrics)

    @contextlib.contextmanager
    def silenced(self) -> Iterator[None]:
        """While inside, :meth:`collect` yields nothing in this thread: the scrape writes our
        families with :meth:`render` and collects only the registry's other families."""
        self._local.silent = True
        try:
            yield
        finally:
            self._local.silent = False

    def families(self, snap: DaemonSnapshot, now_s: float) -> list[Family]:
        """Every family of ``snap`` in exposition order, ages taken at ``now_s``."""
        fams = self._stations(snap, now_s)
        if self._per_satellite:
            fams += self._satellites(snap)
        fams += self._alarms(snap)
        fams += self._ingest(snap)
        fams += self._queues(snap)
        fams += self._mqtt(snap)
        return fams

    def _stations(self, snap: DaemonSnapshot, now_s: float) -> list[Family]:
        figs = [
            _g("station_vtec_tecu", "Station vertical TEC (TECU)."),
            _g("station_roti_max_tecu_per_minute", "Largest ROTI over satellites (TECU/min)."),
            _g("station_roti_median_tecu_per_minute", "Median ROTI over satellites (TECU/min)."),
            _g("station_rot_max_abs_tecu_per_minute", "Largest |ROT| over satellites (TECU/min)."),
            _g(
                "station_gradient_mm_per_km",
                "Station ionospheric gradient (mm of L1 delay per km).",
            ),
            _g("station_gradient_azimuth_degrees", "Direction of the station gradient (deg)."),
            _g(
                "station_dual_frequency_ratio", "Fraction of satellites with a dual-frequency pair."
            ),
            _g("station_receiver_bias_tecu", "Estimated receiver code bias (TECU)."),
        ]
        sats = _g("station_satellites", "Satellites with figures this epoch.")
        age = _g("station_last_epoch_age_seconds", "Time since the last valid epoch (s).")
        epochs = _c("station_epochs", "Valid epochs processed.")
        perr = _c("station_pipeline_errors", "Pipeline steps that failed and were contained.")
        preset = _c("station_pipeline_resets", "Pipeline resets after repeated failures.")
        fq = _g("station_fix_quality", "NMEA GGA fix quality indicator of the receiver.")
        hdop = _g("station_fix_hdop", "NMEA GGA horizontal dilution of precision.")
        sig = _g("station_fix_sigma_horizontal_meters", "NMEA GST horizontal 1-sigma (m).")
        for st in snap.stations:
            lv = (st.station,)
            epochs.add(lv, st.epochs_total)
            perr.add(lv, st.pipeline_errors_total)
            preset.add(lv, st.pipeline_resets_total)
            if st.last_epoch_monotonic_s is not None:
                age.add(lv, max(now_s - st.last_epoch_monotonic_s, 0.0))
            s = st.snapshot
            if s is not None:
                sats.add(lv, s.n_sats)
                for attr, fam in zip(_STATION_FIGURES, figs, strict=True):
                    fam.add(lv, getattr(s, attr))
            if st.fix is not None:
                fq.add(lv, st.fix.quality)
                hdop.add(lv, st.fix.hdop)
                sig.add(lv, math.hypot(st.fix.sigma_lat_m, st.fix.sigma_lon_m))
        return [*figs, sats, age, epochs, perr, preset, fq, hdop, sig]

    def _sat_label_tuples(self, station: str, sat: npt.NDArray[np.int16]) -> list[tuple[str, str]]:
        """(station, satellite name) per satellite, reused while the station's set is unchanged."""
        key = sat.tobytes()
        hit = self._sat_labels.get(station)
        if hit is not None and hit[0] == key:
            return hit[1]
        labels = [(station, _SAT_NAMES[i]) for i in sat.tolist()]
        self._sat_labels[station] = (key, labels)
        return labels

    def _satellites(self, snap: DaemonSnapshot) -> list[Family]:
        labels = ("station", "sat")
        cols = [
            _g("satellite_stec_tecu", "Slant TEC (TECU, levelled).", labels),
            _g("satellite_rot_tecu_per_minute", "ROT (TECU/min).", labels),
            _g("satellite_roti_tecu_per_minute", "ROTI (TECU/min).", labels),
            _g("satellite_elevation_degrees", "Satellite elevation (deg).", labels),
        ]
        for st in snap.stations:
            if st.snapshot is None:
                continue
            figs = st.snapshot.satellites
            keys = self._sat_label_tuples(st.station, figs.sat)
            for attr, fam in zip(_SAT_COLUMNS, cols, strict=True):
                values = np.asarray(getattr(figs, attr), dtype=np.float64)
                known = ~np.isnan(values)  # NaN (unknown) is left out, not exported as NaN
                if known.all():
                    fam.labels += keys
                    fam.values += values.tolist()
                else:
                    fam.labels += [keys[i] for i in np.flatnonzero(known).tolist()]
                    fam.values += values[known].tolist()
        return cols

    def _alarms(self, snap: DaemonSnapshot) -> list[Family]:
        active = _g(
            "alarm_active",
            "1 while the alarm is active (debounced), else 0.",
            ("station", "alarm", "severity"),
        )
        pending = _g(
            "alarm_pending", "1 while a state change waits for its hold time.", ("station", "alarm")
        )
        cn0 = _g(
            "station_cn0_drop_decibels",
            "Mean C/N0 of a band below the station's own elevation baseline (dB).",
            ("station", "band"),
        )
        for a in snap.alarms:
            active.add((a.station, a.alarm, a.severity.value), a.state is AlarmState.ACTIVE)
            pending.add((a.station, a.alarm), a.pending)
            if a.kind is AlarmKind.CN0_DROP and not math.isnan(a.value):
                cn0.add((a.station, a.band), a.value)
        return [active, pending, cn0]

    def _ingest(self, snap: DaemonSnapshot) -> list[Family]:
        fams = {
            "bytes_total": _c("ingest_bytes", "Bytes read from the source."),
            "frames_total": _c("ingest_frames", "Frames (RTCM messages, NMEA sentences) decoded."),
            "crc_errors_total": _c("ingest_crc_errors", "Frames rejected by CRC or checksum."),
            "discarded_bytes_total": _c(
                "ingest_discarded_bytes", "Bytes skipped while resynchronising."
            ),
            "reconnects_total": _c("ingest_reconnects", "Source reconnects."),
        }
        connected = _g("ingest_connected", "1 while the source is connected.")
        for st in snap.stations:
            lv = (st.station,)
            for attr, fam in fams.items():
                fam.add(lv, getattr(st.ingest, attr))
            connected.add(lv, st.ingest.connected)
        return [*fams.values(), connected]

    def _queues(self, snap: DaemonSnapshot) -> list[Family]:
        labels = ("stage", "station")
        depth = _g("queue_depth", "Items waiting in the queue.", labels)
        cap = _g("queue_capacity", "Bound of the queue.", labels)
        peak = _g("queue_peak", "Largest depth seen.", labels)
        dropped = _c("queue_dropped", "Items dropped on overflow.", labels)
        for q in snap.queues:
            lv = (q.stage, q.station)
            depth.add(lv, q.depth)
            cap.add(lv, q.capacity)
            peak.add(lv, q.peak)
            dropped.add(lv, q.dropped_total)
        return [depth, cap, peak, dropped]

    def _mqtt(self, snap: DaemonSnapshot) -> list[Family]:
        connected = _g("mqtt_connected", "1 while connected to the broker.", ())
        buffered = _g("mqtt_buffered_messages", "Messages waiting for the broker.", ("class",))
        dropped = _c("mqtt_dropped_messages", "Messages dropped from a full buffer.", ("class",))
        published = _c("mqtt_published_messages", "Messages acknowledged by the broker.", ())
        connects = _c("mqtt_connects", "Successful connects.", ())
        disconnects = _c("mqtt_disconnects", "Lost connections.", ())
        m = snap.mqtt
        if m is not None:
            connected.add((), m.connected)
            buffered.add(("alarm",), m.buffered_alarm)
            buffered.add(("epoch",), m.buffered_epoch)
            dropped.add(("alarm",), m.dropped_alarm_total)
            dropped.add(("epoch",), m.dropped_epoch_total)
            published.add((), m.published_total)
            connects.add((), m.connects_total)
            disconnects.add((), m.disconnects_total)
        return [connected, buffered, dropped, published, connects, disconnects]


class Exporter:
    """The collector, the epoch-latency histogram and the HTTP endpoint, on an injected registry.

    ``with exporter:`` binds ``settings.address:settings.port`` (port 0 picks a free one, see
    :attr:`port`) and shuts the server down on exit. Reusable, not re-entrant (STYLE rule 17).
    """

    def __init__(
        self,
        settings: PrometheusSettings,
        *,
        registry: CollectorRegistry,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        self._settings = settings
        self._collector = SnapshotCollector(
            per_satellite=settings.per_satellite, monotonic=monotonic
        )
        registry.register(self._collector)
        self._registry = registry
        self._latency = Histogram(
            f"{_NS}_estimator_epoch_processing_seconds",
            "Time from an epoch's last frame to its snapshot (s).",
            labelnames=("station",),
            buckets=settings.latency_buckets_s,
            registry=registry,
        )
        self._delivery = Histogram(
            f"{_NS}_mqtt_summary_delivery_seconds",
            "Time from the bytes completing an epoch to the broker's acknowledgement of its "
            "summary (s).",
            labelnames=("station",),
            buckets=settings.latency_buckets_s,
            registry=registry,
        )
        #: Each station's child of ``_latency`` / ``_delivery`` (``labels()`` takes a lock and
        #: builds a key on every call; the child is the same object each time: never removed).
        self._latency_of: dict[str, Any] = {}
        self._delivery_of: dict[str, Any] = {}
        self._scraper = Scraper(registry, self._collector)
        self._server: WSGIServer | None = None
        self._thread: threading.Thread | None = None

    @property
    def collector(self) -> SnapshotCollector:
        return self._collector

    @property
    def port(self) -> int:
        """The bound port (useful with port 0); 0 while not serving."""
        return 0 if self._server is None else int(self._server.server_port)

    def update(self, snapshot: DaemonSnapshot) -> None:
        """Serve ``snapshot`` from now on (sync, O(1))."""
        self._collector.update(snapshot)

    def exposition(self, accept: str = "") -> tuple[bytes, str]:
        """What a GET of /metrics with this ``Accept`` header is served (before any gzip): body
        and content type. Default: Prometheus text format 0.0.4."""
        return self._scraper.exposition(accept)

    def observe_epoch_latency(self, station: str, seconds: float) -> None:
        child = self._latency_of.get(station)
        if child is None:
            child = self._latency_of[station] = self._latency.labels(station=station)
        child.observe(seconds)

    def observe_summary_delivery(self, station: str, seconds: float) -> None:
        """Frame received → the broker's PUBACK of the epoch's summary (issue 8's latency)."""
        child = self._delivery_of.get(station)
        if child is None:
            child = self._delivery_of[station] = self._delivery.labels(station=station)
        child.observe(seconds)

    def start(self) -> None:
        if self._server is not None:
            raise RuntimeError("exporter is already serving (not re-entrant)")
        addr, port = self._settings.address, self._settings.port
        try:
            self._server, self._thread = serve(self._scraper.app, addr, port)
        except OSError as exc:
            raise OutputError(
                f"prometheus exporter cannot bind {addr}:{port}: {exc.strerror}"
            ) from exc

    def close(self) -> None:
        """Stop serving (idempotent)."""
        server, thread = self._server, self._thread
        self._server = self._thread = None
        if server is not None:
            server.shutdown()
            server.server_close()
        if thread is not None:
            thread.join()

    def __enter__(self) -> Exporter:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()
