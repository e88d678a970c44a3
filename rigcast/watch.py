"""The live telemetry view: what a server is doing, per stream, in the terminal (rich).

``WatchState`` folds the messages a subscriber receives (telemetry dicts, controls, events) into
what the view shows; ``render_view`` turns it into rich tables and ``plain_lines`` into text lines
for logs and non-interactive terminals. ``watch`` runs the loop.
"""

from __future__ import annotations

import logging
import math
import time
from collections import deque
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from rigcast.runtime.keys import ClientCurve, client_curve
from rigcast.runtime.protocol import FLAG_OFF_MANIFOLD, ControlsMessage
from rigcast.runtime.schema import ControlSchema

log = logging.getLogger(__name__)

STAGES = ("decode", "align", "infer", "filter", "publish", "total")
_OFF_MANIFOLD_HOLD_S = 1.5  # how long a new off-manifold frame keeps its row highlighted


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

    def off_manifold_recent(self, now: float) -> bool:
        return now - self.off_manifold_at < _OFF_MANIFOLD_HOLD_S


@dataclass
class WatchState:
    """Folds received messages into per-stream views and a short event log."""

    only_stream: str | None = None
    streams: dict[str, StreamView] = field(default_factory=dict)
    events: deque[str] = field(default_factory=lambda: deque(maxlen=6))
    telemetry_count: int = 0

    def view(self, stream: str) -> StreamView:
        if stream not in self.streams:
            self.streams[stream] = StreamView(stream)
        return self.streams[stream]

    def wants(self, stream: str | None) -> bool:
        return self.only_stream is None or stream == self.only_stream

    def add(self, message: ControlsMessage | Mapping[str, Any], now: float | None = None) -> None:
        now = time.monotonic() if now is None else now
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
            v = self.view(stream)
            v.telemetry = message
            self.telemetry_count += 1
            count = int((message.get("fit_error") or {}).get("off_manifold") or 0)
            if count > v.off_manifold_seen:
                v.off_manifold_at = now
            v.off_manifold_seen = count
        elif kind == "event" and self.wants(stream):
            what = message.get("kind", "?")
            detail = message.get("reason") or message.get("message") or ""
            frame = message.get("frame")
            at = f" frame {frame}" if frame is not None else ""
            self.events.append(f"{stream or '-'}{at}: {what} {detail}".strip())


def _ms(x: Any) -> str:
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else _num(x, "{:.3f}")


def _num(x: Any, fmt: str = "{:.5f}") -> str:
    if x is None:
        return "-"
    try:
        return fmt.format(float(x))
    except (TypeError, ValueError, OverflowError):
        return "?"  # not a number: nothing from the wire may stop the view


def activity(values: np.ndarray, schema: ControlSchema | None) -> np.ndarray:
    """values (C,) -> (C,) how far each control is from rest, as a fraction of its range in [0, 1].

    Without a schema the raw magnitude, clipped to [0, 1], stands in.
    """
    v = np.asarray(values, dtype=np.float64)
    if schema is None or len(schema) != v.shape[0]:
        return np.clip(np.abs(v), 0.0, 1.0)
    span = (schema.upper - schema.lower).astype(np.float64)
    return np.clip(np.abs(v - schema.defaults) / span, 0.0, 1.0)


def top_controls(view: StreamView, top: int) -> list[tuple[str, float, float]]:
    """[(name, value, activity)] of the ``top`` most active controls, most active first."""
    if view.values is None or top <= 0:
        return []
    act = activity(view.values, view.schema)
    order = np.argsort(-act, kind="stable")[:top]
    names = view.schema.names if view.schema is not None and len(view.schema) == act.shape[0] \
        else tuple(f"#{i}" for i in range(act.shape[0]))
    return [(names[i], float(view.values[i]), float(act[i])) for i in order]


def _bar(fraction: float, width: int = 24) -> str:
    cells = fraction * width
    full = int(cells)
    part = " ▏▎▍▌▋▊▉"[int((cells - full) * 8)] if full < width else ""
    return ("█" * full + part).ljust(width)


