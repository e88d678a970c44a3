"""Every subcommand run as a user runs it: ``python -m rigcast ...`` in a subprocess, with real
files and a real server on random loopback ports."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from conftest import tiny_rig, wait_for_controls

from rigcast.writers.animation_out import read_csv, read_json

SUBCOMMANDS = ("demo", "build", "inspect", "serve", "send", "watch", "record", "solve")


def rigcast(*args: str, timeout: float = 60.0, cwd: Path | None = None
            ) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rigcast", *args], capture_output=True,
                          text=True, timeout=timeout, check=False, cwd=cwd,
                          stdin=subprocess.DEVNULL)


def start_rigcast(*args: str) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "rigcast", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL)


@pytest.fixture(scope="module")
def tiny_take(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """120 frames of the tiny rig (conftest.TINY) from smooth known controls, as NPZ."""
    rig = tiny_rig()
    t = np.arange(120) / 60.0
    phases = np.arange(len(rig.schema))[None, :]
    controls = 0.5 + 0.4 * np.sin(2 * np.pi * 0.7 * t[:, None] + phases)
    path = tmp_path_factory.mktemp("takes") / "tiny_take.npz"
    np.savez(path, vertices=rig.evaluate(controls), times=t)
    np.save(path.with_name("controls_true.npy"), controls.astype(np.float32))
    return path


@contextlib.contextmanager
def serving(bundle: Path, tmp: Path, stream: str = "tiny") -> Iterator[dict[str, str]]:
    """``rigcast serve`` in a subprocess on random ports; its ready file gives the endpoints."""
    ready = tmp / f"ready-{stream}.json"
    proc = start_rigcast("serve", "--bundle", f"{stream}={bundle}", "--input",
                         "tcp://127.0.0.1:*", "--output", "tcp://127.0.0.1:*",
                         "--telemetry-hz", "20", "--ready-file", str(ready))
    try:
        deadline = time.monotonic() + 30
        while not ready.exists():
            assert proc.poll() is None, proc.communicate()[1]
            assert time.monotonic() < deadline, "server did not start"
            time.sleep(0.05)
        yield json.loads(ready.read_text())
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.communicate(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, f"serve exited {proc.returncode}"


@pytest.mark.parametrize("command", SUBCOMMANDS)
def test_every_subcommand_has_help_with_examples(command: str) -> None:
    proc = rigcast(command, "--help")
    assert proc.returncode == 0, proc.stderr
    assert f"usage: rigcast {command}" in proc.stdout
    assert "examples:" in proc.stdout
    assert f"rigcast {command}" in proc.stdout.split("examples:")[1]


def test_top_level_help_lists_every_subcommand_and_exit_codes() -> None:
    proc = rigcast("--help")
    assert proc.returncode == 0
    for command in SUBCOMMANDS:
        assert f"    {command} " in proc.stdout
    assert "exit codes" in proc.stdout


def test_serve_help_loads_no_torch() -> None:
    code = ("import sys, rigcast.commands.cli as c\n"
            "try:\n    c.main(['serve', '--help'])\nexcept SystemExit:\n    pass\n"
            "print('TORCH' if 'torch' in sys.modules else 'NO-TORCH')")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60, check=False)
    assert proc.stdout.strip().splitlines()[-1] == "NO-TORCH"


def test_inspect_prints_schema_sizes_and_fingerprint(tiny_bundle: Path) -> None:
    proc = rigcast("inspect", str(tiny_bundle))
    assert proc.returncode == 0, proc.stderr
    assert "fingerprint: " in proc.stdout
    assert "vertices: 300" in proc.stdout
    assert "inverse_fit_rms: 0.002" in proc.stdout
    for i in range(8):
        assert f"shape_{i:02d}" in proc.stdout
    as_json = json.loads(rigcast("inspect", str(tiny_bundle), "--json").stdout)
    assert as_json["control_count"] == 8
    assert len(as_json["bundle_fingerprint"]) == 16


def test_solve_writes_csv_and_json_close_to_the_known_controls(
    tiny_bundle: Path, tiny_take: Path, tmp_path: Path
) -> None:
    truth = np.load(tiny_take.with_name("controls_true.npy"))
    out_csv = tmp_path / "take.csv"
    proc = rigcast("solve", str(tiny_bundle), str(tiny_take), "-o", str(out_csv))
    assert proc.returncode == 0, proc.stderr
    assert "solved 120 frames" in proc.stdout
    names, values, _ = read_csv(out_csv)
    assert names == tuple(f"shape_{i:02d}" for i in range(8))
    assert values.shape == (120, 8)
    # The tiny bundle's inverse is the exact least-squares solve, so unfiltered it is the truth.
    assert np.abs(values - truth).max() < 1e-3
    out_json = tmp_path / "take.json"
    proc = rigcast("solve", str(tiny_bundle), str(tiny_take), "-o", str(out_json),
                   "--filter", "smooth")
    assert proc.returncode == 0, proc.stderr
    schema, smooth, times = read_json(out_json)
    assert len(schema) == 8 and smooth.shape == (120, 8)
    assert np.allclose(times, np.arange(120) / 60.0)
    # Zero-phase smoothing of a 0.7 Hz curve with a 3 Hz cutoff stays close to it.
    assert np.abs(smooth - truth)[10:-10].max() < 0.1


def test_serve_send_record_and_watch_together(
    tiny_bundle: Path, tiny_take: Path, tmp_path: Path
) -> None:
    out = tmp_path / "live.csv"
    with serving(tiny_bundle, tmp_path) as ends:
        recorder = start_rigcast("record", "-o", str(out), "--frames", "30", "--from",
                                 ends["output"], "--to", ends["input"], "--stream", "tiny")
        sender = start_rigcast("send", str(tiny_take), "--to", ends["input"], "--from",
                               ends["output"], "--fps", "60", "--loop", "--duration", "6",
                               "--corrupt-rate", "0.1", "--seed", "3")
        # The watch's one snapshot needs controls: it starts once frames flow, and the sender
        # goes on long enough for a slow start of the watch on a loaded machine.
        wait_for_controls(ends["output"], "tiny")
        watch = rigcast("watch", "--once", "--from", ends["output"], "--to", ends["input"],
                        timeout=30)
        send_out, send_err = sender.communicate(timeout=30)
        rec_out, rec_err = recorder.communicate(timeout=30)
    assert watch.returncode == 0, watch.stderr
    for stage in ("decode", "align", "infer", "filter", "publish", "total"):
        assert stage in watch.stdout
    assert "p99" in watch.stdout and "most active controls" in watch.stdout
    assert "shape_0" in watch.stdout  # bars are named from the schema reply
    assert sender.returncode == 0, send_err
    assert "rejected by the server" in send_out
    for reason in ("non_finite", "bad_vertex_count", "malformed"):
        assert reason in send_out.split("rejected by the server")[1]
    assert recorder.returncode == 0, rec_err
    assert "recorded 30 frames" in rec_out
    names, values, times = read_csv(out)
    assert values.shape == (30, 8) and names[0] == "shape_00"
    assert np.all(np.diff(times) > 0)
    assert np.all((values >= 0.0) & (values <= 1.0))


def test_watch_plain_duration_prints_lines(tiny_bundle: Path, tmp_path: Path) -> None:
    with serving(tiny_bundle, tmp_path, stream="quiet") as ends:
        proc = rigcast("watch", "--plain", "--duration", "1.5", "--from", ends["output"],
                       "--to", ends["input"], timeout=30)
    assert proc.returncode == 0, proc.stderr
    assert "[quiet] fps" in proc.stdout
    assert "[quiet] latency p50/p99 ms" in proc.stdout


@pytest.mark.skipif(not Path(__file__).parent.parent.joinpath("export", "rigs", "rig_loader.py").exists(),
                    reason="export/rigs/rig_loader.py has not landed")
def test_build_a_tiny_bundle_then_inspect_it(tmp_path: Path) -> None:
    out = tmp_path / "arm.rcb"
    env_cache = tmp_path / "cache"
    proc = rigcast("build", "demo:arm", "--samples", "300", "--steps", "60", "--epochs", "3",
                   "-o", str(out), "--cache", str(env_cache), "--report", str(tmp_path / "rep"),
                   "--quiet", timeout=240)
    assert proc.returncode == 0, proc.stderr
    assert out.exists()
    assert "forward model: mean vertex error" in proc.stdout
    assert (tmp_path / "rep" / "report.md").exists()
    again = rigcast("build", "demo:arm", "--samples", "300", "--steps", "60", "--epochs", "3",
                    "-o", str(out), "--cache", str(env_cache), "--quiet", timeout=240)
    assert again.returncode == 0, again.stderr
    assert "reused from the cache" in again.stdout
    info = rigcast("inspect", str(out))
    assert info.returncode == 0 and "controls:" in info.stdout
    assert os.path.getsize(out) > 1000
