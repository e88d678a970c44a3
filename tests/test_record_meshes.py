"""Raw meshes in record (issue 15 point 5): a server started with ``publish_meshes`` publishes
each processed frame's mesh on ``msh.<stream>``; `rigcast record --meshes` writes them as chunked
NPZ beside the controls, and `rigcast solve` re-solves a chunk to the controls the server
published. Real server processes and sockets on 127.0.0.1."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import TINY, peer_for, rig_mesh, running_server, server_config, server_process, tiny_rig
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.client import MeshSender
from rigcast.runtime.messaging.messages import PublishedMesh
from rigcast.runtime.messaging.timecode import parse_timecode

pytestmark = pytest.mark.timeout(120)

FRAMES, CHUNK = 60, 25


def _meshes() -> np.ndarray:
    rig = tiny_rig(TINY)
    rng = np.random.default_rng(21)
    return np.stack([rig_mesh(rig, rng.uniform(0, 1, TINY["controls"])) for _ in range(FRAMES)])


def _send(endpoint: str, meshes: np.ndarray) -> None:
    start = parse_timecode("01:00:00:00", "60")
    with MeshSender(endpoint) as sender:
        for i, mesh in enumerate(meshes):
            sender.send("tiny", 500 + i, mesh, timecode=start.advanced(i))
            time.sleep(1 / 60)


def test_record_keeps_the_meshes_in_chunks_that_solve_re_solves(
        tiny_bundle: Path, tmp_path: Path) -> None:
    meshes = _meshes()
    out = tmp_path / "day1.npz"
    args = ["--bundle", f"tiny={tiny_bundle}", "--publish-meshes", "raw", "--passthrough"]
    with server_process(args, tmp_path) as (_, ready):
        rec = subprocess.Popen([sys.executable, "-m", "rigcast", "record", "-o", str(out),
                                "--from", ready["output"], "--to", ready["input"], "--meshes",
                                "--mesh-chunk", str(CHUNK), "--duration", "4"],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                               stdin=subprocess.DEVNULL)
        assert rec.stderr is not None
        assert "with meshes" in rec.stderr.readline()  # subscribed
        sender = threading.Thread(target=_send, args=(ready["input"], meshes))
        sender.start()
        sender.join()
        said, err = rec.communicate(timeout=60)
    assert rec.returncode == 0, err
    assert "chunk file(s)" in said
    chunks = sorted(tmp_path.glob("day1.tiny.meshes.*.npz"))
    with np.load(out) as z:
        recorded = dict(zip(z["tiny/frame"].tolist(), z["tiny/values"], strict=True))
    frames: list[int] = []
    for n, path in enumerate(chunks):
        with np.load(path) as c:
            assert int(c["chunk"]) == n and str(c["space"]) == "raw" and str(c["take"]) == "day1"
            got = c["frame"].tolist()
            assert len(got) <= CHUNK
            # as sent, byte for byte, with the sender's frame numbers and timecodes
            np.testing.assert_array_equal(c["vertices"], meshes[np.array(got) - 500])
            assert c["timecode"].tolist() == [str(parse_timecode("01:00:00:00", "60")
                                                  .advanced(f - 500)) for f in got]
            assert np.all(np.diff(c["times"]) > 0)
            frames += got
    assert len(chunks) >= 2 and sorted(frames) == frames
    assert set(frames) == set(recorded)  # a mesh for every published frame
    # A chunk is a take: `rigcast solve` re-solves it to what the server published.
    solved = tmp_path / "chunk1.json"
    done = subprocess.run([sys.executable, "-m", "rigcast", "solve", str(tiny_bundle),
                           str(chunks[1]), "-o", str(solved)], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    doc = json.loads(solved.read_text())
    names = list(doc["controls"])
    offline = np.array([doc["controls"][name] for name in names]).T
    with np.load(chunks[1]) as c:
        live = np.stack([recorded[f] for f in c["frame"].tolist()])
    assert offline.shape == live.shape
    np.testing.assert_allclose(offline, live, atol=1e-5)


def test_stabilised_meshes_are_in_the_neutrals_frame(tiny_bundle: Path) -> None:
    rig = tiny_rig(TINY)
    mesh = rig_mesh(rig, np.full(TINY["controls"], 0.5))
    a = np.radians(15.0)
    rot = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
    moved = (mesh.astype(np.float64) @ rot.T + [0.2, 0.1, -0.3]).astype(np.float32)
    cfg = server_config({"a": tiny_bundle}, publish_meshes="stabilised")
    with running_server(cfg) as server, peer_for(server) as peer:
        peer.dealer.send_multipart(protocol.encode_mesh("a", 7, time.time_ns(), moved))
        got = None
        deadline = time.monotonic() + 5
        while got is None and time.monotonic() < deadline:
            frames = peer.recv_pub(0.2)
            if frames and frames[0] == protocol.TOPIC_MESHES + b"a":
                got = protocol.decode_published(frames)
    assert isinstance(got, PublishedMesh)
    assert (got.stream, got.frame, got.space) == ("a", 7, "stabilised")
    np.testing.assert_allclose(got.vertices, mesh, atol=1e-4)  # the head motion is gone
    assert np.abs(moved - mesh).max() > 0.1
