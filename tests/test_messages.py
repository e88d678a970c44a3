"""Typed server messages (runtime/messaging/messages.py): the head pose in every live controls message
(issue 14), the heartbeat on the telemetry topic (issue 15), and the typed records' encodings."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY, peer_for, rig_mesh, running_server, server_config, tiny_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.messages import (
    ErrorReply,
    FitErrorStats,
    Heartbeat,
    LatencyStats,
    OffManifoldEvent,
    ReloadReply,
    ServerStats,
    Telemetry,
)
from rigcast.runtime.solve.head_pose import HeadPose
from scipy.spatial.transform import Rotation


def test_every_controls_message_carries_the_head_pose_the_server_removed(
        tiny_bundle: Path) -> None:
    """A frame moved by a known similarity x -> s R x + t: the published head_pose is that
    motion (scipy.spatial.transform.Rotation as the outside reference for the quaternion)."""
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(2)
    config = server_config({"a": tiny_bundle}, stream_overrides={"stabilise": True,
                                                                 "stabilise_scale": True})
    with running_server(config) as server, peer_for(server) as peer:
        t0 = time.time_ns()
        for i in range(4):
            rot = Rotation.random(random_state=rng)
            scale, shift = float(rng.uniform(0.8, 1.2)), rng.normal(scale=0.2, size=3)
            mesh = rig_mesh(rig, rng.uniform(0, 1, TINY["controls"])).astype(np.float64)
            moved = (scale * mesh @ rot.as_matrix().T + shift).astype(np.float32)
            peer.dealer.send_multipart(protocol.encode_mesh("a", i, t0 + i * 10_000_000, moved))
            msg = None
            while msg is None:
                frames = peer.recv_pub(5.0)
                assert frames is not None, f"no controls for frame {i}"
                if frames[0] == b"ctl.a":
                    msg = protocol.decode_controls(frames)
            pose = msg.head_pose
            assert pose is not None
            x, y, z, w = rot.as_quat()
            want = np.array([w, x, y, z]) * (1 if w >= 0 else -1)
            np.testing.assert_allclose(pose.quaternion_wxyz, want, atol=1e-4)
            np.testing.assert_allclose(pose.translation, shift, atol=1e-4)
            assert pose.scale == pytest.approx(scale, rel=1e-4)
            assert pose.angle_deg == pytest.approx(np.degrees(rot.magnitude()), abs=0.01)


def test_an_unstabilised_stream_sends_a_nil_head_pose(tiny_bundle: Path) -> None:
    config = server_config({"a": tiny_bundle}, stream_overrides={"stabilise": False})
    with running_server(config) as server, peer_for(server) as peer:
        mesh = rig_mesh(tiny_rig(TINY), np.full(TINY["controls"], 0.5))
        peer.dealer.send_multipart(protocol.encode_mesh("a", 0, time.time_ns(), mesh))
        while True:
            frames = peer.recv_pub(5.0)
            assert frames is not None
            if frames[0] == b"ctl.a":
                break
        assert protocol.decode_header(frames[1])["head_pose"] is None
        assert protocol.decode_controls(frames).head_pose is None


def test_the_heartbeat_comes_every_half_second_whatever_the_telemetry_rate(
        tiny_bundle: Path) -> None:
    config = server_config({"a": tiny_bundle, "b": tiny_bundle}, telemetry_hz=0.2)
    with running_server(config) as server, peer_for(server) as peer:
        beats: list[dict] = []
        deadline = time.monotonic() + 10  # 5 beats in 2-2.5 s; the first tick is 5 s away
        while len(beats) < 5 and time.monotonic() < deadline:
            frames = peer.recv_pub(0.2)
            if frames is not None and frames[0] == protocol.TOPIC_TELEMETRY:
                beat = protocol.decode_published(frames)
                assert isinstance(beat, dict)
                beats.append(beat)
    assert len(beats) >= 5, beats
    # The gaps on the server's own clock (uptime_s), so this process's wake-ups on a loaded
    # machine do not count.
    gaps = np.diff([b["uptime_s"] for b in beats])
    assert gaps.max() < 0.75, gaps  # 0.5 s plus the loop's 50 ms wake-up, with margin
    header = beats[-1]
    assert isinstance(header, dict) and header["type"] == "heartbeat"
    assert sorted(header["streams"]) == ["a", "b"] and header["period_s"] == 0.5
    assert header["stream"] is None and header["uptime_s"] > 0


def test_typed_messages_encode_to_the_documented_maps() -> None:
    pose = HeadPose((1.0, 0.0, 0.0, 0.0), (0.1, 0.2, 0.3), 1.0, 0.0)
    tel = Telemetry(
        stream="a", bundle="face.rcb", t_ns=5, latency={"total": LatencyStats(0.1, 0.2, None)},
        window=3, input_fps=60.0, processed=3, dropped=1, stale=0, rejected=2,
        rejected_by_reason={"malformed": 2}, clamped=0, filter_resets=1, last_frame=9,
        fit_error=FitErrorStats(9, 0, 0.01, 0.02, 0.01, 0.02, 0, None), pose=pose,
        stabilise_rms=None, server=ServerStats(1.5, 1, 2, {"malformed": 2}))
    frames = tel.encode()
    assert frames[0] == b"tel.a"
    got = protocol.decode_published(frames)
    assert isinstance(got, dict) and got["type"] == "telemetry"
    assert got["latency"]["total"] == {"p50_ms": 0.1, "p95_ms": 0.2, "p99_ms": None}
    assert got["fit_error"]["rms"] == 0.01 and got["server"]["rejected_by_reason"] == {
        "malformed": 2}
    assert HeadPose.from_wire(got["pose"]) == pose
    event = protocol.decode_published(OffManifoldEvent("a", 4, 0.1, 0.3, 0.2).encode())
    assert isinstance(event, dict)
    assert (event["kind"], event["frame"], event["threshold"]) == ("off_manifold", 4, 0.2)
    reply = protocol.decode_reply(ReloadReply("a", True, "ok", bundle="b.rcb",
                                              fingerprint="f").encode())
    assert (reply["ok"], reply["bundle"], reply["fingerprint"]) == (True, "b.rcb", "f")
    assert "bundle" not in protocol.decode_reply(ReloadReply("a", False, "no").encode())
    with pytest.raises(ValueError, match="unknown rejection reason"):
        ErrorReply("nope", "x")
    beat = protocol.decode_published(Heartbeat(7, 0.5, ("a",)).encode())
    assert isinstance(beat, dict) and beat["streams"] == ["a"]


def test_a_head_pose_of_another_version_is_ignored() -> None:
    wire = HeadPose((1.0, 0.0, 0.0, 0.0), (0.0, 0.0, 0.0), 2.0, 0.0).to_controls_wire()
    assert HeadPose.from_wire(wire) is not None
    assert HeadPose.from_wire({**wire, "v": 2}) is None
    assert HeadPose.from_wire({**wire, "translation": [0.0]}) is None
