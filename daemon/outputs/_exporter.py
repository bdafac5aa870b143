"""The Prometheus exporter: a custom collector over an immutable snapshot (STYLE rule 19).

The runtime swaps in a new :class:`DaemonSnapshot` with :meth:`Exporter.update`; the HTTP thread's
scrape reads whichever complete snapshot is current — no locks, no shared mutable state. Names
follow ``ionwarden_<subsystem>_<name>_<unit>``, counters end in ``_total``; every label set is
bounded (station and alarm names come from config, satellites from the fixed RINEX id space,
queues and buffer classes from code). The metric list is in docs/metrics.md.
"""

from __future__ import annotations

import math
import time
from typing import TYPE_CHECKING

import numpy as np
from prometheus_client import Histogram, start_http_server
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from ionwarden.daemon.alarms import AlarmKind, AlarmState
from ionwarden.daemon.errors import OutputError
from ionwarden.parsers import MAX_SAT_ID, sat_name

from ._model import DaemonSnapshot

if TYPE_CHECKING:
    import threading
    from collections.abc import Callable, Iterator
    from wsgiref.simple_server import WSGIServer

    from prometheus_client import CollectorRegistry

    from ionwarden.daemon.config import PrometheusSettings

__all__ = ["Exporter", "SnapshotCollector"]

_SAT_NAMES = [sat_name(i) for i in range(MAX_SAT_ID)]
_NS = "ionwarden"


def _g(name: str, doc: str, labels: tuple[str, ...] = ("station",)) -> GaugeMetricFamily:
    return GaugeMetricFamily(f"{_NS}_{name}", doc, labels=list(labels))


def _c(name: str, doc: str, labels: tuple[str, ...] = ("station",)) -> CounterMetricFamily:
    return CounterMetricFamily(f"{_NS}_{name}", doc, labels=list(labels))


