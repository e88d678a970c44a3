"""Service metrics for the stage's monitoring system: ``serve --metrics-port N`` exposes the
server's own telemetry in the Prometheus text format over HTTP (prometheus-client, the ``metrics``
extra; imported only when the flag is used).

Nothing is counted twice: a collector reads, at each scrape, the counters and latency histograms
that the server keeps for its telemetry (runtime/serve/telemetry.py), so a scrape and a ``tel.<stream>``
message of the same moment agree. Names follow Prometheus' naming practice
(https://prometheus.io/docs/practices/naming/): base units (seconds), counters end in ``_total``
(the library appends it), one ``stream`` label per stream, ``reason`` and ``stage`` labels.

The HTTP server binds loopback by default. A non-loopback ``metrics_host`` follows the rule of the
other binds (runtime/serve/config.py, runtime/trust/security.py): it needs ``allow_remote``, and since plain
HTTP has no authentication, ``insecure_no_auth`` too, and it logs a caution at start.
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from rigcast.runtime.errors import RigcastError
from rigcast.runtime.serve.telemetry import StreamTelemetry

log = logging.getLogger(__name__)

PREFIX = "rigcast"


class MetricsError(RigcastError, OSError):
    """The metrics endpoint cannot start: prometheus-client missing, or the port not bindable."""

    advice = "install the metrics extra (pip install 'rigcast[metrics]') or pick another port"


@dataclass(frozen=True)
class ServerView:
    """What the collector reads at each scrape, as callables so it always sees the live state:
    the streams' telemetry, the server-wide rejects by reason, and the uptime in seconds."""

    streams: Callable[[], Sequence[StreamTelemetry]]
    rejected: Callable[[], Mapping[str, int]]
    uptime_s: Callable[[], float]


def _prometheus() -> Any:
    try:
        import prometheus_client
    except ImportError:
        raise MetricsError("--metrics-port needs prometheus-client, which is not "
                           "installed") from None
    return prometheus_client


class TelemetryCollector:
    """A prometheus-client custom collector over the server's telemetry (read at scrape time)."""

    def __init__(self, view: ServerView) -> None:
        self.view = view

    def collect(self) -> Iterator[Any]:
        from prometheus_client.core import (
            CounterMetricFamily,
            GaugeMetricFamily,
            HistogramMetricFamily,
        )

        streams = list(self.view.streams())
        counters = {
            "frames_processed": ("frames solved and published", lambda t: t.processed),
            "frames_dropped": ("valid frames superseded by a newer one of the stream before "
                               "processing (docs/protocol.md §4)", lambda t: t.dropped),
            "frames_stale": ("frames not newer than the stream's last, discarded",
                             lambda t: t.stale),
            "frames_off_manifold": ("frames whose fit error exceeded the threshold",
                                    lambda t: t.off_manifold),
            "frames_clamped": ("frames with a control clamped to its bounds", lambda t: t.clamped),
            "frames_held": ("frames published with held or eased controls while off-manifold",
                            lambda t: t.held),
            "fit_skipped": ("fit errors not computed (time share, errors)",
                            lambda t: t.fit_skipped),
            "filter_resets": ("One Euro filter restarts after a gap", lambda t: t.filter_resets),
        }
        for name, (doc, get) in counters.items():
            family = CounterMetricFamily(f"{PREFIX}_{name}", doc, labels=["stream"])
            for t in streams:
                family.add_metric([t.stream], float(get(t)))
            yield family
        rejected = CounterMetricFamily(f"{PREFIX}_frames_rejected",
                                       "messages of a stream rejected, by reason",
                                       labels=["stream", "reason"])
        for t in streams:
            for reason, count in sorted(dict(t.rejected).items()):
                rejected.add_metric([t.stream, reason], float(count))
        yield rejected
        server_rejected = CounterMetricFamily(
            f"{PREFIX}_server_rejected", "every rejected message, with or without a stream, by "
            "reason", labels=["reason"])
        for reason, count in sorted(dict(self.view.rejected()).items()):
            server_rejected.add_metric([reason], float(count))
        yield server_rejected
        latency = HistogramMetricFamily(
            f"{PREFIX}_frame_latency_seconds", "per-stage latency of published frames, from "
            "receipt (stage total: receipt to publish)", labels=["stream", "stage"])
        for t in streams:
            for stage, hist in t.histograms.items():
                buckets, total_s = hist.cumulative()
                latency.add_metric([t.stream, stage], buckets, total_s)
        yield latency
        gauges = {
            "input_fps": ("frames received per second over the last 2 s",
                          lambda t, now: t.input_fps(now)),
            "fit_error_rms": ("the last fit RMS error, mesh units", lambda t, now: t.fit_rms.last()),
            "fit_error_threshold": ("the off-manifold threshold in force, mesh units, on the RMS "
                                    "(a fixed limit) or the worst vertex (the adaptive rule); "
                                    "NaN while the rule warms up",
                                    lambda t, now: math.nan if t.threshold is None else t.threshold),
        }
        now = time.time_ns()
        for name, (doc, read) in gauges.items():
            gauge = GaugeMetricFamily(f"{PREFIX}_{name}", doc, labels=["stream"])
            for t in streams:
                gauge.add_metric([t.stream], float(read(t, now)))
            yield gauge
        yield GaugeMetricFamily(f"{PREFIX}_streams", "streams the server holds",
                                value=float(len(streams)))
        yield GaugeMetricFamily(f"{PREFIX}_uptime_seconds", "seconds since the server started",
                                value=float(self.view.uptime_s()))


class MetricsEndpoint:
    """The HTTP endpoint of one server's metrics: started with :func:`start_metrics`, stopped
    with :meth:`stop` (idempotent)."""

    def __init__(self, httpd: Any, thread: threading.Thread) -> None:
        self._httpd = httpd
        self._thread = thread
        self.host = str(httpd.server_address[0])
        self.port = int(httpd.server_address[1])

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}/metrics"

    def stop(self) -> None:
        if self._httpd is None:
            return
        self._httpd.shutdown()
        self._httpd.server_close()
        self._thread.join(2.0)
        self._httpd = None


def start_metrics(view: ServerView, host: str, port: int, *, remote: bool) -> MetricsEndpoint:
    """Serve ``view`` as Prometheus metrics on http://host:port/metrics (port 0: any free port)
    in a daemon thread. MetricsError when prometheus-client is missing or the port is taken."""
    prom = _prometheus()
    registry = prom.CollectorRegistry(auto_describe=False)
    registry.register(TelemetryCollector(view))
    # The process' CPU, memory and open files, where the platform has /proc (skipped elsewhere).
    prom.ProcessCollector(registry=registry)
    try:
        httpd, thread = prom.start_http_server(port, addr=host, registry=registry)
    except OSError as exc:
        raise MetricsError(f"cannot bind the metrics endpoint to {host}:{port}: "
                           f"{exc.strerror or exc}") from None
    endpoint = MetricsEndpoint(httpd, thread)
    if remote:
        log.warning("INSECURE: metrics on %s are readable by anyone on the network (plain HTTP, "
                    "no authentication): stream ids, frame counts and latencies", endpoint.url)
    log.info("metrics: Prometheus text format on %s", endpoint.url)
    return endpoint