def stream_lines(view: StreamView, now: float) -> list[str]:
    """Plain summary lines of one stream."""
    t = view.telemetry
    lat = t.get("latency") or {}
    fit = t.get("fit_error") or {}
    rejected = t.get("rejected_by_reason") or {}
    reasons = ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) or "none"
    stages = " ".join(
        f"{s} {_ms((lat.get(s) or {}).get('p50_ms'))}/{_ms((lat.get(s) or {}).get('p99_ms'))}"
        for s in STAGES if s in lat
    )
    flag = " OFF-MANIFOLD" if view.off_manifold_recent(now) else ""
    server = t.get("server") or {}
    unattributed = int(server.get("rejected") or 0) - int(t.get("rejected") or 0)
    if unattributed > 0:
        # Frames whose header did not parse name no stream; the server counts them itself.
        whole = ", ".join(f"{k} {v}" for k, v in sorted(server["rejected_by_reason"].items()))
        reasons += f"; server-wide {server['rejected']} ({whole})"
    return [
        f"[{view.stream}] fps {_num(t.get('input_fps'), '{:.1f}')}"
        f" processed {t.get('processed', 0)}"
        f" dropped {t.get('dropped', 0)} stale {t.get('stale', 0)} rejected {t.get('rejected', 0)}"
        f" ({reasons})",
        f"[{view.stream}] latency p50/p99 ms: {stages or '-'}",
        f"[{view.stream}] fit error rms {_num(fit.get('rms'))} max {_num(fit.get('max'))} "
        f"mean {_num(fit.get('rms_mean'))} off-manifold {fit.get('off_manifold', 0)}{flag}",
    ]


def plain_lines(state: WatchState, now: float | None = None) -> list[str]:
    now = time.monotonic() if now is None else now
    if not state.streams:
        return ["waiting for telemetry..."]
    lines: list[str] = []
    for view in state.streams.values():
        lines += stream_lines(view, now)
    return lines


def render_view(state: WatchState, top: int = 8, now: float | None = None) -> Any:
    """A rich renderable of the whole state: one panel per stream, then recent events."""
    from rich.console import Group
    from rich.markup import escape
    from rich.panel import Panel
    from rich.table import Table
    from rich.text import Text

    now = time.monotonic() if now is None else now
    if not state.streams:
        return Text("waiting for telemetry...", style="dim")
    panels: list[Any] = []
    for view in state.streams.values():
        t = view.telemetry
        lat = t.get("latency") or {}
        stages = Table(title="latency per stage (ms)", title_justify="left", box=None,
                       show_edge=False, pad_edge=False)
        stages.add_column("stage")
        for col in ("p50", "p95", "p99"):
            stages.add_column(col, justify="right")
        for s in STAGES:
            if s in lat:
                row = lat[s] or {}
                stages.add_row(s, _ms(row.get("p50_ms")), _ms(row.get("p95_ms")),
                               _ms(row.get("p99_ms")), style="bold" if s == "total" else None)
        counts = Table(box=None, show_header=False, pad_edge=False)
        counts.add_column("what")
        counts.add_column("value", justify="right")
        counts.add_row("input fps", _num(t.get("input_fps"), "{:.1f}"))
        counts.add_row("processed", escape(str(t.get("processed", 0))))
        counts.add_row("dropped", escape(str(t.get("dropped", 0))))
        counts.add_row("stale", escape(str(t.get("stale", 0))))
        counts.add_row("rejected", escape(str(t.get("rejected", 0))),
                       style="yellow" if t.get("rejected") else None)
        for reason, n in sorted((t.get("rejected_by_reason") or {}).items()):
            counts.add_row(escape(f"  {reason}"), escape(str(n)), style="yellow")
        server = t.get("server") or {}
        if int(server.get("rejected") or 0) > int(t.get("rejected") or 0):
            counts.add_row("rejected server-wide", escape(str(server["rejected"])),
                           style="yellow")
            for reason, n in sorted((server.get("rejected_by_reason") or {}).items()):
                counts.add_row(escape(f"  {reason}"), escape(str(n)), style="yellow")
        fit = t.get("fit_error") or {}
        hot = view.off_manifold_recent(now)
        counts.add_row("fit error rms", _num(fit.get("rms")), style="bold red" if hot else None)
        counts.add_row("fit error max", _num(fit.get("max")))
        counts.add_row("fit rms mean", _num(fit.get("rms_mean")))
        counts.add_row("off-manifold frames", escape(str(fit.get("off_manifold", 0))),
                       style="bold white on red" if hot else None)
        bars = Table(title="most active controls", title_justify="left", box=None,
                     show_header=False, pad_edge=False)
        bars.add_column("control")
        bars.add_column("bar")
        bars.add_column("value", justify="right")
        for name, value, act in top_controls(view, top):
            bars.add_row(Text(name), Text(_bar(act), style="cyan"), f"{value:+.3f}")
        grid = Table.grid(padding=(0, 3))
        grid.add_row(stages, counts, bars)
        # Everything from the wire is escaped: a stream id like "[/bold]" is text, not markup.
        title = f"stream {escape(view.stream)}"
        if t.get("bundle"):
            title += f" · {escape(str(t['bundle']))}"
        if hot:
            title += " · OFF-MANIFOLD"
        panels.append(Panel(grid, title=title, border_style="red" if hot else "blue"))
    if state.events:
        panels.append(Panel(Text("\n".join(state.events)), title="recent events",
                            border_style="dim"))
    return Group(*panels)


