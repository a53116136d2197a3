"""Prometheus/OpenMetrics exposition of the scope's health, one registry per application.

Counters kept here are incremented by the station as things happen; values that already
live elsewhere (frames captured by the scope, free disk, live viewers, time-lapse progress)
are read at scrape time by a collector, so they are never out of step.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable, Iterator
from typing import TYPE_CHECKING, Any

from prometheus_client import CollectorRegistry, Counter, Gauge
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import choose_encoder
from prometheus_client.registry import Collector

if TYPE_CHECKING:
    from daemon.station import Station


class Metrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.autofocus_runs = Counter(
            "phasewatch_autofocus_runs", "Autofocus runs", ["source"], registry=r
        )
        self.autofocus_failures = Counter(
            "phasewatch_autofocus_failures", "Autofocus runs that found no focus", ["source"], registry=r
        )
        self.hardware_errors = Counter(
            "phasewatch_hardware_errors", "Hardware faults (camera, controller) seen by the daemon", ["where"], registry=r
        )
        self.frames_saved = Counter(
            "phasewatch_timelapse_frames_saved", "Frames written and indexed by time-lapses", registry=r
        )
        self.alerts = Counter("phasewatch_alerts", "Alerts raised", ["level"], registry=r)
        self.auth_failures = Counter(
            "phasewatch_auth_failures", "Requests refused for a missing or wrong token", registry=r
        )
        self.last_focus_score = Gauge(
            "phasewatch_focus_score_last", "Focus score of the latest time-lapse frame or autofocus", registry=r
        )
        self.time_points_missed = Counter(
            "phasewatch_time_points_missed", "Time points recorded as missed (their slot closed before they could run)",
            registry=r,
        )
        self.offload_copied = Counter(
            "phasewatch_offload_frames_copied", "Frames copied to lab storage with their checksum read back", registry=r
        )
        self.offload_pruned = Counter(
            "phasewatch_offload_local_files_removed", "Local files of copied frames removed for space", registry=r
        )
        self.offload_failures = Counter(
            "phasewatch_offload_failures", "Copy passes to lab storage that failed (store unreachable, say)", registry=r
        )
        self.last_confluence = Gauge(
            "phasewatch_confluence_last", "Confluence (0..1) of the latest analysed time-lapse frame", registry=r
        )
        for source in ("api", "timelapse"):
            self.autofocus_runs.labels(source)
            self.autofocus_failures.labels(source)
        for where in ("api", "live_view", "timelapse"):
            self.hardware_errors.labels(where)
        for level in ("info", "warning", "error"):
            self.alerts.labels(level)

    def attach(self, station: Station) -> None:
        self.registry.register(_StationCollector(station))

    def render(self, accept: str | None) -> tuple[bytes, str]:
        encoder, content_type = choose_encoder(accept or "")
        return encoder(self.registry), content_type


class _StationCollector(Collector):
    def __init__(self, station: Station) -> None:
        self.station = station

    def describe(self) -> list[Metric]:
        return []  # values are read live; nothing fixed to describe ahead of a scrape

    def collect(self) -> Iterator[Metric]:
        st = self.station
        frames = CounterMetricFamily("phasewatch_frames_captured", "Frames exposed by the camera (all uses)")
        frames.add_metric([], st.scope.frames_captured)
        yield frames
        yield _gauge("phasewatch_disk_free_bytes", "Free space in the data folder's file system",
                     lambda: shutil.disk_usage(st.data_dir).free)
        yield _gauge("phasewatch_disk_size_bytes", "Size of the data folder's file system",
                     lambda: shutil.disk_usage(st.data_dir).total)
        yield _gauge("phasewatch_live_viewers", "Clients watching the live view", lambda: st.live.viewers)
        yield _gauge("phasewatch_live_fps", "Live view frames per second (last 3 s)", lambda: st.live.fps)
        progress = GaugeMetricFamily(
            "phasewatch_timelapse_progress_ratio", "Share of time points of the active time-lapse that are over",
            labels=["timelapse_id", "state"],
        )
        done = GaugeMetricFamily(
            "phasewatch_timelapse_time_points", "Time points of the active time-lapse by outcome",
            labels=["timelapse_id", "status"],
        )
        info: dict[str, Any] | None = st.progress_summary()
        if info is not None:
            tl = str(info["id"])
            progress.add_metric([tl, info["state"]], info["ratio"])
            for status, n in info["time_points"].items():
                done.add_metric([tl, status], n)
        yield progress
        yield done
        # One sample per well of the latest time-lapse's plan: the label set is bounded by the
        # vessel (at most the wells of one plate), never by time or by frame.
        confluence = GaugeMetricFamily(
            "phasewatch_well_confluence_ratio",
            "Confluence (0..1) of each well at the latest time point where it could be read",
            labels=["timelapse_id", "well"],
        )
        threshold = GaugeMetricFamily(
            "phasewatch_well_passaging_confluence_ratio",
            "Confluence (0..1) at which the culture watch calls for passaging each well",
            labels=["timelapse_id", "well"],
        )
        for w in st.well_confluence_summary():
            confluence.add_metric([str(w.timelapse_id), w.well], w.confluence)
            threshold.add_metric([str(w.timelapse_id), w.well], w.threshold)
        yield confluence
        yield threshold
        check = st.storage_check
        yield _gauge("phasewatch_storage_check_ratio",
                     "Share of stored frames the background check has read since start", lambda: check.ratio)
        yield _gauge("phasewatch_storage_check_frames", "Stored frames the background check is to read",
                     lambda: check.total)
        yield _gauge("phasewatch_storage_check_damaged_frames",
                     "Frames the background check found damaged or missing since start",
                     lambda: check.damaged + check.missing)


def _gauge(name: str, doc: str, read: Callable[[], float]) -> GaugeMetricFamily:
    g = GaugeMetricFamily(name, doc)
    try:
        g.add_metric([], float(read()))
    except OSError:
        pass  # a vanished data folder shows as a missing sample, not a failed scrape
    return g

