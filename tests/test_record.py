"""`rigcast record` as a user runs it, against a real server process with two streams: every
stream in one process (or the chosen ones), the sender's own frame numbers, the flags, the
telemetry's head pose, the take's name, in NPZ, JSON and CSV."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import OTHER, server_process, tiny_rig
from rigcast.runtime.messaging.client import MeshSender

from rigcast.writers.animation_out import read_csv_columns

FIRST_FRAME, STEP = 1000, 3  # the sender's numbering, unlike row numbers


def _send(endpoint: str, seconds: float) -> dict[str, np.ndarray]:
    """Constant controls per stream, frames numbered FIRST_FRAME + STEP * k."""
    truth = {"tiny": np.full(8, 0.3), "other": np.full(6, 0.6)}
    meshes = {"tiny": tiny_rig().evaluate(truth["tiny"][None])[0],
              "other": tiny_rig(OTHER).evaluate(truth["other"][None])[0]}
    with MeshSender(endpoint) as sender:
        end = time.monotonic() + seconds
        k = 0
        while time.monotonic() < end:
            for stream, mesh in meshes.items():
                sender.send(stream, FIRST_FRAME + STEP * k, mesh)
            k += 1
            time.sleep(1 / 60)
    return truth


def _record(ready: dict[str, str], out: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    proc = subprocess.Popen([sys.executable, "-m", "rigcast", "record", "-o", str(out),
                             "--from", ready["output"], "--to", ready["input"],
                             "--duration", "4", *extra], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL)
    assert proc.stderr is not None
    proc.stderr.readline()  # "recording ... Ctrl-C stops": subscribed
    sender = threading.Thread(target=_send, args=(ready["input"], 2.0))
    sender.start()
    sender.join()
    out_text, err_text = proc.communicate(timeout=60)
    return subprocess.CompletedProcess(proc.args, proc.returncode, out_text, err_text)


@pytest.fixture
def two_streams(tmp_path: Path, tiny_bundle: Path, other_bundle: Path):  # type: ignore[no-untyped-def]
    with server_process(["--bundle", f"tiny={tiny_bundle}", "--bundle",
                         f"other={other_bundle}"], tmp_path) as (_, ready):
        yield ready


def test_every_stream_in_one_npz_with_frame_numbers_flags_and_take(
        tmp_path: Path, two_streams: dict[str, str]) -> None:
    out = tmp_path / "scene.npz"
    done = _record(two_streams, out, "--take", "scene3_take2")
    assert done.returncode == 0, done.stderr
    with np.load(out) as z:
        assert str(z["take"]) == "scene3_take2"
        assert sorted(z["streams"].tolist()) == ["other", "tiny"]
        for stream, width, value in (("tiny", 8, 0.3), ("other", 6, 0.6)):
            frames = z[f"{stream}/frame"]
            assert frames.shape[0] > 10
            # the sender's numbers: all on its grid, in order, no row numbers
            assert np.all((frames - FIRST_FRAME) % STEP == 0) and np.all(np.diff(frames) > 0)
            assert z[f"{stream}/values"].shape == (frames.shape[0], width)
            assert z[f"{stream}/flags"].shape == frames.shape
            assert np.all(np.diff(z[f"{stream}/time_s"]) > 0)
            assert z[f"{stream}/names"][0] == "shape_00"
            # the tiny rigs' inverses are exact: the last frames are the sent controls
            np.testing.assert_allclose(z[f"{stream}/values"][-5:], value, atol=1e-3)
            assert z[f"{stream}/pose"].shape[1] == 8
            # poses come with the controls (one per stabilised frame) or from telemetry
            assert set(z[f"{stream}/pose_frame"].tolist()) <= set(frames.tolist())


def test_chosen_stream_to_csv_and_json(tmp_path: Path, two_streams: dict[str, str]) -> None:
    out = tmp_path / "only.csv"
    done = _record(two_streams, out, "--stream", "other")
    assert done.returncode == 0, done.stderr
    names, values, _, extras = read_csv_columns(out)
    assert names == tuple(f"shape_{i:02d}" for i in range(6))
    np.testing.assert_allclose(values[-5:], 0.6, atol=1e-3)
    assert set(extras) == {"off_manifold", "clamped", "stale"}
    frames = np.loadtxt(out, delimiter=",", skiprows=1, usecols=0)
    assert frames[0] >= FIRST_FRAME and np.all((frames - FIRST_FRAME) % STEP == 0)
    meta = json.loads((tmp_path / "only.meta.json").read_text())
    assert meta["take"] == "only" and list(meta["files"]) == ["other"]
    assert "tiny" not in done.stdout

    out_json = tmp_path / "both.json"
    done = _record(two_streams, out_json)
    assert done.returncode == 0, done.stderr
    doc = json.loads(out_json.read_text())
    assert doc["take"] == "both" and sorted(doc["streams"]) == ["other", "tiny"]
    assert doc["streams"]["tiny"]["frame"][0] >= FIRST_FRAME


def test_without_the_input_endpoint_the_controls_are_named_by_index(
        tmp_path: Path, two_streams: dict[str, str]) -> None:
    out = tmp_path / "mon.npz"
    done = _record(two_streams, out, "--to", "", "--stream", "tiny")
    assert done.returncode == 0, done.stderr
    with np.load(out) as z:
        assert z["tiny/names"][0] == "#0"
    assert "controls named by index" in done.stdout
