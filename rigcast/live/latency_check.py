"""`rigcast latency-check`: end-to-end latency of the user's own bundle on this machine.

One run measures, with the sender in a process of its own (``latency_probe --role client``,
pinned to CPU 1 where the platform allows, as bench/latency.py's) and the server (or echo) in
another (pinned to CPU 0); this process only starts them and writes the report:

1. the transport floor: the same sockets and message sizes against an echo process that does no
   work (``rigcast.live.latency_probe``), paced at the chosen rate, and its lockstep ceiling;
2. the server on the user's bundle (started here, or a running one given with ``--server``),
   paced at the chosen rate: send -> controls p50, p95, p99 and max; the server's per-stage
   medians from its telemetry; headroom against the frame budget (1 / rate);
3. the largest rate it sustains: lockstep, the next frame sent as the previous controls arrive
   (never more than one frame in flight).

Meshes are the bundle's own rig poses (its forward model at every control a little active,
``latency_probe.pose_meshes``, bench/latency.py's recipe) with sensor noise (0.15 % of the
bounding-box diagonal) and a little rigid head motion, so stabilisation does real work.
Platform-specific steps (CPU pinning, the server's memory from /proc) run where available and
are skipped with one line elsewhere. ``write_report`` writes report.md, latency.json and, with
matplotlib, a histogram and latency over time.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.errors import UserError
from rigcast.live.latency_probe import ms_percentiles, pose_meshes

log = logging.getLogger(__name__)

STREAM = "latency"


class LatencyCheckError(UserError):
    """A process of the run did not start or did not answer; the message says which."""

    def __init__(self, what: str) -> None:
        super().__init__(what, "check the bundle with `rigcast inspect`, and --server's "
                               "endpoints and --stream if given")


@dataclass(frozen=True)
class CheckConfig:
    """What to measure. ``server``: (input, output) endpoints of a running server, instead of
    starting one; ``stream`` its stream for this bundle's rig."""

    bundle: Path
    fps: float = 60.0
    duration_s: float = 10.0
    floor_duration_s: float = 4.0
    flat_seconds: float = 3.0
    warmup_s: float = 2.0
    server: tuple[str, str] | None = None
    stream: str | None = None
    pin: bool = True
    fit_error: str = "after_publish"


@dataclass(frozen=True)
class LatencyResult:
    """Figures in ms unless named otherwise; ``latency_ms`` and ``sent_s`` are the paced run's
    samples (for the plots); ``notes`` are the skipped platform steps, one line each."""

    bundle: str
    vertices: int
    controls: int
    fps: float
    budget_ms: float
    frames: int
    lost: int
    p50_ms: float
    p95_ms: float
    p99_ms: float
    max_ms: float
    floor_p50_ms: float
    floor_p95_ms: float
    floor_p99_ms: float
    floor_max_sustained_fps: float
    max_sustained_fps: float
    headroom_ms: float
    headroom_fraction: float
    stage_median_ms: dict[str, float | None]
    server: str
    rss_mb: float | None
    notes: tuple[str, ...]
    latency_ms: list[float] = field(repr=False)
    sent_s: list[float] = field(repr=False)
    floor_latency_ms: list[float] = field(repr=False)

    @property
    def sustains_rate(self) -> bool:
        """The chosen rate holds: nothing lost, p99 inside the budget, lockstep above it."""
        return self.lost == 0 and self.p99_ms < self.budget_ms and self.max_sustained_fps > self.fps


def bundle_meshes(bundle_path: Path, count: int = 32, seed: int = 1) -> tuple[list[np.ndarray], int]:
    """``count`` meshes (V, 3) float32 of the bundle's rig (its forward model, at
    ``latency_probe.pose_meshes``'s controls with its noise and head motion); and the control
    count."""
    from rigcast.runtime.bundle import load_bundle
    from rigcast.runtime.solve.inference import ForwardModel

    bundle = load_bundle(bundle_path)
    schema = bundle.schema
    forward = ForwardModel(bundle)
    meshes = pose_meshes(lambda c: forward.evaluate(c.astype(np.float32)), schema.lower,
                         schema.upper, count, seed)
    return meshes, len(schema)


def _pin(pid: int, cpu: int, enabled: bool, notes: list[str]) -> None:
    if not enabled:
        return
    if not hasattr(os, "sched_setaffinity"):
        if "pin" not in " ".join(notes):
            notes.append("CPU pinning skipped: not available on this platform")
        return
    if (os.cpu_count() or 1) < 2:
        if "pin" not in " ".join(notes):
            notes.append("CPU pinning skipped: this machine has one CPU")
        return
    os.sched_setaffinity(pid, {cpu})


def _rss_mb(pid: int) -> float | None:
    status = Path(f"/proc/{pid}/status")
    if not status.exists():
        return None
    for line in status.read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024.0
    return None


