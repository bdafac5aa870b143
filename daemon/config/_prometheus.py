"""The ``[prometheus]`` section: the metrics exporter."""

from __future__ import annotations

from pydantic import Field

from ._base import Section

__all__ = ["PrometheusSettings"]


class PrometheusSettings(Section):
    enabled: bool = True
    #: Loopback by default: exposing metrics beyond the host is an explicit choice.
    address: str = "127.0.0.1"
    port: int = Field(default=9731, ge=0, le=65535)
    per_satellite: bool = Field(
        default=True, description="Export per-satellite series (turn off for big deployments)."
    )
    #: Upper bucket bounds (s) of the epoch processing latency histogram (finer from 10 to 50 ms,
    #: where a daemon of many stations whose epochs arrive together lands: bench/bench_e2e.py).
    latency_buckets_s: tuple[float, ...] = (
        0.001,
        0.0025,
        0.005,
        0.01,
        0.015,
        0.02,
        0.025,
        0.035,
        0.05,
        0.1,
        0.25,
        0.5,
        1.0,
    )
