"""The live operator view: each stream's health as a state with a reason, in the terminal.

``rigcast.live.watch_state`` folds what a subscriber receives into per-stream views and decides each
stream's state; ``rigcast.live.watch_view`` draws it (detail panels, a compact one-line-per-actor
view, plain lines). ``watch`` runs the loop on the server's publish endpoint only; the input
endpoint, when given and answering, only names the controls in the bars.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from rigcast.live.watch_state import SILENT_AFTER_S, StreamView, WatchState
from rigcast.live.watch_view import (
    activity,
    compact_lines,
    plain_lines,
    render_compact,
    render_view,
    stream_lines,
    top_controls,
)
from rigcast.runtime.messaging.client import Subscriber
from rigcast.runtime.trust.keys import ClientCurve

log = logging.getLogger(__name__)

__all__ = ["StreamView", "WatchState", "activity", "build_progress", "compact_lines",
           "plain_lines", "render_compact", "render_view", "stream_lines", "top_controls",
           "watch", "watch_from_args"]


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
    compact: bool = False,
    silent_after_s: float = SILENT_AFTER_S,
    write: Callable[[str], None] | None = None,
    curve: ClientCurve | None = None,
) -> WatchState:
    """Run the view until Ctrl-C (KeyboardInterrupt propagates, after the socket is closed),
    ``duration_s``, or (``once``) the first full snapshot.

    ``plain`` (or a stdout that is not a terminal) prints text lines once a second, and at once
    when a stream's state changes. Raises TimeoutError when ``once`` and no telemetry arrives
    in ``timeout_s``.
    """
    from rich.console import Console
    from rich.live import Live

    from rigcast.live.connect import schema_or_none

    def _stdout(text: str) -> None:
        sys.stdout.write(text + "\n")
        sys.stdout.flush()

    out = write or _stdout
    state = WatchState(only_stream=stream, silent_after_s=silent_after_s)
    sub = Subscriber(source, streams=None if stream is None else (stream,), telemetry=True,
                     events=True, curve=curve)
    asked: set[str] = set()
    start = time.monotonic()
    interactive = sys.stdout.isatty() and not plain and not once

    def pump(budget_s: float) -> None:
        end = time.monotonic() + budget_s
        while (left := end - time.monotonic()) > 0:
            msg = sub.recv(int(left * 1000) + 1)
            state.heard(sub.last_heard)
            if msg is not None:
                state.add(msg)
        for name, view in state.streams.items():
            if name not in asked:
                asked.add(name)
                view.schema = schema_or_none(schema_endpoint, name, curve=curve)

    def done() -> bool:
        return duration_s is not None and time.monotonic() - start >= duration_s

    def lines() -> list[str]:
        return compact_lines(state) if compact else plain_lines(state)

    try:
        if once:
            while state.telemetry_count == 0:
                if time.monotonic() - start > timeout_s:
                    raise TimeoutError(f"no telemetry from {source} within {timeout_s:g} s")
                pump(0.1)
            pump(0.3)  # let the other streams' telemetry and some controls arrive
            if plain or compact:
                for line in lines():
                    out(line)
            else:
                console = Console(width=140, force_terminal=False,
                                  no_color=not sys.stdout.isatty())
                console.print(render_view(state, top))
        elif interactive:
            console = Console()

            def draw() -> Any:
                return (render_compact(state, console.width) if compact
                        else render_view(state, top))

            with Live(draw(), console=console, refresh_per_second=4, screen=False) as live:
                while not done():
                    pump(0.25)
                    live.update(draw())
        else:
            _plain_loop(state, pump, done, lines, out)
    finally:
        sub.close()
    return state


def _plain_loop(state: WatchState, pump: Callable[[float], None], done: Callable[[], bool],
                lines: Callable[[], list[str]], out: Callable[[str], None]) -> None:
    """Print every second, and as soon as any stream's state changes."""
    last_print = -float("inf")
    shown: dict[str, str] = {}
    while not done():
        pump(0.1)
        now = time.monotonic()
        states = {name: state.health(view, now).state for name, view in state.streams.items()}
        if states != shown or now - last_print >= 1.0:
            for line in lines():
                out(line)
            shown, last_print = states, now


def watch_from_args(args: Any) -> int:
    from rigcast.errors import EXIT_OK, NoAnswerError
    from rigcast.live.connect import curve_from_args

    try:
        watch(args.source, schema_endpoint=args.to or None, stream=args.stream, once=args.once,
              duration_s=args.duration, top=args.top, timeout_s=args.timeout, plain=args.plain,
              compact=args.compact, silent_after_s=args.silent_after,
              curve=curve_from_args(args))
    except TimeoutError as exc:
        raise NoAnswerError(str(exc),
                            "start a server with `rigcast serve`, or check --from") from None
    return EXIT_OK
