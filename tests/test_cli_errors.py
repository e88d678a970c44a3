"""Errors a user sees: one readable line on stderr, a documented exit code, never a traceback.

Each test runs ``python -m rigcast ...`` in a subprocess, as a user would.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zmq

EXIT_FAILURE = 1
EXIT_USAGE = 2
PREFIX = "rigcast: error: "


def rigcast(*args: str, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rigcast", *args], capture_output=True,
                          text=True, timeout=timeout, check=False, stdin=subprocess.DEVNULL)


def error_line(proc: subprocess.CompletedProcess[str], code: int) -> str:
    """Assert the exit code, no traceback, and exactly one error line; return it."""
    assert "Traceback" not in proc.stderr and "Traceback" not in proc.stdout, proc.stderr
    assert proc.returncode == code, (proc.returncode, proc.stderr)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    errors = [ln for ln in lines if ln.startswith(PREFIX)]
    assert len(errors) == 1, proc.stderr
    line = errors[0]
    assert " — " in line, f"no advice in: {line}"
    return line


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def test_missing_bundle_file(tmp_path: Path) -> None:
    line = error_line(rigcast("inspect", str(tmp_path / "nope.rcb")), EXIT_FAILURE)
    assert "nope.rcb does not exist" in line


def test_missing_take_file(tiny_bundle: Path, tmp_path: Path) -> None:
    proc = rigcast("solve", str(tiny_bundle), str(tmp_path / "gone.npz"), "-o",
                   str(tmp_path / "o.csv"))
    line = error_line(proc, EXIT_FAILURE)
    assert "gone.npz" in line and "no such file" in line


def test_corrupt_bundle(tiny_bundle: Path, tmp_path: Path) -> None:
    bad = tmp_path / "bad.rcb"
    data = bytearray(tiny_bundle.read_bytes())
    data[len(data) // 2 : len(data) // 2 + 64] = b"\x00" * 64  # inside a stored member
    bad.write_bytes(bytes(data))
    line = error_line(rigcast("inspect", str(bad)), EXIT_FAILURE)
    assert "bad.rcb" in line
    junk = tmp_path / "junk.rcb"
    junk.write_text("not a bundle at all")
    line = error_line(rigcast("inspect", str(junk)), EXIT_FAILURE)
    assert "not a rigcast bundle" in line


def test_solve_take_of_another_rig(tiny_bundle: Path, tmp_path: Path) -> None:
    take = tmp_path / "other.npy"
    np.save(take, np.zeros((5, 200, 3), np.float32))
    proc = rigcast("solve", str(tiny_bundle), str(take), "-o", str(tmp_path / "o.csv"))
    line = error_line(proc, EXIT_FAILURE)
    assert "200 vertices" in line and "300" in line


def test_wrong_vertex_count_in_a_take_file(tiny_bundle: Path, tmp_path: Path) -> None:
    take = tmp_path / "flat.npy"
    np.save(take, np.zeros((5, 300), np.float32))
    proc = rigcast("solve", str(tiny_bundle), str(take), "-o", str(tmp_path / "o.csv"))
    line = error_line(proc, EXIT_FAILURE)
    assert "flat.npy" in line


def _serve(bundle: Path, tmp: Path, stream: str) -> tuple[subprocess.Popen[str], dict[str, str]]:
    ready = tmp / "ready.json"
    proc = subprocess.Popen(
        [sys.executable, "-m", "rigcast", "serve", "--bundle", f"{stream}={bundle}", "--input",
         "tcp://127.0.0.1:*", "--output", "tcp://127.0.0.1:*", "--ready-file", str(ready)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL)
    deadline = time.monotonic() + 30
    while not ready.exists():
        assert proc.poll() is None and time.monotonic() < deadline, "server did not start"
        time.sleep(0.05)
    return proc, json.loads(ready.read_text())


def test_send_to_a_server_of_another_rig(other_bundle: Path, tmp_path: Path) -> None:
    take = tmp_path / "tiny.npy"
    np.save(take, np.zeros((5, 300, 3), np.float32))
    server, ends = _serve(other_bundle, tmp_path, "other")
    try:
        proc = rigcast("send", str(take), "--to", ends["input"], "--stream", "other")
    finally:
        server.send_signal(signal.SIGTERM)
        server.communicate(timeout=10)
    line = error_line(proc, EXIT_FAILURE)
    assert "300 vertices" in line and "200" in line


def test_send_with_no_server(tmp_path: Path) -> None:
    take = tmp_path / "t.npy"
    np.save(take, np.zeros((5, 30, 3), np.float32))
    proc = rigcast("send", str(take), "--to", f"tcp://127.0.0.1:{free_port()}", "--stream", "x",
                   "--timeout", "0.5")
    line = error_line(proc, EXIT_FAILURE)
    assert "no server answered" in line


def test_port_in_use(tiny_bundle: Path) -> None:
    ctx = zmq.Context()
    holder = ctx.socket(zmq.PULL)
    holder.setsockopt(zmq.LINGER, 0)
    port = holder.bind_to_random_port("tcp://127.0.0.1")
    try:
        proc = rigcast("serve", "--bundle", str(tiny_bundle), "--input",
                       f"tcp://127.0.0.1:{port}", "--output", "tcp://127.0.0.1:*", timeout=30)
    finally:
        holder.close(linger=0)
        ctx.term()
    line = error_line(proc, EXIT_FAILURE)
    assert str(port) in line and "in use" in line.lower()


@pytest.mark.parametrize(
    ("flags", "needle"),
    [
        (["--telemetry-hz", "-1"], "telemetry_hz"),
        (["--input", "tcp://0.0.0.0:5999"], "not a loopback address"),
        (["--config", "missing.toml"], "missing.toml"),
    ],
)
def test_bad_server_config(tiny_bundle: Path, flags: list[str], needle: str) -> None:
    line = error_line(rigcast("serve", "--bundle", str(tiny_bundle), *flags), EXIT_USAGE)
    assert needle in line


def test_bad_toml_config(tiny_bundle: Path, tmp_path: Path) -> None:
    cfg = tmp_path / "stage.toml"
    cfg.write_text(f'[streams.a]\nbundle = "{tiny_bundle}"\nbeta = "fast"\n')
    line = error_line(rigcast("serve", "--config", str(cfg)), EXIT_USAGE)
    assert "beta" in line


@pytest.mark.skipif(not Path(__file__).parent.parent.joinpath("export", "rigs", "rig_loader.py").exists(),
                    reason="export/rigs/rig_loader.py has not landed")
def test_bad_rig_spec(tmp_path: Path) -> None:
    line = error_line(rigcast("build", "nosuch:thing", "-o", str(tmp_path / "x.rcb")),
                      EXIT_USAGE)
    assert "nosuch:thing" in line


def test_bad_rehearsal_option(tmp_path: Path) -> None:
    take = tmp_path / "t.npy"
    np.save(take, np.zeros((5, 30, 3), np.float32))
    proc = rigcast("send", str(take), "--stream", "x", "--drop-rate", "1.5", "--to",
                   f"tcp://127.0.0.1:{free_port()}", "--timeout", "0.3")
    line = error_line(proc, EXIT_USAGE)  # checked before any server is asked
    assert "drop_rate" in line and "1.5" in line
    # Without --stream the server would be asked for one first; bad options still come first.
    # A server would be waited for 30 s; the process's own start on a loaded machine takes a few.
    t0 = time.monotonic()
    proc = rigcast("send", str(take), "--fps", "0", "--to", f"tcp://127.0.0.1:{free_port()}",
                   "--timeout", "30")
    line = error_line(proc, EXIT_USAGE)
    assert "--fps must be a positive number, got 0" in line
    assert time.monotonic() - t0 < 20, "the option was checked after waiting for a server"


def test_usage_error_is_exit_2() -> None:
    proc = rigcast("solve")
    assert proc.returncode == EXIT_USAGE
    assert "Traceback" not in proc.stderr
    # One line, naming what is missing and where the usage is.
    line = error_line(proc, EXIT_USAGE)
    assert "solve: the following arguments are required: bundle, take" in line
    assert "`rigcast solve --help`" in line
    bad = rigcast("serve", "--max-streams", "abc")
    line = error_line(bad, EXIT_USAGE)
    assert "argument --max-streams: invalid int value: 'abc'" in line
