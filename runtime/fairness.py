"""The fit error's share of the server's time, per stream and in turn.

Each published frame is offered for its fit error; a stream keeps only its newest unfitted frame
(an older one it replaces is counted as skipped). Fits run between drains, while no input waits,
the stream that has waited longest first (round-robin), and each stream within its own share of
the time: ``fit_error_max_share`` divided by the number of streams, so the fits of all streams
together keep to the whole share and one stream's fits never use up another's.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any


class FitScheduler:
    """Pending fits per stream and each stream's earliest next fit time (perf_counter_ns)."""

    def __init__(self, max_share: float) -> None:
        self.max_share = max_share
        self.pending: dict[str, Any] = {}
        self.next_ns: dict[str, int] = {}
        self.turn: dict[str, int] = {}  # when each stream last had a fit, in offers
        self._clock = 0

    def offer(self, stream: str, item: Any) -> Any | None:
        """Queue a frame's fit; returns the older unfitted item it replaced (skipped), if any."""
        old = self.pending.get(stream)
        self.pending[stream] = item
        self.turn.setdefault(stream, -1)
        return old

    def forget(self, stream: str) -> Any | None:
        self.next_ns.pop(stream, None)
        self.turn.pop(stream, None)
        return self.pending.pop(stream, None)

    def run(self, streams: int, busy: Callable[[], bool],
            fit: Callable[[str, Any], None]) -> None:
        """Fit pending frames in turn while ``busy()`` is false; ``fit(stream, item)``."""
        if not self.pending:
            return
        share = self.max_share / max(streams, 1)
        for stream in sorted(self.pending, key=lambda s: self.turn.get(s, -1)):
            t0 = time.perf_counter_ns()
            if t0 < self.next_ns.get(stream, 0):
                continue
            if busy():
                return
            item = self.pending.pop(stream)
            fit(stream, item)
            t1 = time.perf_counter_ns()
            # After a fit that took d, this stream waits d (1 - share) / share for its next.
            self.next_ns[stream] = t1 + int((t1 - t0) * (1.0 - share) / share)
            self._clock += 1
            self.turn[stream] = self._clock
