"""Shared fixtures: tiny synthetic bundles (no torch) and real servers on random loopback ports."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zmq
from rigcast.export.bundling.synthetic_bundle import SyntheticRig, build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.serve.config import ServerConfig, load_config
from rigcast.runtime.serve.server import Server

RANDOM_PORT = "tcp://127.0.0.1:*"
# Tiny rigs: exact least-squares inverse, so meshes of the rig solve to their own controls.
TINY = {"vertices": 300, "controls": 8, "inputs": 40, "stable": 16, "seed": 0}
OTHER = {"vertices": 200, "controls": 6, "inputs": 30, "stable": 12, "seed": 1}
TINY_FIT_RMS = 0.002  # threshold = 3 x this = 0.006 mesh units, on a sheet about 1 unit wide


def tiny_rig(spec: Mapping[str, int] = TINY) -> SyntheticRig:
    return make_synthetic_rig(spec["vertices"], spec["controls"], inputs=spec["inputs"],
                              stable=spec["stable"], seed=spec["seed"])


@pytest.fixture(scope="session")
def tiny_bundle(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("bundles") / "tiny.rcb"
    return build_synthetic_bundle(path, **TINY, fit_rms=TINY_FIT_RMS, name="tiny")


@pytest.fixture(scope="session")
def other_bundle(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("bundles") / "other.rcb"
    return build_synthetic_bundle(path, **OTHER, fit_rms=TINY_FIT_RMS, name="other")


def server_config(bundles: Mapping[str, Path], **overrides: Any) -> ServerConfig:
    """A config on random loopback ports; ``stream_overrides`` go to every stream."""
    every = overrides.pop("stream_overrides", {})
    streams = {sid: {"bundle": str(path)} for sid, path in bundles.items()}
    base = {"input": RANDOM_PORT, "output": RANDOM_PORT, "telemetry_hz": 20.0, "linger_ms": 0}
    return load_config(None, {**base, **overrides, "streams": streams, "stream_overrides": every})


@contextlib.contextmanager
def running_server(config: ServerConfig, timeout_s: float = 10.0) -> Iterator[Server]:
    """A real Server in a thread; always stopped and joined on exit."""
    server = Server(config, ctx=zmq.Context())
    server.startup()
    thread = threading.Thread(target=server.run, name="test-server", daemon=True)
    thread.start()
    try:
        yield server
    finally:
        server.request_stop()
        thread.join(timeout_s)
        # A server thread that did not stop still holds its sockets: terminating the context
        # would hang until pytest-timeout instead of reporting it.
        assert not thread.is_alive(), "server thread did not stop"
        server.ctx.term()


class Peer:
    """A DEALER (frames and requests in) and a SUB (everything out) on one server.

    ``connect`` waits for the SUB to receive a first message (telemetry ticks), so no message is
    lost to the slow-joiner window; no fixed sleeps.
    """

    def __init__(self, input_endpoint: str, output_endpoint: str) -> None:
        self.ctx = zmq.Context()
        self.dealer = self.ctx.socket(zmq.DEALER)
        self.dealer.setsockopt(zmq.LINGER, 0)
        self.dealer.setsockopt(zmq.SNDHWM, 100_000)
        self.dealer.connect(input_endpoint)
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.RCVHWM, 100_000)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"")
        self.sub.connect(output_endpoint)

    def handshake(self, timeout_s: float = 5.0) -> None:
        if not self.sub.poll(int(timeout_s * 1000)):
            raise TimeoutError("no message from the server's PUB socket")
        self.sub.recv_multipart()

    def recv_pub(self, timeout_s: float = 2.0) -> list[bytes] | None:
        if not self.sub.poll(int(timeout_s * 1000)):
            return None
        return self.sub.recv_multipart()

    def recv_reply(self, timeout_s: float = 2.0) -> bytes | None:
        if not self.dealer.poll(int(timeout_s * 1000)):
            return None
        return self.dealer.recv_multipart()[0]

    def close(self) -> None:
        # destroy, not term: a test that fails before closing a socket it made on this context
        # must report its assertion, not hang in zmq_ctx_term (CI stop 25).
        self.ctx.destroy(linger=0)


@contextlib.contextmanager
def peer_for(server: Server) -> Iterator[Peer]:
    peer = Peer(server.input_endpoint, server.output_endpoint)
    try:
        peer.handshake()
        yield peer
    finally:
        peer.close()


@contextlib.contextmanager
def server_process(args: list[str], tmp_path: Path, timeout_s: float = 30.0
                   ) -> Iterator[tuple[subprocess.Popen[str], dict[str, Any]]]:
    """``python -m rigcast.runtime.serve.serve_main ARGS`` on random ports; yields (process, ready
    info with the bound endpoints); always terminated and reaped."""
    ready = tmp_path / f"ready-{time.monotonic_ns()}.json"
    cmd = [sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--input", RANDOM_PORT,
           "--output", RANDOM_PORT, "--ready-file", str(ready), *args]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    try:
        deadline = time.monotonic() + timeout_s
        while not ready.exists():
            if proc.poll() is not None:
                raise RuntimeError(f"server exited early ({proc.returncode}): "
                                   f"{proc.stderr.read() if proc.stderr else ''}")
            if time.monotonic() > deadline:
                raise TimeoutError("server did not write its ready file")
            time.sleep(0.02)
        yield proc, json.loads(ready.read_text())
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
        for stream in (proc.stdout, proc.stderr):
            if stream is not None:
                stream.close()


def wait_for_controls(output: str, stream: str, timeout_s: float = 30.0) -> None:
    """Return once the server publishing on ``output`` publishes controls of ``stream`` (a
    sender's frames flow), or fail after ``timeout_s``: a wait on the event itself, where a fixed
    sleep is too short on a loaded machine."""
    ctx = zmq.Context()
    try:
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"ctl." + stream.encode())
        sub.connect(output)
        assert sub.poll(int(timeout_s * 1000)), f"no controls of {stream!r} in {timeout_s} s"
    finally:
        ctx.destroy(linger=0)


def rig_mesh(rig: SyntheticRig, controls: np.ndarray) -> np.ndarray:
    """(C,) controls -> (V, 3) float32 mesh of the rig."""
    return rig.evaluate(np.asarray(controls, np.float64)[None])[0]
