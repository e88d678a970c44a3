"""Acceptance (issue 16): ``rigcast solve --config serve.toml`` gives, frame for frame, the controls
a real server publishes for the same take and settings (max difference <= 1e-6).

The server runs as ``python -m rigcast.runtime.serve.serve_main`` on random loopback ports; the take
goes to it frame by frame in lockstep (each frame after the previous controls arrived, so none
is dropped), stamped with the take's own times; then ``python -m rigcast solve`` solves the same
take from a file with the same TOML file. The settings exercise what used to reach only the
server: per-group filters, d_cutoff, the reset gap (the take has a pause longer than it),
stabilise_scale (the head moves and changes size), and the bundle runs its refinement steps.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zmq
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.messaging import protocol
from scipy.spatial.transform import Rotation

RIG = dict(vertices=400, controls=10, inputs=60, stable=24, seed=3)
FRAMES = 150
GAP_AT = 90


def _take() -> tuple[np.ndarray, np.ndarray]:
    """(vertices (T, V, 3) float32 with head motion and scale, times (T,) s with a pause)."""
    rig = make_synthetic_rig(RIG["vertices"], RIG["controls"], inputs=RIG["inputs"],
                             stable=RIG["stable"], seed=RIG["seed"])
    rng = np.random.default_rng(11)
    walk = np.cumsum(rng.normal(0, 0.06, (FRAMES, RIG["controls"])), axis=0) + 0.5
    meshes = rig.evaluate(np.clip(walk, 0, 1).astype(np.float32)).astype(np.float64)
    angles = np.linspace(0, 0.4, FRAMES)
    rot = Rotation.from_rotvec(np.outer(angles, [0.2, 1.0, 0.1])).as_matrix()
    scale = 1.0 + 0.05 * np.sin(np.linspace(0, 3, FRAMES))
    meshes = scale[:, None, None] * np.einsum("tij,tvj->tvi", rot, meshes)
    meshes += np.linspace(0, 0.3, FRAMES)[:, None, None]
    times = np.arange(FRAMES) / 60.0
    times[GAP_AT:] += 0.4  # longer than gap_ms below: both restart the filter here
    return meshes.astype(np.float32), times


def _write_config(path: Path, bundle: Path, group: str) -> None:
    path.write_text(f"""
input = "tcp://127.0.0.1:*"
output = "tcp://127.0.0.1:*"
fit_error = "after_publish"

[streams.actor]
bundle = "{bundle.name}"
min_cutoff = 0.7
beta = 3.0
d_cutoff = 1.7
gap_ms = 200.0
stabilise = true
stabilise_scale = true

[streams.actor.groups.{group}]
min_cutoff = 0.3
beta = 0.5
""")


def _serve(config: Path, ready: Path, log: Path) -> subprocess.Popen[bytes]:
    with log.open("wb") as err:
        proc = subprocess.Popen([sys.executable, "-m", "rigcast.runtime.serve.serve_main", "--config",
                                 str(config), "--ready-file", str(ready), "--log-level",
                                 "WARNING"], stdout=subprocess.DEVNULL, stderr=err)
    deadline = time.monotonic() + 60
    while not ready.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            proc.wait()
            raise AssertionError(f"server did not start: {log.read_text()[-2000:]}")
        time.sleep(0.05)
    return proc


def _published(ready: Path, meshes: np.ndarray, times: np.ndarray) -> list[
        protocol.ControlsMessage]:
    endpoints = json.loads(ready.read_text())
    ctx = zmq.Context()
    dealer = ctx.socket(zmq.DEALER)
    sub = ctx.socket(zmq.SUB)
    for sock in (dealer, sub):
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.RCVTIMEO, 30_000)  # a bound for a stuck server, not a deadline
    try:
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.connect(endpoints["output"])
        dealer.connect(endpoints["input"])
        while protocol.decode_published(sub.recv_multipart()) is None:  # pragma: no cover
            pass  # the first message of any kind: the subscription is live
        base = time.time_ns()
        out = []
        for i in range(meshes.shape[0]):
            t_send = base + round(times[i] * 1e9)
            dealer.send_multipart(protocol.encode_mesh("actor", i, t_send, meshes[i]))
            while True:
                msg = protocol.decode_published(sub.recv_multipart())
                if isinstance(msg, protocol.ControlsMessage):
                    break
            assert msg.frame == i and msg.t_send_ns == t_send
            out.append(msg)
        return out
    finally:
        dealer.close()
        sub.close()
        ctx.term()


@pytest.mark.timeout(240)
def test_solve_with_the_servers_config_gives_the_published_controls(tmp_path: Path) -> None:
    bundle_path = build_synthetic_bundle(tmp_path / "actor.rcb", inverse="mlp", hidden=48,
                                         refine=True, **RIG)
    bundle = load_bundle(bundle_path)
    assert bundle.refine_onnx is not None
    group = bundle.schema.controls[1].group
    config = tmp_path / "serve.toml"
    _write_config(config, bundle_path, group)
    meshes, times = _take()
    take = tmp_path / "take.npz"
    np.savez(take, vertices=meshes, times=times)

    server = _serve(config, tmp_path / "ready.json", tmp_path / "server.log")
    try:
        published = _published(tmp_path / "ready.json", meshes, times)
    finally:
        server.terminate()
        server.wait(timeout=30)
    live = np.array([m.values for m in published])

    out = tmp_path / "solved.json"
    proc = subprocess.run([sys.executable, "-m", "rigcast", "solve", str(bundle_path), str(take),
                           "-o", str(out), "--config", str(config)], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    doc = json.loads(out.read_text())
    offline = np.array([doc["controls"][name] for name in bundle.schema.names]).T

    assert offline.shape == live.shape == (FRAMES, RIG["controls"])
    assert np.abs(offline - live).max() <= 1e-6
    # The settings reached both: the filter restarted at the pause (the only unfiltered frames
    # after the first) and smoothed elsewhere, so the published values are not the raw solve.
    unfiltered = [i for i, m in enumerate(published) if not m.has(protocol.FLAG_FILTERED)]
    assert unfiltered == [0, GAP_AT]
    raw = subprocess.run([sys.executable, "-m", "rigcast", "solve", str(bundle_path), str(take),
                          "-o", str(tmp_path / "raw.json"), "--config", str(config),
                          "--filter", "none"], capture_output=True, text=True, timeout=120)
    assert raw.returncode == 0, raw.stderr[-2000:]
    unsmoothed = json.loads((tmp_path / "raw.json").read_text())["controls"]
    assert np.abs(np.array([unsmoothed[n] for n in bundle.schema.names]).T - live).max() > 1e-3