@contextmanager
def _process(cmd: list[str], ready: Path, what: str, cpu: int, config: CheckConfig,
             notes: list[str]) -> Iterator[tuple[subprocess.Popen[bytes], dict[str, Any]]]:
    """Start ``cmd``, wait for its ready file, pin it; always stopped on exit."""
    errors = ready.with_suffix(".stderr")
    with errors.open("wb") as err:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err)
    try:
        _pin(proc.pid, cpu, config.pin, notes)
        deadline = time.monotonic() + 60
        while not ready.exists():
            if proc.poll() is not None or time.monotonic() > deadline:
                tail = errors.read_text(errors="replace").strip().splitlines()[-1:] or ["-"]
                raise LatencyCheckError(f"the {what} process did not start ({tail[0]})")
            time.sleep(0.02)
        yield proc, json.loads(ready.read_text())
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)


def run_check(config: CheckConfig, say: Callable[[str], None] = lambda _: None
              ) -> LatencyResult:
    """Measure the floor, then the server, back to back (see the module docstring)."""
    meshes, controls = bundle_meshes(config.bundle)
    return _run(config, meshes, controls, [], say)


def _run(config: CheckConfig, meshes: list[np.ndarray], controls: int, notes: list[str],
         say: Callable[[str], None]) -> LatencyResult:
    stream = config.stream or STREAM
    with tempfile.TemporaryDirectory(prefix="rigcast-latency-") as tmp:
        work = Path(tmp)
        np.save(work / "meshes.npy", np.stack(meshes))
        say(f"floor: echo process, {config.floor_duration_s:.1f} s at {config.fps:g} fps ...")
        echo_cmd = [sys.executable, "-m", "rigcast.live.latency_probe", "--ready",
                    str(work / "echo.json"), "--stream", stream, "--controls", str(controls)]
        with _process(echo_cmd, work / "echo.json", "echo", 0, config, notes):
            floor = _client(work, "echo", work / "echo.json", stream, config,
                            config.floor_duration_s, notes)
        if config.server is not None:
            ends = work / "server.json"
            ends.write_text(json.dumps({"input": config.server[0], "output": config.server[1]}))
            say(f"server at {config.server[0]}: {config.duration_s:g} s at {config.fps:g} fps ...")
            res = _client(work, "server", ends, stream, config, config.duration_s, notes)
            rss = None
            server = f"running server at {config.server[0]} (stream {stream})"
        else:
            say(f"server on {config.bundle}: {config.duration_s:g} s at {config.fps:g} fps ...")
            cmd = [sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--bundle",
                   f"{stream}={config.bundle.resolve()}", "--input", "tcp://127.0.0.1:*",
                   "--output", "tcp://127.0.0.1:*", "--ready-file", str(work / "server.json"),
                   "--fit-error-schedule", config.fit_error, "--telemetry-hz", "10", "--window", "1000",
                   "--log-level", "WARNING"]
            with _process(cmd, work / "server.json", "server", 0, config, notes) as (proc, _):
                res = _client(work, "server", work / "server.json", stream, config,
                              config.duration_s, notes)
                rss = _rss_mb(proc.pid)
                if rss is None:
                    notes.append("server memory skipped: no /proc on this platform")
            server = f"local server process (serve_main, fit error {config.fit_error})"
    return _result(config, meshes[0].shape[0], controls, floor["latency_ns"],
                   floor["max_sustained_fps"], res["latency_ns"], res["sent_ns"], res["lost"],
                   res["max_sustained_fps"], res["telemetry"] or {}, server, rss, notes)


def _client(work: Path, mode: str, endpoints: Path, stream: str, config: CheckConfig,
            seconds: float, notes: list[str]) -> dict[str, Any]:
    """Run the measuring client (latency_probe --role client) in its own process on CPU 1 and
    return its result (``latency_probe.measure``'s figures)."""
    result = work / f"client-{mode}.json"
    cmd = [sys.executable, "-m", "rigcast.live.latency_probe", "--role", "client", "--mode", mode,
           "--endpoints", str(endpoints), "--meshes", str(work / "meshes.npy"), "--stream",
           stream, "--fps", str(config.fps), "--duration", str(seconds), "--warmup",
           str(config.warmup_s), "--flat-seconds", str(config.flat_seconds), "--result",
           str(result)]
    errors = result.with_suffix(".stderr")
    with errors.open("wb") as err:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err)
    try:
        _pin(proc.pid, 1, config.pin, notes)
        code = proc.wait(config.warmup_s + seconds + config.flat_seconds + 120)
    except subprocess.TimeoutExpired:
        raise LatencyCheckError(f"the {mode} client did not finish in time") from None
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
    if not result.exists():
        tail = errors.read_text(errors="replace").strip().splitlines()[-1:] or ["-"]
        raise LatencyCheckError(f"the {mode} client failed with exit code {code} ({tail[0]})")
    out: dict[str, Any] = json.loads(result.read_text())
    if "error" in out:
        if mode == "echo":
            raise LatencyCheckError(f"no answer from the echo process ({out['error']})")
        raise LatencyCheckError(f"no controls for stream {stream!r} from "
                                f"{json.loads(endpoints.read_text())['output']} "
                                f"(is it serving this bundle's rig?)")
    return out