@contextmanager
def build_progress(enabled: bool) -> Iterator[Callable[[str, int, int], None] | None]:
    """A rich progress bar for ``build_bundle``'s ``progress(stage, done, total)`` callback."""
    if not enabled:
        yield None
        return
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

    with Progress("[progress.description]{task.description}", BarColumn(), MofNCompleteColumn(),
                  TimeElapsedColumn(), transient=False) as progress:
        tasks: dict[str, Any] = {}

        def update(stage: str, done: int, total: int) -> None:
            if stage not in tasks:
                tasks[stage] = progress.add_task(stage, total=max(total, 1))
            progress.update(tasks[stage], completed=done, total=max(total, 1))

        yield update


class _AllStreams:
    """A SUB socket on every stream's controls and telemetry and on the events (the client's
    ControlsSubscriber follows one stream; the view follows them all)."""

    def __init__(self, endpoint: str, *, controls: bool = True,
                 curve: ClientCurve | None = None) -> None:
        import zmq

        from rigcast.runtime import protocol

        self._zmq = zmq
        self._protocol = protocol
        self.socket: Any = zmq.Context.instance().socket(zmq.SUB)
        self.socket.setsockopt(zmq.RCVHWM, 1000)
        self.socket.setsockopt(zmq.LINGER, 0)
        topics = [protocol.TOPIC_TELEMETRY, protocol.TOPIC_EVENTS]
        if controls:
            topics.append(protocol.TOPIC_CONTROLS)
        for topic in topics:
            self.socket.setsockopt(zmq.SUBSCRIBE, topic)
        if curve is not None:
            curve.apply(self.socket)
        self.socket.connect(endpoint)

    def recv(self, timeout_ms: int) -> ControlsMessage | dict[str, Any] | None:
        if not self.socket.poll(max(timeout_ms, 0), self._zmq.POLLIN):
            return None
        frames = self.socket.recv_multipart()
        try:
            return self._protocol.decode_published(frames)
        except self._protocol.FrameError as err:
            log.warning("undecodable message on %r: %s", frames[0], err)
            return None

    def close(self) -> None:
        self.socket.close(linger=0)


def _fetch_schema(endpoint: str, stream: str, timeout_s: float = 0.5,
                  curve: ClientCurve | None = None) -> ControlSchema | None:
    """The stream's schema from the server's input endpoint, or None when it does not answer."""
    from rigcast.runtime.client import MeshSender, ServerError
    from rigcast.runtime.protocol import schema_from_reply
    from rigcast.runtime.schema import SchemaError
    from rigcast.send import request_schema

    with MeshSender(endpoint, curve=curve) as sender:
        try:
            return schema_from_reply(request_schema(sender, stream, timeout_s))
        except (TimeoutError, ServerError, SchemaError) as exc:
            log.info("no schema for stream %s from %s (%s); bars show control indices",
                     stream, endpoint, exc)
            return None


