"""The fit error's share of the server's time: per stream, the streams in turn.

Each published frame is offered for its fit error; a stream keeps only its newest unfitted frame
(an older one it replaces is counted as skipped). Fits run between drains, only while no input
waits, so they never delay a frame. Each stream has its own time share,
``fit_error_max_share``: after a fit of that stream that took d, its next fit waits
d (1 - share) / share. The streams take turns: the stream whose last fit is oldest goes first,
and a frame that must wait keeps its place until its turn. So one stream's fits never use up
another's, and every stream's off-manifold check runs.

(Two other rules were measured with bench/soak.py, 3 streams at 120 fps on a loaded 2-core
machine: one share for all streams together left each stream with 67 % of its frames checked,
a share split three ways about half; the global share that served the first stream first left
the 2nd and 3rd with under 1 %.)
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any


class FitScheduler:
    """Pending fits per stream, their turns, and each stream's earliest next fit
    (perf_counter_ns)."""

    def __init__(self, max_share: float) -> None:
        self.max_share = max_share
        self.pending: dict[str, Any] = {}
        self.next_ns: dict[str, int] = {}
        self.turn: dict[str, int] = {}  # when each stream last had a fit, in fits
        self._clock = 0

    def offer(self, stream: str, item: Any) -> Any | None:
        """Queue a frame's fit; returns the older unfitted item it replaced (skipped), if any."""
        old = self.pending.get(stream)
        self.pending[stream] = item
        self.turn.setdefault(stream, -1)
        return old

    def forget(self, stream: str) -> Any | None:
        self.turn.pop(stream, None)
        self.next_ns.pop(stream, None)
        return self.pending.pop(stream, None)

    def due_in_s(self) -> float:
        """Seconds until a pending fit may run (inf when none waits): the loop wakes for it."""
        if not self.pending:
            return math.inf
        first = min(self.next_ns.get(s, 0) for s in self.pending)
        return max(first - time.perf_counter_ns(), 0) / 1e9

    def run(self, busy: Callable[[], bool], fit: Callable[[str, Any], None]) -> None:
        """Fit pending frames in turn while ``busy()`` is false; ``fit(stream, item)``."""
        if not self.pending:
            return
        share = self.max_share
        for stream in sorted(self.pending, key=lambda s: self.turn.get(s, -1)):
            t0 = time.perf_counter_ns()
            if t0 < self.next_ns.get(stream, 0):
                continue
            if busy():
                return
            item = self.pending.pop(stream)
            fit(stream, item)
            t1 = time.perf_counter_ns()
            self.next_ns[stream] = t1 + int((t1 - t0) * (1.0 - share) / share)
            self._clock += 1
            self.turn[stream] = self._clock
