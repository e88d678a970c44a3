"""`rigcast serve` says what it does at default verbosity: its endpoints, streams and bundles at
start, then a status line every few seconds (from its own telemetry); --quiet silences both."""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path


def _serve(tmp_path: Path, bundle: Path, *extra: str) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "rigcast", "serve", "--bundle",
                             f"tiny={bundle}", "--input", "tcp://127.0.0.1:*", "--output",
                             "tcp://127.0.0.1:*", "--ready-file", str(tmp_path / "ready.json"),
                             *extra], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            stdin=subprocess.DEVNULL)


def test_serve_prints_endpoints_streams_and_status_lines(tmp_path: Path,
                                                         tiny_bundle: Path) -> None:
    proc = _serve(tmp_path, tiny_bundle, "--status-every", "0.5")
    assert proc.stdout is not None
    lines = []
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        assert line, proc.communicate()[1]
        lines.append(line)
        if line.startswith("status: tiny"):
            break
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=30)
    text = "".join(lines)
    assert proc.returncode == 130, err
    assert lines[0].startswith("serving: mesh frames in on tcp://127.0.0.1:")
    assert f"stream tiny: bundle {tiny_bundle}" in text
    assert lines[-1].startswith("status: tiny ")  # the stream's state with its reason
    assert "no input" in lines[-1] or "waiting" in lines[-1]


def test_serve_quiet_prints_nothing(tmp_path: Path, tiny_bundle: Path) -> None:
    proc = _serve(tmp_path, tiny_bundle, "--quiet", "--status-every", "0.2")
    deadline = time.monotonic() + 60
    while not (tmp_path / "ready.json").exists():
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.05)
    time.sleep(1.0)  # five status periods
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130, err
    assert out == ""
