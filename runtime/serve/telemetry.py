"""Per-stream telemetry: sliding-window latency percentiles, fps, counters, fit error, pose.

The percentiles are linear-interpolated order statistics (numpy's default ``linear`` method,
Hyndman & Fan 1996 definition 7) over the last ``window`` samples. The fast path keeps a ring
buffer and selects only the order statistics it needs with ``np.partition``; its naive twin sorts
the full history with ``np.percentile``, and the tests check they agree.
"""

from __future__ import annotations

import bisect
import logging
import math
import time
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from rigcast.runtime.messaging.messages import FitErrorStats, Heartbeat, LatencyStats, ServerStats, Telemetry
from rigcast.runtime.messaging.messages import number_or_none as _f
from rigcast.runtime.messaging.timecode import Timecode
from rigcast.runtime.solve.head_pose import HeadPose

log = logging.getLogger(__name__)

STAGES = ("decode", "align", "infer", "filter", "publish", "total")
QUANTILES = (50.0, 95.0, 99.0)
# Latency histogram bucket bounds in seconds: powers of two from 0.25 ms, with the frame budgets at
# 120, 60, 30 and 15 fps among them (8.3, 16.7, 33.3, 66.7 ms), so "over budget" reads off a bucket.
LATENCY_BUCKETS_S = (0.00025, 0.0005, 0.001, 0.002, 0.004, 0.0083, 0.0167, 0.0333, 0.0667, 0.125,
                     0.25, 0.5, 1.0)


def percentiles_fast(values: np.ndarray, qs: Sequence[float] = QUANTILES) -> np.ndarray:
    """values (n,) -> (len(qs),) float64 linear-interpolated percentiles; n >= 1.

    Same definition as ``np.percentile(values, qs)``: position p = q/100 * (n-1), value
    x[floor p] + frac(p) * (x[ceil p] - x[floor p]) of the sorted data, via partial selection.
    """
    n = values.shape[0]
    pos = np.asarray(qs, dtype=np.float64) / 100.0 * (n - 1)
    lo = np.floor(pos).astype(np.intp)
    hi = np.minimum(lo + 1, n - 1)
    part = np.partition(values, np.unique(np.concatenate([lo, hi])))
    a = part[lo].astype(np.float64)
    b = part[hi].astype(np.float64)
    out: np.ndarray = a + (pos - lo) * (b - a)
    return out


def percentiles_naive(history: Sequence[float], window: int,
                      qs: Sequence[float] = QUANTILES) -> np.ndarray:
    """Twin of the ring-buffer path: np.percentile over the last ``window`` of the full history."""
    return np.percentile(np.asarray(list(history)[-window:], dtype=np.float64), qs)


class RingWindow:
    """The last ``size`` samples of one quantity, in a pre-allocated buffer (no growth)."""

    def __init__(self, size: int, dtype: type = np.int64) -> None:
        self.buf: np.ndarray = np.zeros(size, dtype=dtype)
        self.size = size
        self.count = 0

    def push(self, value: float) -> None:
        self.buf[self.count % self.size] = value
        self.count += 1

    def __len__(self) -> int:
        return min(self.count, self.size)

    def values(self) -> np.ndarray:
        """The samples held (n,), in no particular order."""
        return self.buf[: len(self)]

    def last(self) -> float:
        return float(self.buf[(self.count - 1) % self.size]) if self.count else math.nan

    def percentiles(self, qs: Sequence[float] = QUANTILES) -> np.ndarray:
        if not self.count:
            return np.full(len(qs), np.nan)
        return percentiles_fast(self.values().copy(), qs)

    def mean(self) -> float:
        return float(self.values().mean()) if self.count else math.nan


class LatencyHistogram:
    """Counts of durations per bucket since start, for the Prometheus histograms
    (runtime/serve/service_metrics.py). A duration d falls in the first bucket whose bound b has
    d <= b (Prometheus' ``le``), else in the overflow bucket; :func:`histogram_naive` is the twin."""

    def __init__(self, bounds_s: Sequence[float] = LATENCY_BUCKETS_S) -> None:
        self.bounds_s = tuple(float(b) for b in bounds_s)
        self._bounds_ns = [b * 1e9 for b in self.bounds_s]
        self.counts = [0] * (len(self.bounds_s) + 1)
        self.sum_ns = 0

    def observe(self, duration_ns: int) -> None:
        self.counts[bisect.bisect_left(self._bounds_ns, duration_ns)] += 1
        self.sum_ns += duration_ns

    def cumulative(self) -> tuple[list[tuple[str, float]], float]:
        """([(le, count of durations <= le), ..., ("+Inf", all)], sum in seconds)."""
        counts = list(self.counts)  # one copy: the server thread may add meanwhile
        running, out = 0, []
        for bound, count in zip((*self.bounds_s, math.inf), counts, strict=True):
            running += count
            out.append(("+Inf" if math.isinf(bound) else repr(bound), float(running)))
        return out, self.sum_ns / 1e9


