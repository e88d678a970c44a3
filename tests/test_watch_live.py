"""`rigcast watch` as an operator relies on it, with real processes and sockets: "server silent"
within 2 s of a kill -9 of the server, "no input" within 2 s of the sender stopping, a monitor
that has only the publish endpoint shows every stream, and the compact view fits 8 actors in a
real 80 x 24 terminal (tmux capture-pane)."""

from __future__ import annotations

import contextlib
import os
import queue
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from conftest import server_process, tiny_rig
from rigcast.runtime.messaging.client import MeshSender

from rigcast.live.watch_state import NO_INPUT, SILENT, WatchState

ACTORS = [f"actor{i}" for i in range(1, 9)]


class Lines:
    """A subprocess whose stdout lines are read by a thread, with their arrival times."""

    def __init__(self, *args: str) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "rigcast", *args],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                     stdin=subprocess.DEVNULL)
        self.lines: queue.Queue[tuple[float, str]] = queue.Queue()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.put((time.monotonic(), line.rstrip("\n")))

    def wait_for(self, text: str, timeout_s: float, *, unless: str | None = None) -> float:
        """The arrival time of the first line holding ``text`` (and not ``unless``)."""
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            try:
                at, line = self.lines.get(timeout=left)
            except queue.Empty:
                break
            if text in line and (unless is None or unless not in line):
                return at
        raise AssertionError(f"no line with {text!r} within {timeout_s} s")

    def stop(self) -> tuple[int, str]:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
        try:
            self.proc.wait(10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(5)
        err = self.proc.stderr.read() if self.proc.stderr else ""
        for stream in (self.proc.stdout, self.proc.stderr):
            if stream is not None:
                stream.close()
        return self.proc.returncode, err


@contextlib.contextmanager
def watching(*args: str) -> Iterator[Lines]:
    watch = Lines("watch", *args)
    try:
        yield watch
    finally:
        code, err = watch.stop()
        assert "Traceback" not in err, err
        assert code == 130, err  # Ctrl-C, as for every command


def _send_for(endpoint: str, stream: str, seconds: float, fps: float = 60.0) -> None:
    rig = tiny_rig()
    mesh = rig.evaluate(np.full((1, len(rig.schema)), 0.3))[0]
    with MeshSender(endpoint) as sender:
        end = time.monotonic() + seconds
        frame = 0
        while time.monotonic() < end:
            sender.send(stream, frame, mesh)
            frame += 1
            time.sleep(1.0 / fps)


def test_server_silent_within_2_s_of_a_kill_9(tmp_path: Path, tiny_bundle: Path) -> None:
    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (server, ready), \
            watching("--plain", "--from", ready["output"], "--to", "") as watch:
        watch.wait_for("[tiny] state:", 20)
        os.kill(server.pid, signal.SIGKILL)
        killed = time.monotonic()
        seen = watch.wait_for(f"[tiny] state: {SILENT}", 10)
    assert seen - killed < 2.0, f"server silent shown {seen - killed:.2f} s after kill -9"


def test_no_input_within_2_s_of_the_sender_stopping(tmp_path: Path, tiny_bundle: Path) -> None:
    with server_process(["--bundle", f"tiny={tiny_bundle}"], tmp_path) as (_, ready), \
            watching("--plain", "--from", ready["output"], "--to", "") as watch:
        watch.wait_for("[tiny] state:", 20)
        sender = threading.Thread(target=_send_for, args=(ready["input"], "tiny", 2.5))
        sender.start()
        # input arrives: live, or over budget on a loaded machine; no longer "no input"
        watch.wait_for("[tiny] state:", 10, unless=NO_INPUT)
        sender.join()
        stopped = time.monotonic()
        seen = watch.wait_for(f"[tiny] state: {NO_INPUT}", 10)
    assert seen - stopped < 2.0, f"no input shown {seen - stopped:.2f} s after the sender stopped"


def test_a_monitor_with_only_the_publish_endpoint_shows_every_stream(
        tmp_path: Path, tiny_bundle: Path) -> None:
    bundles = [arg for a in ACTORS[:3] for arg in ("--bundle", f"{a}={tiny_bundle}")]
    with server_process(bundles, tmp_path) as (_, ready):
        done = subprocess.run([sys.executable, "-m", "rigcast", "watch", "--once", "--plain",
                               "--from", ready["output"], "--to", ""], capture_output=True,
                              text=True, timeout=60, stdin=subprocess.DEVNULL)
    assert done.returncode == 0, done.stderr
    for actor in ACTORS[:3]:
        assert f"[{actor}] state: {NO_INPUT}" in done.stdout or \
            f"[{actor}] state: live" in done.stdout, done.stdout


@pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed")
def test_compact_view_fits_8_actors_in_80_x_24(tmp_path: Path, tiny_bundle: Path) -> None:
    bundles = [arg for a in ACTORS for arg in ("--bundle", f"{a}={tiny_bundle}")]
    socket = f"rigcast-test-{os.getpid()}"
    tmux = ["tmux", "-L", socket, "-f", "/dev/null"]
    with server_process(bundles, tmp_path) as (_, ready):
        command = (f"{sys.executable} -m rigcast watch --compact --from {ready['output']} "
                   f"--to ''")
        subprocess.run([*tmux, "new-session", "-d", "-x", "80", "-y", "24", command],
                       check=True, env={**os.environ, "TERM": "xterm-256color"})
        try:
            deadline = time.monotonic() + 30
            screen = ""
            while time.monotonic() < deadline:
                screen = subprocess.run([*tmux, "capture-pane", "-p"], capture_output=True,
                                        text=True, check=True).stdout
                if all(a in screen for a in ACTORS) and "no input" in screen:
                    break
                time.sleep(0.2)
        finally:
            subprocess.run([*tmux, "kill-server"], check=False)
    rows = screen.splitlines()
    assert len(rows) <= 24 and all(len(r) <= 80 for r in rows)
    for actor in ACTORS:
        row = next((r for r in rows if r.startswith(actor)), None)
        assert row is not None, f"{actor} not on the screen:\n{screen}"
        assert NO_INPUT in row  # the state and its reason on the actor's one line
    assert rows[0].startswith("actor") and "state" in rows[0]


def test_states_follow_the_messages() -> None:
    """The state machine alone, on a clock we choose (pure function of the folded messages)."""
    state = WatchState()
    tel = {"type": "telemetry", "stream": "a", "processed": 5, "input_fps": 60.0,
           "latency": {"total": {"p95_ms": 1.0}}, "fit_error": {"rms": 0.002, "threshold": 0.004,
                                                                 "off_manifold": 0}}
    state.add(tel, now=10.0)
    view = state.streams["a"]
    assert state.health(view, 10.1).state == "live"
    assert view.fit_ratio() == pytest.approx(0.5)
    assert state.health(view, 11.05).state == SILENT  # nothing heard for 1.05 s
    state.heard(11.05)
    assert state.health(view, 11.1).state == NO_INPUT  # heard, but the counters stood still
    state.add({**tel, "processed": 9, "latency": {"total": {"p95_ms": 30.0}}}, now=11.2)
    assert state.health(view, 11.3).state == "over budget"  # 30 ms > 16.7 ms at 60 fps
    state.add({**tel, "processed": 12, "fit_error": {"rms": 0.01, "threshold": 0.004,
                                                      "off_manifold": 1,
                                                      "last_off_manifold_frame": 12}}, now=11.4)
    health = state.health(view, 11.5)
    assert health.state == "off-manifold" and "2.5x the threshold" in health.reason
    # The flagged frame's own fit from its event, not the latest frame's (adaptive: on the max)
    state.add({"type": "event", "kind": "off_manifold", "stream": "a", "frame": 12, "rms": 0.01,
               "max": 0.03, "threshold": 0.006, "threshold_on": "max"}, now=11.45)
    health = state.health(view, 11.5)
    assert health.reason == "frame 12: fit 5.0x the threshold"
