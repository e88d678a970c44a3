"""What `rigcast watch` knows: the messages a subscriber received, folded per stream, and each
stream's health as a state with a reason.

States, the first that applies (``health``):

- ``server silent``: nothing at all from the server's publish socket for ``silent_after_s``
  (it publishes every stream's telemetry about 10 times a second, and a heartbeat); the last
  figures are then old and shown as such;
- ``waiting``: the stream has sent no telemetry yet;
- ``no input``: the stream's input counters (processed, dropped, stale, rejected) have not
  moved for ``no_input_after_s`` (no sender, or a sender that stopped), or are still 0;
- ``off-manifold``: a frame was flagged off the rig's manifold in the last 1.5 s;
- ``over budget``: the server's p95 time per frame is over the frame budget at the stream's
  input rate (1 / fps);
- ``quality poor``: the bundle's build self-check said so (when the server reports it);
- ``live``.

The fit error is shown against the stream's off-manifold threshold when one is known (from
telemetry, or from the last off_manifold event, which carries it).
"""

from __future__ import annotations

import math
import time
from collections import deque
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from rigcast.runtime.messaging.protocol import FLAG_OFF_MANIFOLD, ControlsMessage
from rigcast.runtime.schema import ControlSchema

OFF_MANIFOLD_HOLD_S = 1.5  # how long a new off-manifold frame keeps its stream flagged
SILENT_AFTER_S = 1.0  # 10 telemetry ticks, 2 heartbeats (common practice: a few missed beats)
NO_INPUT_AFTER_S = 1.0

LIVE, WAITING, SILENT, NO_INPUT = "live", "waiting", "server silent", "no input"
OFF_MANIFOLD, OVER_BUDGET, QUALITY_POOR = "off-manifold", "over budget", "quality poor"
BAD_STATES = (SILENT, NO_INPUT, OFF_MANIFOLD, OVER_BUDGET, QUALITY_POOR)


@dataclass(frozen=True)
class Health:
    """A stream's state and the reason, in words an operator reads at a glance."""

    state: str
    reason: str

    @property
    def ok(self) -> bool:
        return self.state == LIVE


@dataclass
class StreamView:
    """What the view knows about one stream."""

    stream: str
    telemetry: Mapping[str, Any] = field(default_factory=dict)
    schema: ControlSchema | None = None
    values: np.ndarray | None = None  # (C,) latest published controls
    frames_seen: int = 0
    off_manifold_seen: int = 0
    off_manifold_at: float = -math.inf  # monotonic time of the last new off-manifold frame
    telemetry_at: float = -math.inf
    input_total: int = -1  # processed + dropped + stale + rejected at the last change
    input_changed_at: float = -math.inf
    threshold: float | None = None  # the off-manifold threshold in force, when known
    threshold_on: str = "rms"  # the fit figure it limits: "rms" (fixed) or "max" (adaptive)
    off_event: tuple[int, float] | None = None  # (frame, fit / threshold) of the last off event

    def off_manifold_recent(self, now: float) -> bool:
        return now - self.off_manifold_at < OFF_MANIFOLD_HOLD_S

    def fit_ratio(self) -> float | None:
        """The latest fit error as a multiple of the threshold in force (1.0 = at it): the RMS
        against a fixed limit, the worst vertex against the adaptive rule's."""
        fit = self.telemetry.get("fit_error") or {}
        value = fit.get("max" if self.threshold_on == "max" else "rms")
        if self.threshold is None or not isinstance(value, int | float) or self.threshold <= 0:
            return None
        return float(value) / self.threshold


def _number(x: Any) -> float | None:
    return float(x) if isinstance(x, int | float) and math.isfinite(float(x)) else None