def watch(
    source: str,
    *,
    schema_endpoint: str | None = None,
    stream: str | None = None,
    once: bool = False,
    duration_s: float | None = None,
    top: int = 8,
    timeout_s: float = 10.0,
    plain: bool = False,
    write: Callable[[str], None] | None = None,
    curve: ClientCurve | None = None,
) -> WatchState:
    """Run the view until Ctrl-C, ``duration_s``, or (``once``) the first full snapshot.

    ``plain`` (or a stdout that is not a terminal) prints text lines once a second instead of
    the live view. Raises TimeoutError when ``once`` and no telemetry arrives in ``timeout_s``.
    """
    import sys

    from rich.console import Console
    from rich.live import Live

    def _stdout(text: str) -> None:
        sys.stdout.write(text + "\n")
        sys.stdout.flush()

    out = write or _stdout
    state = WatchState(only_stream=stream)
    sub = _AllStreams(source, curve=curve)
    asked: set[str] = set()
    start = time.monotonic()
    interactive = sys.stdout.isatty() and not plain and not once

    def pump(budget_s: float) -> None:
        end = time.monotonic() + budget_s
        while (left := end - time.monotonic()) > 0:
            msg = sub.recv(int(left * 1000) + 1)
            if msg is not None:
                state.add(msg)
        if schema_endpoint is not None:
            for name, view in state.streams.items():
                if name not in asked:
                    asked.add(name)
                    view.schema = _fetch_schema(schema_endpoint, name, curve=curve)

    def done() -> bool:
        return duration_s is not None and time.monotonic() - start >= duration_s

    try:
        if once:
            while state.telemetry_count == 0:
                if time.monotonic() - start > timeout_s:
                    raise TimeoutError(f"no telemetry from {source} within {timeout_s:g} s")
                pump(0.1)
            pump(0.3)  # let the other streams' telemetry and some controls arrive
            console = Console(width=140, force_terminal=False, no_color=not sys.stdout.isatty())
            if plain:
                for line in plain_lines(state):
                    out(line)
            else:
                console.print(render_view(state, top))
        elif interactive:
            with Live(render_view(state, top), refresh_per_second=4, screen=False) as live:
                while not done():
                    pump(0.25)
                    live.update(render_view(state, top))
        else:
            while not done():
                pump(1.0 if duration_s is None else min(1.0, max(duration_s, 0.05)))
                for line in plain_lines(state):
                    out(line)
    except KeyboardInterrupt:
        pass
    finally:
        sub.close()
    return state


def watch_from_args(args: Any) -> int:
    from rigcast.errors import EXIT_OK, NoAnswerError

    try:
        watch(args.source, schema_endpoint=args.to, stream=args.stream, once=args.once,
              duration_s=args.duration, top=args.top, timeout_s=args.timeout, plain=args.plain,
              curve=curve_from_args(args))
    except TimeoutError as exc:
        raise NoAnswerError(str(exc),
                            "start a server with `rigcast serve`, or check --from") from None
    return EXIT_OK


def discover_stream(source: str, timeout_s: float = 3.0, curve: ClientCurve | None = None) -> str:
    """The first stream id named by a server's telemetry on ``source``; TimeoutError if none."""
    sub = _AllStreams(source, controls=False, curve=curve)
    try:
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            msg = sub.recv(int(left * 1000) + 1)
            if isinstance(msg, Mapping) and msg.get("type") == "telemetry":
                return str(msg["stream"])
    finally:
        sub.close()
    raise TimeoutError(f"no telemetry from {source} within {timeout_s:g} s to learn a stream id")


def stream_or_discover(stream: str | None, source: str, timeout_s: float,
                       curve: ClientCurve | None = None) -> str:
    """The named stream, or the first one heard on ``source``; one readable error if none."""
    if stream is not None:
        return stream
    from rigcast.errors import NoAnswerError

    try:
        return discover_stream(source, timeout_s=timeout_s, curve=curve)
    except TimeoutError as exc:
        raise NoAnswerError(str(exc), "start a server, or pass --stream and --from") from None


def curve_from_args(args: Any) -> ClientCurve | None:
    """The CURVE keys given by --server-key and --client-key (both or neither), or None."""
    return client_curve(getattr(args, "server_key", None), getattr(args, "client_key", None))
