"""What `rigcast serve` says at default verbosity: its endpoints, streams and bundles at start,
then one status line every few seconds, read from the server's own telemetry (a subscriber on
its publish endpoint in a thread of this process, folded by the operator view's WatchState, so
the line and `rigcast watch` agree)."""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any

from rigcast.live.watch_state import WatchState

log = logging.getLogger(__name__)


def startup_lines(config: Any, input_endpoint: str, output_endpoint: str,
                  metrics_url: str | None = None) -> list[str]:
    """Endpoints, then one line per configured stream with its bundle."""
    auth = "CURVE" if getattr(config, "curve_secret_key", None) else "no authentication"
    lines = [f"serving: mesh frames in on {input_endpoint}; controls, telemetry and events out "
             f"on {output_endpoint} ({auth})"]
    if metrics_url is not None:
        lines.append(f"metrics: Prometheus text format on {metrics_url}")
    for stream in getattr(config, "streams", ()):
        lines.append(f"  stream {stream.stream}: bundle {stream.bundle}")
    return lines


def status_line(state: WatchState, now: float | None = None) -> str:
    """``status: face live (60 fps) p95 1.21 ms, 3 rejected | arm no input (no input for 12 s)``"""
    now = time.monotonic() if now is None else now
    if not state.streams:
        return "status: no telemetry yet"
    parts = []
    for name, view in state.streams.items():
        health = state.health(view, now)
        t = view.telemetry
        p95 = ((t.get("latency") or {}).get("total") or {}).get("p95_ms")
        text = f"{name} {health.state} ({health.reason})"
        if isinstance(p95, int | float):
            text += f" p95 {p95:.2f} ms"
        rejected = int(t.get("rejected") or 0)
        if rejected:
            text += f", {rejected} rejected"
        parts.append(text)
    return "status: " + " | ".join(parts)


class StatusPrinter:
    """A daemon thread that subscribes to ``endpoint`` and calls ``say(status_line)`` every
    ``every_s`` seconds until ``stop()``."""

    def __init__(self, endpoint: str, say: Callable[[str], None], every_s: float = 5.0) -> None:
        self.endpoint = endpoint
        self.say = say
        self.every_s = every_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="serve-status", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(2.0)

    def _run(self) -> None:
        import zmq

        from rigcast.runtime.messaging.client import Subscriber

        ctx = zmq.Context()
        state = WatchState()
        try:
            with Subscriber(self.endpoint, controls=False, telemetry=True, context=ctx) as sub:
                next_at = time.monotonic() + self.every_s
                while not self._stop.is_set():
                    msg = sub.recv(100)
                    state.heard(sub.last_heard)
                    if msg is not None:
                        state.add(msg)
                    if time.monotonic() >= next_at:
                        self.say(status_line(state))
                        next_at += self.every_s
        finally:
            ctx.term()