def _result(config: CheckConfig, vertices: int, controls: int, floor_lat: list[int],
            floor_max: float, lat: list[int], sent: list[int], lost: int, best: float,
            telemetry: dict[str, Any], server: str, rss: float | None,
            notes: list[str]) -> LatencyResult:
    if not lat or not floor_lat:
        raise LatencyCheckError("no frame came back in the paced run; nothing to report")
    f50, f95, f99 = ms_percentiles(floor_lat)
    p50, p95, p99 = ms_percentiles(lat)
    budget = 1000.0 / config.fps
    stages = {k: (v or {}).get("p50_ms") for k, v in (telemetry.get("latency") or {}).items()}
    t0 = sent[0] if sent else 0
    return LatencyResult(
        bundle=str(config.bundle), vertices=vertices, controls=controls, fps=config.fps,
        budget_ms=budget, frames=len(lat), lost=lost, p50_ms=p50, p95_ms=p95, p99_ms=p99,
        max_ms=float(np.max(lat)) / 1e6, floor_p50_ms=f50, floor_p95_ms=f95, floor_p99_ms=f99,
        floor_max_sustained_fps=floor_max, max_sustained_fps=best, headroom_ms=budget - p99,
        headroom_fraction=(budget - p99) / budget, stage_median_ms=stages, server=server,
        rss_mb=rss, notes=tuple(notes), latency_ms=[x / 1e6 for x in lat],
        sent_s=[(t - t0) / 1e9 for t in sent], floor_latency_ms=[x / 1e6 for x in floor_lat])


def summary_lines(r: LatencyResult) -> list[str]:
    """The terminal summary (the report's first section)."""
    stages = ", ".join(f"{k} {v:.3f}" for k, v in r.stage_median_ms.items() if v is not None)
    verdict = "sustains" if r.sustains_rate else "does NOT sustain"
    return [
        f"bundle {r.bundle}: {r.vertices} vertices, {r.controls} controls; {r.server}",
        f"transport floor (echo): p50 {r.floor_p50_ms:.3f} p95 {r.floor_p95_ms:.3f} "
        f"p99 {r.floor_p99_ms:.3f} ms; lockstep {r.floor_max_sustained_fps:,.0f} fps",
        f"end to end at {r.fps:g} fps ({r.frames} frames, {r.lost} lost): p50 {r.p50_ms:.3f} "
        f"p95 {r.p95_ms:.3f} p99 {r.p99_ms:.3f} max {r.max_ms:.3f} ms "
        f"({r.p50_ms / r.floor_p50_ms:.2f}x the floor's p50)",
        f"server stage medians (ms): {stages or 'none reported'}",
        f"frame budget {r.budget_ms:.2f} ms: headroom at p99 {r.headroom_ms:.2f} ms "
        f"({100 * r.headroom_fraction:.0f} %); largest sustained rate (lockstep) "
        f"{r.max_sustained_fps:,.0f} fps; {verdict} {r.fps:g} fps",
        *r.notes,
    ]


def write_report(folder: Path, r: LatencyResult) -> Path:
    """report.md, latency.json, and (with matplotlib) latency_histogram.png and
    latency_over_time.png in ``folder``; returns the Markdown path."""
    folder.mkdir(parents=True, exist_ok=True)
    data = asdict(r)
    (folder / "latency.json").write_text(json.dumps(data, indent=2))
    lines = ["# rigcast latency check", "", *(f"- {line}" for line in summary_lines(r)), ""]
    try:
        _plots(folder, r)
        lines += ["![latency histogram](latency_histogram.png)", "",
                  "![latency over time](latency_over_time.png)", ""]
    except ImportError:
        lines += ["Plots skipped: matplotlib is not installed (pip install 'rigcast[latency]').",
                  ""]
    path = folder / "report.md"
    path.write_text("\n".join(lines))
    return path


def _plots(folder: Path, r: LatencyResult) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4))
    top = max(r.max_ms, max(r.floor_latency_ms))
    bins = [float(x) for x in np.linspace(0.0, top * 1.02, 80)]
    ax.hist(r.floor_latency_ms, bins=bins, alpha=0.6, label="transport floor (echo)")
    ax.hist(r.latency_ms, bins=bins, alpha=0.6, label="server, end to end")
    for q, style in ((r.p50_ms, "-"), (r.p99_ms, "--")):
        ax.axvline(q, color="black", linestyle=style, linewidth=0.8)
    ax.set_xlabel("send -> controls (ms); lines: p50, p99")
    ax.set_ylabel("frames")
    ax.set_yscale("log")
    ax.legend()
    fig.tight_layout()
    fig.savefig(folder / "latency_histogram.png", dpi=100)
    plt.close(fig)
    fig, ax = plt.subplots(figsize=(7, 4))
    ax.plot(r.sent_s, r.latency_ms, ".", markersize=2)
    ax.axhline(r.budget_ms, color="red", linewidth=0.8, label=f"frame budget at {r.fps:g} fps")
    ax.set_xlabel("time (s)")
    ax.set_ylabel("send -> controls (ms)")
    ax.legend()
    fig.tight_layout()
    fig.savefig(folder / "latency_over_time.png", dpi=100)
    plt.close(fig)
