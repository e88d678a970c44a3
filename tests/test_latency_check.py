"""`rigcast latency-check` end to end, as a user runs it: a real server process on a bundle, the
sender in a process of its own, the floor from a real echo process, and the report it writes.

The run on the demo face bundle is in tests/test_demo.py, on the bundle `rigcast demo` builds.
Timing figures are not asserted here (they belong to bench/; bench/latency_agreement.py compares
this command with bench/latency.py back to back); what is checked is that every figure is there,
consistent with the others (p50 <= p95 <= p99 <= max, headroom = budget - p99), and drawn from the
frames the run sent."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest


def run_latency_check(bundle: Path, out: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    cmd = [sys.executable, "-m", "rigcast", "latency-check", str(bundle), "--fps", "60",
           "--duration", "1.5", "--floor-duration", "0.7", "--flat-seconds", "0.3",
           "--warmup", "0.3", "--out", str(out), *extra]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=180)


def check_report(out: Path, done: subprocess.CompletedProcess[str], vertices: int) -> None:
    assert done.returncode == 0, done.stderr
    data = json.loads((out / "latency.json").read_text())
    assert data["vertices"] == vertices
    assert data["p50_ms"] <= data["p95_ms"] <= data["p99_ms"] <= data["max_ms"]
    assert data["floor_p50_ms"] <= data["floor_p95_ms"] <= data["floor_p99_ms"]
    assert data["budget_ms"] == pytest.approx(1000 / 60)
    assert data["headroom_ms"] == pytest.approx(data["budget_ms"] - data["p99_ms"])
    # 1.5 s at 60 fps after the warm-up: about 90 timed frames, each sent and answered
    assert 80 <= data["frames"] + data["lost"] <= 100
    assert len(data["latency_ms"]) == data["frames"] == len(data["sent_s"])
    assert data["max_sustained_fps"] > 0 and data["floor_max_sustained_fps"] > 0
    assert data["stage_median_ms"]["total"] is not None
    report = (out / "report.md").read_text()
    assert "p99" in report and "largest sustained rate" in report
    for plot in ("latency_histogram.png", "latency_over_time.png"):
        assert (out / plot).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "end to end at 60 fps" in done.stdout and "transport floor" in done.stdout


def test_latency_check_runs_end_to_end_on_a_bundle(tmp_path: Path, tiny_bundle: Path) -> None:
    done = run_latency_check(tiny_bundle, tmp_path / "report")
    check_report(tmp_path / "report", done, 300)


def test_latency_check_refuses_bad_server_endpoints(tmp_path: Path, tiny_bundle: Path) -> None:
    done = run_latency_check(tiny_bundle, tmp_path / "r", "--server", "127.0.0.1:5570")
    assert done.returncode == 2
    assert done.stderr.startswith("rigcast: error: --server must be INPUT,OUTPUT")
    assert "Traceback" not in done.stderr


def test_latency_check_against_a_running_server(tmp_path: Path, tiny_bundle: Path) -> None:
    from conftest import server_process

    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (_, ready):
        done = run_latency_check(tiny_bundle, tmp_path / "report", "--server",
                    f"{ready['input']},{ready['output']}", "--stream", "tiny")
    check_report(tmp_path / "report", done, 300)
    assert "running server at" in done.stdout


def test_a_running_server_without_the_stream_is_one_line(tmp_path: Path,
                                                          tiny_bundle: Path) -> None:
    # the measuring client runs in its own process; its handshake failure still comes back to
    # the command as one line naming the stream, with no traceback
    from conftest import server_process

    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (_, ready):
        done = run_latency_check(tiny_bundle, tmp_path / "report", "--server",
                    f"{ready['input']},{ready['output']}", "--stream", "nobody")
    assert done.returncode != 0
    assert done.stderr.startswith("rigcast: error: no controls for stream 'nobody'")
    assert "Traceback" not in done.stderr


def test_the_frames_are_the_latency_bench_frames(tmp_path: Path) -> None:
    # bench/latency.py and the command are compared back to back (bench/latency_agreement.py);
    # on the bench's synthetic bundle the command's frames (its forward model at
    # latency_probe.pose_meshes's controls) must be the bench's own rig poses
    import importlib.util

    from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle

    from rigcast.live.latency_check import bundle_meshes

    path = Path(__file__).parents[1] / "bench" / "latency.py"
    spec = importlib.util.spec_from_file_location("latency_bench", path)
    assert spec is not None and spec.loader is not None
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    vertices = 600
    bundle = build_synthetic_bundle(tmp_path / "b.rcb", vertices=vertices,
                                    controls=bench.CONTROLS, inputs=bench.INPUTS,
                                    stable=bench.STABLE, inverse="mlp", hidden=16,
                                    seed=bench.SEED, fit_rms=10.0, name="b")
    ours, controls = bundle_meshes(bundle)
    theirs = bench.make_meshes(vertices)
    assert controls == bench.CONTROLS and len(ours) == len(theirs)
    # float32 ONNX MatMul against the rig's float64 einsum: equal to float32 rounding
    for a, b in zip(ours, theirs, strict=True):
        np.testing.assert_allclose(a, b, atol=1e-5)
