"""``rigcast demo``: the whole product in one run, with no input.

1. Build the demo face bundle into a cache folder (``build_bundle`` reuses it while the rig and
   the build config are unchanged).
2. Start ``rigcast serve`` in a subprocess on free loopback ports (port ``*``; the server writes
   the ports it bound into a ready file).
3. Stream an invented take of the demo face (``synth_take``: smooth expressions, head motion,
   sensor noise, a few off-manifold frames) at 60 fps, with a few corrupt frames of each kind.
4. Show the live telemetry view (plain lines when stdout is not a terminal).
5. Print a summary and write a report with plots.

The per-frame fit error in the report is recomputed here from what the server published: the
bundle's forward graph re-renders the published controls, which are compared with the sent
frames after the same rigid stabilisation the server applies (``runtime.solve.batch``'s batched fit).
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.commands.report import RunRecord, RunSummary, write_run_report
from rigcast.errors import EXIT_OK, UserError
from rigcast.live.record import collect
from rigcast.runtime.messaging.protocol import ControlsMessage

log = logging.getLogger(__name__)

STREAM = "tamsin"
_READY_TIMEOUT_S = 90.0


@dataclass(frozen=True)
class DemoConfig:
    quick: bool = False
    seconds: float = 12.0
    fps: float = 60.0
    cache_dir: Path = Path(".rigcast-cache")
    report_dir: Path = Path("rigcast-demo-report")
    live: bool = True
    seed: int = 7

    def __post_init__(self) -> None:
        if not (1.0 <= self.seconds <= 600.0):
            raise UserError(f"--seconds must be between 1 and 600, got {self.seconds:g}",
                            "pick a take length in that range", code=2)
        if not (1.0 <= self.fps <= 1000.0):
            raise UserError(f"--fps must be between 1 and 1000, got {self.fps:g}",
                            "pick a frame rate in that range", code=2)


def default_cache_dir() -> Path:
    """``$XDG_CACHE_HOME/rigcast`` or ``~/.cache/rigcast`` when writable, else
    ``./.rigcast-cache``."""
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    candidate = Path(base) / "rigcast"
    try:
        candidate.mkdir(parents=True, exist_ok=True)
        probe = candidate / ".write-test"
        probe.write_text("ok")
        probe.unlink()
        return candidate
    except OSError:
        return Path(".rigcast-cache")


def demo_build_config(quick: bool) -> Any:
    """The demo's BuildConfig: the build's own defaults, or a small one for ``--quick``."""
    from rigcast.export.bundling.build import BuildConfig

    if not quick:
        return BuildConfig()
    from rigcast.export.training.train import ForwardConfig, InverseConfig

    return BuildConfig(
        samples=1500,
        forward=ForwardConfig(hidden=(128, 128), components=32, epochs=15, max_seconds=15.0),
        inverse=InverseConfig(hidden=(128, 128), steps=300, max_seconds=20.0),
        check_samples=32,
    )


def corrupt_schedule(frames: int, per_kind: int = 2) -> dict[int, str]:
    """Frame number -> corruption kind: ``per_kind`` of each kind, spread over the take."""
    from rigcast.live.send import CORRUPTIONS

    count = per_kind * len(CORRUPTIONS)
    spots = np.linspace(0.1 * frames, 0.9 * frames, count).astype(int)
    return {int(f): CORRUPTIONS[i % len(CORRUPTIONS)] for i, f in enumerate(spots)}


@dataclass
class ServerHandle:
    process: subprocess.Popen[bytes]
    input: str
    output: str
    stream: str


@contextmanager
def served(bundle_path: Path, workdir: Path, stream: str = STREAM) -> Iterator[ServerHandle]:
    """Run ``rigcast serve`` in a subprocess on free loopback ports; stop it on exit."""
    ready = workdir / "server-ready.json"
    ready.unlink(missing_ok=True)
    log_path = workdir / "server.log"
    cmd = [sys.executable, "-m", "rigcast", "serve", "--bundle", f"{stream}={bundle_path}",
           "--input", "tcp://127.0.0.1:*", "--output", "tcp://127.0.0.1:*",
           "--ready-file", str(ready)]
    with log_path.open("wb") as log_file:
        proc = subprocess.Popen(cmd, stdout=log_file, stderr=subprocess.STDOUT,
                                stdin=subprocess.DEVNULL)
        try:
            deadline = time.monotonic() + _READY_TIMEOUT_S
            while not ready.exists():
                if proc.poll() is not None:
                    tail = log_path.read_text(errors="replace").strip().splitlines()[-1:]
                    raise UserError(f"the demo server exited at startup ({' '.join(tail)})",
                                    f"see {log_path}")
                if time.monotonic() > deadline:
                    raise UserError(f"the demo server did not start in {_READY_TIMEOUT_S:g} s",
                                    f"see {log_path}")
                time.sleep(0.05)
            info = json.loads(ready.read_text())
            yield ServerHandle(proc, info["input"], info["output"], stream)
        finally:
            if proc.poll() is None:
                proc.terminate()  # SIGTERM: the server's clean shutdown
                try:
                    proc.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    proc.kill()
                    proc.wait(timeout=5)


@dataclass
class Collector:
    """Receives controls, telemetry and events in a thread while the take streams."""

    stream: str
    endpoint: str
    controls: list[ControlsMessage] = field(default_factory=list)
    arrived_ns: list[int] = field(default_factory=list)
    telemetry: dict[str, Any] = field(default_factory=dict)
    off_manifold_frames: set[int] = field(default_factory=set)
    on_message: Callable[[Any], None] | None = None
    _stop: threading.Event = field(default_factory=threading.Event)
    _thread: threading.Thread | None = None
    _ready: threading.Event = field(default_factory=threading.Event)

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="demo-collector", daemon=True)
        self._thread.start()
        self._ready.wait(5.0)

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)

    def _run(self) -> None:
        from rigcast.runtime.messaging.client import ControlsSubscriber

        with ControlsSubscriber(self.stream, self.endpoint, controls=True, telemetry=True,
                                events=True) as sub:
            self._ready.set()
            while not self._stop.is_set():
                msg = sub.recv(timeout_ms=50)
                if msg is None:
                    continue
                if isinstance(msg, ControlsMessage):
                    self.controls.append(msg)
                    self.arrived_ns.append(time.time_ns())
                elif msg.get("type") == "telemetry":
                    self.telemetry = msg
                elif msg.get("type") == "event" and msg.get("kind") == "off_manifold":
                    self.off_manifold_frames.add(int(msg["frame"]))
                if self.on_message is not None:
                    self.on_message(msg)


def wait_for_telemetry(collector: Collector, timeout_s: float) -> None:
    """Block until the server's telemetry reaches the collector (the SUB connection is up)."""
    deadline = time.monotonic() + timeout_s
    while not collector.telemetry:
        if time.monotonic() > deadline:
            raise UserError(f"no telemetry from the demo server within {timeout_s:g} s",
                            "see server.log in the report folder")
        time.sleep(0.02)


