"""How `rigcast watch` shows its state: the detail view (rich panels, one per stream), the
compact view (one line per actor: 8 actors fit an 80 x 24 terminal) and plain text lines for
logs and scripts. Everything from the wire is shown as text, never as markup."""

from __future__ import annotations

import math
import time
from typing import Any

import numpy as np

from rigcast.live.watch_state import BAD_STATES, LIVE, SILENT, StreamView, WatchState
from rigcast.runtime.schema import ControlSchema

STAGES = ("decode", "align", "infer", "filter", "publish", "total")
_STYLE = {LIVE: "green", "waiting": "dim"}


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


def fit_text(view: StreamView) -> str:
    """``0.42x thr`` (the latest fit RMS against the stream's threshold), or the raw RMS with
    ``(no threshold)`` while none is known."""
    ratio = view.fit_ratio()
    if ratio is not None:
        return f"{ratio:.2f}x thr"
    rms = (view.telemetry.get("fit_error") or {}).get("rms")
    return f"{_num(rms)} (no threshold)" if rms is not None else "-"


def stream_lines(view: StreamView, now: float, state: WatchState | None = None) -> list[str]:
    """Plain summary lines of one stream: its state and reason first."""
    health = (state or WatchState()).health(view, now)
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
    age = now - view.telemetry_at
    old = f" (figures {age:.1f} s old)" if health.state == SILENT and age < 1e9 else ""
    return [
        f"[{view.stream}] state: {health.state} ({health.reason}){old}",
        f"[{view.stream}] fps {_num(t.get('input_fps'), '{:.1f}')}"
        f" processed {t.get('processed', 0)}"
        f" dropped {t.get('dropped', 0)} stale {t.get('stale', 0)} rejected {t.get('rejected', 0)}"
        f" ({reasons})",
        f"[{view.stream}] latency p50/p99 ms: {stages or '-'}",
        f"[{view.stream}] fit error {fit_text(view)} rms {_num(fit.get('rms'))} "
        f"max {_num(fit.get('max'))} "
        f"mean {_num(fit.get('rms_mean'))} off-manifold {fit.get('off_manifold', 0)}{flag}",
    ]


def plain_lines(state: WatchState, now: float | None = None) -> list[str]:
    now = time.monotonic() if now is None else now
    if not state.streams:
        return ["waiting for telemetry..."]
    lines: list[str] = []
    for view in state.streams.values():
        lines += stream_lines(view, now, state)
    return lines


COMPACT_HEADER = f"{'actor':<12} {'state':<13} {'fps':>5} {'p95 ms':>6} {'fit':>9}  reason"


def compact_lines(state: WatchState, now: float | None = None, width: int = 80) -> list[str]:
    """One line per actor, cut to ``width``: name, state, input fps, server p95, fit against
    the threshold, reason."""
    now = time.monotonic() if now is None else now
    if not state.streams:
        return ["waiting for telemetry..."]
    lines = [COMPACT_HEADER[:width]]
    for view in state.streams.values():
        health = state.health(view, now)
        t = view.telemetry
        p95 = ((t.get("latency") or {}).get("total") or {}).get("p95_ms")
        ratio = view.fit_ratio()
        fit = f"{ratio:.2f}x" if ratio is not None else _num(
            (t.get("fit_error") or {}).get("rms"), "{:.4f}")
        name = view.stream if len(view.stream) <= 12 else view.stream[:11] + "…"
        line = (f"{name:<12} {health.state:<13} {_num(t.get('input_fps'), '{:.0f}'):>5} "
                f"{_num(p95, '{:.2f}'):>6} {fit:>9}  {health.reason}")
        lines.append(line[:width])
    return lines


def render_compact(state: WatchState, width: int = 80, now: float | None = None) -> Any:
    """The compact view as rich Text, each state coloured (red for the bad ones)."""
    from rich.text import Text

    now = time.monotonic() if now is None else now
    text = Text(no_wrap=True, overflow="crop")
    lines = compact_lines(state, now, width)
    text.append(lines[0] + "\n", style="bold")
    for view, line in zip(state.streams.values(), lines[1:], strict=False):
        health = state.health(view, now)
        style = "bold red" if health.state in BAD_STATES else _STYLE.get(health.state)
        text.append(line + "\n", style=style)
    if state.events:
        text.append((f"last event: {state.events[-1]}")[:width], style="dim")
    return text


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
        counts.add_row("fit error", escape(fit_text(view)), style="bold red" if hot else None)
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
        health = state.health(view, now)
        title = f"stream {escape(view.stream)}"
        if t.get("bundle"):
            title += f" · {escape(str(t['bundle']))}"
        title += f" · {escape(health.state.upper())}: {escape(health.reason)}"
        bad = health.state in BAD_STATES
        panels.append(Panel(grid, title=title, border_style="red" if bad else "blue"))
    if state.events:
        panels.append(Panel(Text("\n".join(state.events)), title="recent events",
                            border_style="dim"))
    return Group(*panels)