class SnapshotCollector(Collector):
    """Serves the current :class:`DaemonSnapshot`; ``monotonic`` is the runtime's clock."""

    def __init__(self, *, per_satellite: bool, monotonic: Callable[[], float]) -> None:
        self._snapshot = DaemonSnapshot()
        self._per_satellite = per_satellite
        self._monotonic = monotonic

    def update(self, snapshot: DaemonSnapshot) -> None:
        self._snapshot = snapshot  # one reference store: atomic for the scrape thread

    def describe(self) -> Iterator[Metric]:
        yield from self._families(DaemonSnapshot(), 0.0)

    def collect(self) -> Iterator[Metric]:
        yield from self._families(self._snapshot, self._monotonic())

    def _families(self, snap: DaemonSnapshot, now_s: float) -> Iterator[Metric]:
        yield from self._stations(snap, now_s)
        if self._per_satellite:
            yield from self._satellites(snap)
        yield from self._alarms(snap)
        yield from self._ingest(snap)
        yield from self._queues(snap)
        yield from self._mqtt(snap)

    def _stations(self, snap: DaemonSnapshot, now_s: float) -> Iterator[Metric]:
        fams = {
            "vtec_tecu": _g("station_vtec_tecu", "Station vertical TEC (TECU)."),
            "roti_max_tecu_per_min": _g(
                "station_roti_max_tecu_per_minute", "Largest ROTI over satellites (TECU/min)."
            ),
            "roti_median_tecu_per_min": _g(
                "station_roti_median_tecu_per_minute", "Median ROTI over satellites (TECU/min)."
            ),
            "rot_max_abs_tecu_per_min": _g(
                "station_rot_max_abs_tecu_per_minute", "Largest |ROT| over satellites (TECU/min)."
            ),
            "gradient_mm_per_km": _g(
                "station_gradient_mm_per_km",
                "Station ionospheric gradient (mm of L1 delay per km).",
            ),
            "gradient_azimuth_deg": _g(
                "station_gradient_azimuth_degrees", "Direction of the station gradient (deg)."
            ),
            "dual_freq_fraction": _g(
                "station_dual_frequency_ratio", "Fraction of satellites with a dual-frequency pair."
            ),
            "receiver_bias_tecu": _g(
                "station_receiver_bias_tecu", "Estimated receiver code bias (TECU)."
            ),
        }
        sats = _g("station_satellites", "Satellites with figures this epoch.")
        age = _g("station_last_epoch_age_seconds", "Time since the last valid epoch (s).")
        epochs = _c("station_epochs", "Valid epochs processed.")
        perr = _c("station_pipeline_errors", "Pipeline steps that failed and were contained.")
        preset = _c("station_pipeline_resets", "Pipeline resets after repeated failures.")
        fq = _g("station_fix_quality", "NMEA GGA fix quality indicator of the receiver.")
        hdop = _g("station_fix_hdop", "NMEA GGA horizontal dilution of precision.")
        sig = _g("station_fix_sigma_horizontal_meters", "NMEA GST horizontal 1-sigma (m).")
        for st in snap.stations:
            lv = [st.station]
            epochs.add_metric(lv, st.epochs_total)
            perr.add_metric(lv, st.pipeline_errors_total)
            preset.add_metric(lv, st.pipeline_resets_total)
            if st.last_epoch_monotonic_s is not None:
                age.add_metric(lv, max(now_s - st.last_epoch_monotonic_s, 0.0))
            s = st.snapshot
            if s is not None:
                sats.add_metric(lv, s.n_sats)
                for attr, fam in fams.items():
                    fam.add_metric(lv, getattr(s, attr))
            if st.fix is not None:
                fq.add_metric(lv, st.fix.quality)
                hdop.add_metric(lv, st.fix.hdop)
                sig.add_metric(lv, math.hypot(st.fix.sigma_lat_m, st.fix.sigma_lon_m))
        yield from fams.values()
        yield from (sats, age, epochs, perr, preset, fq, hdop, sig)

    def _satellites(self, snap: DaemonSnapshot) -> Iterator[Metric]:
        labels = ("station", "sat")
        cols = {
            "stec_tecu": _g("satellite_stec_tecu", "Slant TEC (TECU, levelled).", labels),
            "rot_tecu_per_min": _g("satellite_rot_tecu_per_minute", "ROT (TECU/min).", labels),
            "roti_tecu_per_min": _g("satellite_roti_tecu_per_minute", "ROTI (TECU/min).", labels),
            "el_deg": _g("satellite_elevation_degrees", "Satellite elevation (deg).", labels),
        }
        for st in snap.stations:
            if st.snapshot is None:
                continue
            figs = st.snapshot.satellites
            names = [_SAT_NAMES[i] for i in figs.sat.tolist()]
            for attr, fam in cols.items():
                values = np.asarray(getattr(figs, attr), dtype=np.float64).tolist()
                for name, v in zip(names, values, strict=True):
                    if not math.isnan(v):  # NaN (unknown) is left out, not exported as NaN
                        fam.add_metric([st.station, name], v)
        yield from cols.values()

    def _alarms(self, snap: DaemonSnapshot) -> Iterator[Metric]:
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
            active.add_metric(
                [a.station, a.alarm, a.severity.value], float(a.state is AlarmState.ACTIVE)
            )
            pending.add_metric([a.station, a.alarm], float(a.pending))
            if a.kind is AlarmKind.CN0_DROP and not math.isnan(a.value):
                cn0.add_metric([a.station, a.band], a.value)
        yield from (active, pending, cn0)

    def _ingest(self, snap: DaemonSnapshot) -> Iterator[Metric]:
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
            lv = [st.station]
            for attr, fam in fams.items():
                fam.add_metric(lv, getattr(st.ingest, attr))
            connected.add_metric(lv, float(st.ingest.connected))
        yield from fams.values()
        yield connected

    def _queues(self, snap: DaemonSnapshot) -> Iterator[Metric]:
        labels = ("stage", "station")
        depth = _g("queue_depth", "Items waiting in the queue.", labels)
        cap = _g("queue_capacity", "Bound of the queue.", labels)
        peak = _g("queue_peak", "Largest depth seen.", labels)
        dropped = _c("queue_dropped", "Items dropped on overflow.", labels)
        for q in snap.queues:
            lv = [q.stage, q.station]
            depth.add_metric(lv, q.depth)
            cap.add_metric(lv, q.capacity)
            peak.add_metric(lv, q.peak)
            dropped.add_metric(lv, q.dropped_total)
        yield from (depth, cap, peak, dropped)

    def _mqtt(self, snap: DaemonSnapshot) -> Iterator[Metric]:
        connected = _g("mqtt_connected", "1 while connected to the broker.", ())
        buffered = _g("mqtt_buffered_messages", "Messages waiting for the broker.", ("class",))
        dropped = _c("mqtt_dropped_messages", "Messages dropped from a full buffer.", ("class",))
        published = _c("mqtt_published_messages", "Messages acknowledged by the broker.", ())
        connects = _c("mqtt_connects", "Successful connects.", ())
        disconnects = _c("mqtt_disconnects", "Lost connections.", ())
        m = snap.mqtt
        if m is not None:
            connected.add_metric([], float(m.connected))
            buffered.add_metric(["alarm"], m.buffered_alarm)
            buffered.add_metric(["epoch"], m.buffered_epoch)
            dropped.add_metric(["alarm"], m.dropped_alarm_total)
            dropped.add_metric(["epoch"], m.dropped_epoch_total)
            published.add_metric([], m.published_total)
            connects.add_metric([], m.connects_total)
            disconnects.add_metric([], m.disconnects_total)
        yield from (connected, buffered, dropped, published, connects, disconnects)


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

    def observe_epoch_latency(self, station: str, seconds: float) -> None:
        self._latency.labels(station=station).observe(seconds)

    def start(self) -> None:
        if self._server is not None:
            raise RuntimeError("exporter is already serving (not re-entrant)")
        addr, port = self._settings.address, self._settings.port
        try:
            self._server, self._thread = start_http_server(port, addr=addr, registry=self._registry)
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