def fit_errors(solver: Any, sent: np.ndarray, controls: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
    """Fit error (RMS (T,), max (T,)) of published controls (T, C) against the sent frames
    (T, V, 3), on every vertex, after rigid stabilisation as the server does it; ``solver`` a
    ``runtime.solve.batch.BatchSolver`` for the bundle."""
    from rigcast.runtime.solve.batch import fit_error_batch, fit_rigid_batch

    if controls.shape[0] == 0:
        return np.zeros(0), np.zeros(0)
    fit = fit_rigid_batch(np.take(sent, solver.bundle.stable_indices, axis=1),
                          solver.neutral_stable)
    pred = solver.forward.evaluate(np.ascontiguousarray(controls, np.float32))
    return fit_error_batch(pred, sent, fit)


def summarise(telemetry: Mapping[str, Any], stats: Any, record: RunRecord,
              off_manifold: int) -> RunSummary:
    """The run's summary from the last telemetry, the sender's stats and the latencies."""
    server = telemetry.get("server") or {}
    rejected = dict(server.get("rejected_by_reason") or telemetry.get("rejected_by_reason") or {})
    lat = record.latency_ms
    latency = telemetry.get("latency") or {}
    fit = record.fit_rms[np.isfinite(record.fit_rms)]
    return RunSummary(
        frames_sent=int(stats.sent),
        frames_solved=int(record.controls.shape[0]),
        corrupt_sent=int(sum(stats.corrupt.values())),
        latency_p50_ms=float(np.percentile(lat, 50)) if lat.size else float("nan"),
        latency_p99_ms=float(np.percentile(lat, 99)) if lat.size else float("nan"),
        fit_rms_mean=float(fit.mean()) if fit.size else float("nan"),
        off_manifold=off_manifold,
        dropped=int(telemetry.get("dropped") or 0),
        stale=int(telemetry.get("stale") or 0),
        rejected=Counter({str(k): int(v) for k, v in rejected.items()}),
        stage_p50_ms={k: float(v["p50_ms"]) for k, v in latency.items()
                      if v and v.get("p50_ms") is not None},
        stage_p99_ms={k: float(v["p99_ms"]) for k, v in latency.items()
                      if v and v.get("p99_ms") is not None},
        duration_s=float(stats.seconds),
    )


def _stdout(text: str) -> None:
    sys.stdout.write(text + "\n")
    sys.stdout.flush()


def run_demo(config: DemoConfig, write: Callable[[str], None] = _stdout) -> RunSummary:
    """Build, serve, stream, watch, summarise, report. Returns the summary."""
    from rigcast.commands.report import build_summary
    from rigcast.export.bundling.build import build_bundle
    from rigcast.export.quality.take_synth import synth_take
    from rigcast.export.rigs.demo_rigs import tamsin_face
    from rigcast.live.send import SendStats, check_server, stream_take
    from rigcast.live.watch import WatchState, build_progress, plain_lines, render_view
    from rigcast.runtime.bundle import load_bundle
    from rigcast.runtime.messaging.client import MeshSender
    from rigcast.runtime.messaging.protocol import FLAG_OFF_MANIFOLD
    from rigcast.runtime.solve.batch import BatchSolver

    t_start = time.perf_counter()
    interactive = config.live and sys.stdout.isatty()
    report_dir = config.report_dir
    report_dir.mkdir(parents=True, exist_ok=True)
    rig = tamsin_face()
    write(f"rigcast demo: the demo character '{rig.name}' ({rig.vertex_count} vertices, "
          f"{rig.control_count} controls); bundle cache {config.cache_dir}")
    bundle_path = report_dir / "demo-face.rcb"
    with build_progress(interactive) as progress:
        built = build_bundle(rig, bundle_path, demo_build_config(config.quick),
                             cache_dir=config.cache_dir, progress=progress)
    for line in build_summary(built):
        write(f"  {line}")
    bundle = load_bundle(bundle_path)
    phases = {"build": time.perf_counter() - t_start}
    t_stream = time.perf_counter()

    frames = max(2, round(config.seconds * config.fps))
    take = synth_take(rig, frames=frames, fps=config.fps, seed=config.seed, head_motion=True,
                      noise_sigma=0.001, off_manifold_frames=max(1, min(6, frames // 120)))
    corrupt = corrupt_schedule(frames)
    write(f"take: {frames} frames at {config.fps:g} fps ({frames / config.fps:.1f} s) with head "
          f"motion, noise, {int(take.off_manifold.sum())} off-manifold frames and "
          f"{len(corrupt)} corrupt frames")

    state = WatchState(only_stream=STREAM)
    state.view(STREAM).schema = bundle.schema
    lock = threading.Lock()

    def fold(msg: Any) -> None:
        with lock:
            state.add(msg)

    stats = SendStats()
    with served(bundle_path.resolve(), report_dir) as server:
        write(f"server: mesh frames in on {server.input}, controls out on {server.output}")
        collector = Collector(STREAM, server.output, on_message=fold)
        collector.start()
        try:
            wait_for_telemetry(collector, 30.0)
            with MeshSender(server.input) as sender:
                check_server(sender, STREAM, rig.vertex_count, 10.0, server.input)
                box: dict[str, Any] = {}

                def send() -> None:
                    box["stats"] = stream_take(sender, take.vertices, take.times_s,
                                               stream=STREAM, fps=config.fps, corrupt_at=corrupt)

                sender_thread = threading.Thread(target=send, name="demo-sender", daemon=True)
                sender_thread.start()
                _show_while(sender_thread, interactive, lock, state, write,
                            render_view, plain_lines)
                sender_thread.join()
                stats = box.get("stats", stats)
            time.sleep(0.5)  # the last frames' controls and one more telemetry tick
        finally:
            collector.stop()

    phases["serve and stream"] = time.perf_counter() - t_stream
    t_report = time.perf_counter()
    rec = collect(collector.controls, collector.arrived_ns, STREAM)
    sent = take.vertices[np.clip(rec.frames, 0, frames - 1)]
    solver = BatchSolver(bundle)  # a short take: the full forward graph, no onnx import
    fit, _ = fit_errors(solver, sent, rec.values)
    # The same take solved offline, with the batch path's adaptive off-manifold detector.
    batch = solver.solve(take.vertices, take.times_s)
    times = rec.frames.astype(np.float64) / config.fps
    off = np.isin(rec.frames, sorted(collector.off_manifold_frames)) | (
        (rec.flags & FLAG_OFF_MANIFOLD) != 0)
    record = RunRecord(
        control_names=bundle.schema.names,
        frame_times_s=times,
        controls=rec.values,
        off_manifold=off,
        fit_times_s=times,
        fit_rms=fit,
        latency_ms=(rec.arrived_ns - rec.t_send_ns).astype(np.float64) / 1e6,
        planted_off_s=take.times_s[take.off_manifold],
    )
    summary = replace(
        summarise(collector.telemetry, stats, record,
                  off_manifold=len(collector.off_manifold_frames)),
        planted_off=int(take.off_manifold.sum()),
        batch_found=int((batch.off_manifold & take.off_manifold).sum()),
        batch_others=int((batch.off_manifold & ~take.off_manifold).sum()),
    )
    notes = [
        f"Rig: {rig.name}, {rig.vertex_count} vertices, {rig.control_count} controls. "
        f"Bundle: `{bundle_path.name}` ({'reused from the cache' if built.cached else 'built'}"
        f", key {built.key}).",
        "",
        f"Take: {frames} frames at {config.fps:g} fps, seed {config.seed}, with head motion, "
        f"sensor noise, {int(take.off_manifold.sum())} frames pushed off the rig's manifold "
        f"(frames {', '.join(str(int(i)) for i in np.flatnonzero(take.off_manifold))}) and "
        f"corrupt frames {', '.join(f'{f} ({k})' for f, k in sorted(corrupt.items()))}.",
    ]
    report = write_run_report(report_dir, record, replace(summary, phase_seconds=dict(phases)),
                              title="rigcast demo", notes=notes)
    phases["report"] = time.perf_counter() - t_report
    summary = replace(summary, phase_seconds=phases)  # the printed one has the report's time too
    write("")
    write("summary:")
    for line in summary.lines():
        write(f"  {line}")
    write(f"report: {report} (plots: controls.png, fit_error.png, latency.png)")
    return summary


def _show_while(thread: threading.Thread, interactive: bool, lock: threading.Lock,
                state: Any, write: Callable[[str], None], render: Callable[..., Any],
                plain: Callable[..., list[str]]) -> None:
    """The live view (or plain lines every 2 s) while ``thread`` streams the take."""
    if interactive:
        from rich.live import Live

        with lock:
            first = render(state)
        with Live(first, refresh_per_second=4) as live:
            while thread.is_alive():
                thread.join(0.25)
                with lock:
                    live.update(render(state))
        return
    last = time.monotonic()
    while thread.is_alive():
        thread.join(0.2)
        if time.monotonic() - last >= 2.0:
            last = time.monotonic()
            with lock:
                lines = plain(state)
            for line in lines:
                write(f"  {line}")


def demo_from_args(args: Any) -> int:
    seconds = args.seconds if args.seconds is not None else (4.0 if args.quick else 12.0)
    config = DemoConfig(
        quick=args.quick,
        seconds=float(seconds),
        fps=float(args.fps),
        cache_dir=args.cache if args.cache is not None else default_cache_dir(),
        report_dir=args.report,
        live=not args.plain,
    )
    run_demo(config)
    return EXIT_OK