@dataclass
class WatchState:
    """Folds received messages into per-stream views and a short event log."""

    only_stream: str | None = None
    streams: dict[str, StreamView] = field(default_factory=dict)
    events: deque[str] = field(default_factory=lambda: deque(maxlen=6))
    telemetry_count: int = 0
    heard_at: float = -math.inf  # monotonic time of the last message of any kind
    silent_after_s: float = SILENT_AFTER_S
    no_input_after_s: float = NO_INPUT_AFTER_S

    def view(self, stream: str) -> StreamView:
        if stream not in self.streams:
            self.streams[stream] = StreamView(stream)
        return self.streams[stream]

    def wants(self, stream: str | None) -> bool:
        return self.only_stream is None or stream == self.only_stream

    def heard(self, now: float) -> None:
        """The server sent something (any message, even one this version cannot decode)."""
        self.heard_at = max(self.heard_at, now)

    def add(self, message: ControlsMessage | Mapping[str, Any], now: float | None = None) -> None:
        now = time.monotonic() if now is None else now
        self.heard(now)
        if isinstance(message, ControlsMessage):
            if not self.wants(message.stream):
                return
            v = self.view(message.stream)
            v.values = np.asarray(message.values)
            v.frames_seen += 1
            if message.has(FLAG_OFF_MANIFOLD):
                v.off_manifold_at = now
            return
        kind = message.get("type")
        stream = message.get("stream")
        if kind == "telemetry" and isinstance(stream, str) and self.wants(stream):
            self._telemetry(self.view(stream), message, now)
        elif kind == "event" and self.wants(stream):
            what = message.get("kind", "?")
            if what == "off_manifold" and isinstance(stream, str):
                threshold = _number(message.get("threshold"))
                if threshold is not None:
                    v = self.view(stream)
                    v.threshold = threshold
                    v.threshold_on = str(message.get("threshold_on") or "rms")
                    value = _number(message.get("max" if v.threshold_on == "max" else "rms"))
                    frame = message.get("frame")
                    if value is not None and threshold > 0 and isinstance(frame, int):
                        v.off_event = (frame, value / threshold)
            detail = message.get("reason") or message.get("message") or ""
            frame = message.get("frame")
            at = f" frame {frame}" if frame is not None else ""
            self.events.append(f"{stream or '-'}{at}: {what} {detail}".strip())

    def _telemetry(self, v: StreamView, message: Mapping[str, Any], now: float) -> None:
        v.telemetry = message
        v.telemetry_at = now
        self.telemetry_count += 1
        fit = message.get("fit_error") or {}
        count = int(fit.get("off_manifold") or 0)
        if count > v.off_manifold_seen:
            v.off_manifold_at = now
        v.off_manifold_seen = count
        threshold = _number(fit.get("threshold"))
        if threshold is not None:
            v.threshold = threshold
            v.threshold_on = str(fit.get("threshold_on") or "rms")
        total = sum(int(message.get(k) or 0) for k in ("processed", "dropped", "stale",
                                                       "rejected"))
        if total != v.input_total:
            # The first telemetry starts the clock: a stream nobody sends to is "no input"
            # after no_input_after_s, not at once.
            v.input_total = total
            v.input_changed_at = now

    def health(self, view: StreamView, now: float | None = None) -> Health:
        """The stream's state and reason (see the module docstring for the order)."""
        now = time.monotonic() if now is None else now
        silent = now - self.heard_at
        if silent > self.silent_after_s:
            heard = "ever" if math.isinf(silent) else f"for {silent:.1f} s"
            return Health(SILENT, f"nothing from the server {heard}")
        if not view.telemetry:
            return Health(WAITING, "no telemetry for this stream yet")
        if view.input_total == 0:
            return Health(NO_INPUT, "no input yet")
        idle = now - view.input_changed_at
        if idle > self.no_input_after_s:
            return Health(NO_INPUT, f"no input for {idle:.0f} s" if idle >= 1.5
                          else f"no input for {idle:.1f} s")
        t = view.telemetry
        fit = t.get("fit_error") or {}
        if view.off_manifold_recent(now):
            ratio = view.fit_ratio()
            frame = fit.get("last_off_manifold_frame")
            if view.off_event is not None and view.off_event[0] == frame:
                ratio = view.off_event[1]  # the flagged frame's own fit, from its event
            size = f"fit {ratio:.1f}x the threshold" if ratio is not None else "fit error high"
            return Health(OFF_MANIFOLD, f"frame {frame}: {size}")
        fps = _number(t.get("input_fps"))
        p95 = _number(((t.get("latency") or {}).get("total") or {}).get("p95_ms"))
        if fps and p95 is not None and p95 > 1000.0 / fps:
            return Health(OVER_BUDGET, f"p95 {p95:.1f} ms > {1000.0 / fps:.1f} ms budget at "
                                       f"{fps:.0f} fps")
        quality = t.get("bundle_quality")
        if isinstance(quality, Mapping) and quality.get("ok") is False:
            return Health(QUALITY_POOR, str(quality.get("reason") or "the build's self-check"))
        return Health(LIVE, f"{fps:.0f} fps" if fps else "live")
