"""Ctrl-C gives exit code 130 for every long-running command, and a second Ctrl-C never prints a
traceback: real `rigcast` subprocesses, real SIGINT (exit 130 = 128 + SIGINT, the shell's
convention, POSIX `wait` status of a signal-terminated child as shells report it)."""

from __future__ import annotations

import contextlib
import queue
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from conftest import server_process, tiny_rig, wait_for_controls

_STARTED: list[subprocess.Popen[str]] = []


@pytest.fixture(autouse=True)
def _reap() -> Iterator[None]:
    """Every process a test started is gone after it, whatever the test's outcome."""
    yield
    while _STARTED:
        proc = _STARTED.pop()
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        for stream in (proc.stdout, proc.stderr):
            if stream is not None:
                stream.close()


class Running:
    """``rigcast ARGS`` with its stdout and stderr read line by line by threads."""

    def __init__(self, *args: str) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "rigcast", *args],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                     stdin=subprocess.DEVNULL)
        _STARTED.append(self.proc)
        self.queue: queue.Queue[str] = queue.Queue()
        self.out: list[str] = []
        self.err: list[str] = []
        self.readers = [threading.Thread(target=self._read, args=(stream, into), daemon=True)
                        for stream, into in ((self.proc.stdout, self.out),
                                             (self.proc.stderr, self.err))]
        for reader in self.readers:
            reader.start()

    def _read(self, stream: object, into: list[str]) -> None:
        for line in stream:  # type: ignore[attr-defined]
            into.append(line)
            self.queue.put(line)

    def wait_for(self, text: str, timeout_s: float = 30.0) -> None:
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            assert self.proc.poll() is None or not self.queue.empty(), "".join(self.err)
            try:
                if text in self.queue.get(timeout=min(left, 0.5)):
                    return
            except queue.Empty:
                continue
        raise AssertionError(f"{text!r} not printed; stderr: {''.join(self.err)}")

    def interrupt(self, times: int = 1, gap_s: float = 0.0) -> tuple[int, str]:
        for i in range(times):
            if self.proc.poll() is None:
                self.proc.send_signal(signal.SIGINT)
            if i + 1 < times:
                time.sleep(gap_s)
        code = self.proc.wait(30)
        for reader in self.readers:  # they end at the pipes' end of file
            reader.join(10)
        # A pipe still open means a child (a pool worker) outlived the command.
        assert not any(r.is_alive() for r in self.readers), "a child process outlived it"
        for stream in (self.proc.stdout, self.proc.stderr):
            if stream is not None:
                stream.close()
        return code, "".join(self.err)


@pytest.fixture(scope="module")
def take(tmp_path_factory: pytest.TempPathFactory) -> Path:
    rig = tiny_rig()
    controls = np.full((60, len(rig.schema)), 0.4)
    path = tmp_path_factory.mktemp("takes") / "take.npz"
    np.savez(path, vertices=rig.evaluate(controls), times=np.arange(60) / 60.0)
    return path


@contextlib.contextmanager
def served(tmp_path: Path, bundle: Path) -> Iterator[dict[str, str]]:
    with server_process(["--bundle", f"tiny={bundle}"], tmp_path) as (_, ready):
        yield ready


def _check(code: int, err: str) -> None:
    assert code == 130, err
    assert "Traceback" not in err, err


@pytest.mark.parametrize("times", [1, 2])
def test_serve_exits_130_on_ctrl_c(tmp_path: Path, tiny_bundle: Path, times: int) -> None:
    ready = tmp_path / "ready.json"
    serve = Running("serve", "--bundle", f"tiny={tiny_bundle}", "--input", "tcp://127.0.0.1:*",
                    "--output", "tcp://127.0.0.1:*", "--ready-file", str(ready))
    deadline = time.monotonic() + 30
    while not ready.exists():
        assert serve.proc.poll() is None and time.monotonic() < deadline, "".join(serve.err)
        time.sleep(0.02)
    _check(*serve.interrupt(times))


@pytest.mark.parametrize("times", [1, 2])
def test_send_exits_130_on_ctrl_c(tmp_path: Path, tiny_bundle: Path, take: Path,
                                  times: int) -> None:
    with served(tmp_path, tiny_bundle) as ends:
        send = Running("-v", "send", str(take), "--to", ends["input"], "--from", ends["output"],
                       "--stream", "tiny", "--loop")
        send.wait_for("serves")
        _check(*send.interrupt(times))


@pytest.mark.parametrize("times", [1, 2])
def test_record_saves_what_it_has_and_exits_130(tmp_path: Path, tiny_bundle: Path, take: Path,
                                                times: int) -> None:
    out = tmp_path / "live.npz"
    with served(tmp_path, tiny_bundle) as ends:
        sender = Running("-v", "send", str(take), "--to", ends["input"], "--from", ends["output"],
                         "--stream", "tiny", "--loop", "--duration", "30")
        record = Running("record", "-o", str(out), "--from", ends["output"], "--to",
                         ends["input"])
        record.wait_for("Ctrl-C stops")
        sender.wait_for("serves")
        wait_for_controls(ends["output"], "tiny")
        time.sleep(1.0)  # frames arrive at 60 fps meanwhile
        code, err = record.interrupt(times, gap_s=0.01)
        sender.interrupt()
    _check(code, err)
    if times == 1:  # after one Ctrl-C the file holds what arrived
        assert out.exists() and "recorded" in "".join(record.out)


def test_watch_and_osc_exit_130_on_ctrl_c(tmp_path: Path, tiny_bundle: Path, take: Path) -> None:
    pytest.importorskip("pythonosc")
    with served(tmp_path, tiny_bundle) as ends:
        sender = Running("send", str(take), "--to", ends["input"], "--from", ends["output"],
                         "--stream", "tiny", "--loop", "--duration", "30")
        watch = Running("watch", "--plain", "--from", ends["output"], "--to", "")
        osc = Running("osc", "--osc", "127.0.0.1:9", "--from", ends["output"], "--to",
                      ends["input"], "--stream", "tiny")
        watch.wait_for("[tiny] state:")
        osc.wait_for("relaying stream")
        _check(*watch.interrupt(2, gap_s=0.005))
        _check(*osc.interrupt())
        sender.interrupt()


def test_a_batch_solve_exits_130_on_a_double_ctrl_c(tmp_path: Path, tiny_bundle: Path) -> None:
    rig = tiny_rig()
    takes = tmp_path / "takes"
    takes.mkdir()
    for i in range(12):
        controls = np.random.default_rng(i).random((3000, len(rig.schema)))
        np.save(takes / f"t{i:02d}.npy", rig.evaluate(controls))
    solve = Running("solve", str(tiny_bundle), str(takes), "-o", str(tmp_path / "out"),
                    "--workers", "1", "--fps", "30")
    solve.wait_for("[1/12]", 120)
    _check(*solve.interrupt(2, gap_s=0.02))