def histogram_naive(durations_ns: Sequence[int], bounds_s: Sequence[float]) -> list[float]:
    """Twin of LatencyHistogram: cumulative counts of durations <= each bound, then all."""
    d = np.asarray(durations_ns, dtype=np.float64)
    return [float((d <= b * 1e9).sum()) for b in bounds_s] + [float(d.shape[0])]


class StreamTelemetry:
    """Counters and windows for one stream, turned into a typed message by :meth:`snapshot`."""

    def __init__(self, stream: str, window: int) -> None:
        self.stream = stream
        self.window = window
        self.stages = {name: RingWindow(window) for name in STAGES}
        self.histograms = {name: LatencyHistogram() for name in STAGES}
        self.arrivals = RingWindow(256)
        self.fit_rms = RingWindow(window, np.float64)
        self.fit_max = RingWindow(window, np.float64)
        self.processed = 0
        self.dropped = 0
        self.stale = 0
        self.rejected: Counter[str] = Counter()
        self.off_manifold = 0
        self.last_off_manifold_frame: int | None = None
        self.last_fit_frame: int | None = None
        self.fit_skipped = 0
        self.clamped = 0
        self.held = 0  # frames published with held or eased controls (FLAG_HELD)
        self.filter_resets = 0
        self.last_frame: int | None = None
        self.pose: HeadPose | None = None
        self.timecode: Timecode | None = None  # the last processed frame's, when it had one
        self.threshold: float | None = None  # the off-manifold threshold in force
        self.threshold_on = "rms"  # "rms" (a fixed limit) or "max" (the adaptive rule)
        self.bundle_quality: dict[str, Any] | None = None  # the build's self-check verdict
        self.stabilise_rms = math.nan
        self.bundle = ""

    def arrival(self, t_recv_ns: int) -> None:
        self.arrivals.push(t_recv_ns)

    def record(self, stage_ns: Sequence[int], frame: int) -> None:
        """stage_ns: durations in STAGES order (ns), total last."""
        for ring, hist, value in zip(self.stages.values(), self.histograms.values(), stage_ns,
                                     strict=True):
            ring.push(value)
            hist.observe(value)
        self.processed += 1
        self.last_frame = frame

    def record_fit(self, frame: int, rms: float, max_err: float, off_manifold: bool) -> None:
        self.fit_rms.push(rms)
        self.fit_max.push(max_err)
        self.last_fit_frame = frame
        if off_manifold:
            self.off_manifold += 1
            self.last_off_manifold_frame = frame

    def input_fps(self, now_ns: int, span_ns: int = 2_000_000_000) -> float:
        """Frames received per second over the last ``span_ns`` (0 when idle)."""
        t = self.arrivals.values()
        recent = t[t >= now_ns - span_ns]
        if recent.shape[0] < 2:
            return 0.0
        spread = int(recent.max() - recent.min())
        return (recent.shape[0] - 1) * 1e9 / spread if spread > 0 else 0.0

    def snapshot(self, now_ns: int, server: ServerStats | None = None) -> Telemetry:
        latency = {}
        for name, ring in self.stages.items():
            p = ring.percentiles() / 1e6
            latency[name] = LatencyStats(_f(p[0]), _f(p[1]), _f(p[2]))
        fit = FitErrorStats(
            frame=self.last_fit_frame, skipped=self.fit_skipped, rms=_f(self.fit_rms.last()),
            max=_f(self.fit_max.last()), rms_mean=_f(self.fit_rms.mean()),
            max_mean=_f(self.fit_max.mean()), off_manifold=self.off_manifold,
            last_off_manifold_frame=self.last_off_manifold_frame,
            threshold=None if self.threshold is None else _f(self.threshold),
            threshold_on=self.threshold_on)
        return Telemetry(
            stream=self.stream, bundle=self.bundle, t_ns=now_ns, latency=latency,
            window=len(self.stages["total"]), input_fps=self.input_fps(now_ns),
            processed=self.processed, dropped=self.dropped, stale=self.stale,
            rejected=sum(self.rejected.values()), rejected_by_reason=dict(self.rejected),
            clamped=self.clamped, filter_resets=self.filter_resets, last_frame=self.last_frame,
            fit_error=fit, pose=self.pose, stabilise_rms=_f(self.stabilise_rms), server=server,
            held=self.held, timecode=None if self.timecode is None else str(self.timecode),
            tc_rate=None if self.timecode is None else self.timecode.rate,
            bundle_quality=self.bundle_quality)


def telemetry(streams: Sequence[StreamTelemetry], t_start_ns: int,
              rejected: Mapping[str, int]) -> list[Telemetry]:
    """Every stream's telemetry now, each with the server-wide figures."""
    now = time.time_ns()
    server = ServerStats((now - t_start_ns) / 1e9, len(streams), sum(rejected.values()),
                         dict(rejected))
    return [s.snapshot(now, server) for s in streams]


def heartbeat(streams: Sequence[str], t_start_ns: int, period_s: float) -> Heartbeat:
    """The server's heartbeat now (docs/protocol.md §5.4)."""
    now = time.time_ns()
    return Heartbeat(now, (now - t_start_ns) / 1e9, tuple(streams), period_s)
