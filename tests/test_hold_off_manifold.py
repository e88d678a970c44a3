"""Hold on flagged frames (issue 15 point 7): a real server on 127.0.0.1, a planted off-manifold
stretch of two frames, and what each mode of ``on_off_manifold`` publishes meanwhile."""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY, Peer, peer_for, rig_mesh, running_server, server_config, tiny_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.config import ConfigError
from rigcast.runtime.serve.serve_main import add_serve_arguments, add_stream_arguments
from rigcast.runtime.solve.stages import ease_towards

pytestmark = pytest.mark.timeout(60)

STEP_NS = 8_333_333  # 120 fps
FAR = (4, 5)  # the planted off-manifold frames


def fitted(peer: Peer, frame: int, got: dict[int, protocol.ControlsMessage]) -> dict:
    """Wait for the controls of ``frame`` and for telemetry saying its fit error ran (the fit
    runs after the publish), so the next frame sees its verdict. Returns that telemetry."""
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        frames = peer.recv_pub(0.2)
        if not frames:
            continue
        if frames[0] == b"ctl.a":
            msg = protocol.decode_controls(frames)
            got[msg.frame] = msg
        elif frames[0] == b"tel.a":
            tel = protocol.decode_header(frames[1])
            if frame in got and tel["fit_error"]["frame"] == frame:
                return tel
    raise TimeoutError(f"frame {frame}: no controls or no fit")


def run(tiny_bundle: Path, mode: str) -> tuple[dict[int, protocol.ControlsMessage], dict]:
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(11)
    meshes = [rig_mesh(rig, rng.uniform(0.2, 0.8, TINY["controls"])) for _ in range(8)]
    for i in FAR:  # far from anything the rig reaches: fit RMS ~0.2 against a limit of 0.006
        meshes[i] = meshes[i] + rng.normal(scale=0.2, size=meshes[i].shape).astype(np.float32)
    cfg = server_config({"a": tiny_bundle}, stream_overrides={
        "off_manifold_threshold": 0.006, "on_off_manifold": mode})
    got: dict[int, protocol.ControlsMessage] = {}
    t0 = time.time_ns()
    with running_server(cfg) as server, peer_for(server) as peer:
        for i, mesh in enumerate(meshes):
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * STEP_NS, mesh))
            tel = fitted(peer, i, got)
    return got, tel


def flags_of(got: dict[int, protocol.ControlsMessage], flag: int) -> list[int]:
    return sorted(f for f, m in got.items() if m.has(flag))


def test_pass_publishes_the_spikes_with_the_flag(tiny_bundle: Path) -> None:
    got, tel = run(tiny_bundle, "pass")
    # The fit runs after the publish: frames 5 and 6 carry the flag of frames 4 and 5.
    assert flags_of(got, protocol.FLAG_OFF_MANIFOLD) == [5, 6]
    assert flags_of(got, protocol.FLAG_HELD) == []
    assert np.abs(got[5].values - got[3].values).max() > 0.05  # the spike goes out
    assert tel["held"] == 0


def test_hold_publishes_the_last_good_controls_with_the_flag(tiny_bundle: Path) -> None:
    got, tel = run(tiny_bundle, "hold")
    assert flags_of(got, protocol.FLAG_OFF_MANIFOLD) == [5, 6]
    assert flags_of(got, protocol.FLAG_HELD) == [5, 6]
    # Frame 4 is published before its fit says it is off (no frame waits for its fit); frames
    # 5 and 6 hold frame 3's, the last found on the manifold; frame 7 is solved again.
    np.testing.assert_array_equal(got[5].values, got[3].values)
    np.testing.assert_array_equal(got[6].values, got[3].values)
    assert np.abs(got[7].values - got[3].values).max() > 0.01
    assert tel["held"] == 2
    assert tel["fit_error"]["off_manifold"] == 2


def test_ease_moves_from_the_spike_towards_the_last_good_controls(tiny_bundle: Path) -> None:
    got, tel = run(tiny_bundle, "ease")
    assert flags_of(got, protocol.FLAG_HELD) == [5, 6]
    assert flags_of(got, protocol.FLAG_OFF_MANIFOLD) == [5, 6]
    step = ease_towards(got[4].values, got[3].values, STEP_NS / 1e9, 0.1)
    np.testing.assert_allclose(got[5].values, step, atol=1e-6)
    np.testing.assert_allclose(got[6].values,
                               ease_towards(step, got[3].values, STEP_NS / 1e9, 0.1), atol=1e-6)
    before = np.abs(got[4].values - got[3].values).max()
    assert 0 < np.abs(got[6].values - got[3].values).max() < before
    assert tel["held"] == 2


def test_ease_follows_the_exponential_whatever_the_steps() -> None:
    start = np.array([1.0, -2.0, 0.5], np.float32)
    target = np.zeros(3, np.float32)
    x = start
    for dt in (0.01, 0.03, 0.002, 0.058):  # 0.1 s in all
        x = ease_towards(x, target, dt, 0.05)
    # A first-order system: exp(-t/tau) of the distance is left (tau = 50 ms, t = 100 ms).
    np.testing.assert_allclose(x, start * math.exp(-2.0), rtol=1e-5)
    np.testing.assert_array_equal(ease_towards(start, target, 0.0, 0.05), start)


def test_one_name_in_config_and_cli_and_checked(tiny_bundle: Path) -> None:
    serve = argparse.ArgumentParser()
    add_serve_arguments(serve)
    args = serve.parse_args(["--on-off-manifold", "ease", "--off-manifold-ease-ms", "40"])
    assert (args.stream__on_off_manifold, args.stream__off_manifold_ease_ms) == ("ease", 40.0)
    solve = argparse.ArgumentParser()
    add_stream_arguments(solve)  # live-only: a solve has nothing to hold
    with pytest.raises(SystemExit):
        solve.parse_args(["--on-off-manifold", "hold"])
    with pytest.raises(ConfigError, match="on_off_manifold"):
        server_config({"a": tiny_bundle}, stream_overrides={"on_off_manifold": "freeze"})
    with pytest.raises(ConfigError, match="fit_error_schedule is off"):
        server_config({"a": tiny_bundle}, fit_error_schedule="off",
                      stream_overrides={"on_off_manifold": "hold"})
