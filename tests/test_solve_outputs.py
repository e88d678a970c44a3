"""What `rigcast solve` writes besides the controls: per-frame quality and flags, the head pose,
the frame rate, and glTF that animates a skinned rig's joints (checked by the Khronos validator
and by re-evaluating the file through glTF 2.0 skinning)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import tiny_rig
from rigcast.export.rigs.demo_rigs import tamsin_lantern_arm
from rigcast.export.rigs.gltf_rig import GltfRig
from rigcast.runtime.schema import Control, ControlSchema
from rigcast.runtime.solve.batch import fit_rigid_batch
from scipy.spatial.transform import Rotation

from rigcast.readers.takes import DEFAULT_FPS, read_take
from rigcast.writers.animation_out import read_csv_columns
from rigcast.writers.controls_out import write_controls
from rigcast.writers.frame_info import (
    FrameQuality,
    HeadPose,
    clamped_frames,
    describe_ranges,
    flag_ranges,
    head_pose_from_fit,
    stale_frames,
)
from rigcast.writers.gltf_out import write_gltf
from rigcast.writers.skeleton import skeleton_from_rig
from tests.gltf_validator import assert_valid

DATA = Path(__file__).parent / "data" / "khronos"


def _diag(points: np.ndarray) -> float:
    flat = points.reshape(-1, 3)
    return float(np.linalg.norm(flat.max(0) - flat.min(0)))


def _head(t: int, seed: int = 3) -> HeadPose:
    rng = np.random.default_rng(seed)
    rot = Rotation.from_rotvec(np.cumsum(rng.normal(0, 0.01, (t, 3)), axis=0)).as_quat()
    return HeadPose(np.cumsum(rng.normal(0, 0.005, (t, 3)), axis=0), rot, np.ones(t))


def test_flag_ranges_and_offline_flags() -> None:
    flags = np.array([0, 1, 1, 0, 0, 1, 0, 1, 1, 1], bool)
    assert flag_ranges(flags) == [(1, 2), (5, 5), (7, 9)]
    assert describe_ranges(flags) == "1-2, 5, 7-9"
    assert describe_ranges(np.zeros(4, bool)) == "none"
    times = np.array([0, 1, 2, 4, 5, 6]) / 60.0  # frame 3 follows a missing frame
    np.testing.assert_array_equal(stale_frames(times), [0, 0, 0, 1, 0, 0])
    schema = ControlSchema((Control("a", 0.0, 1.0, 0.0), Control("b", -1.0, 1.0, 0.0)))
    controls = np.array([[0.0, 0.0], [1.0, 0.0], [0.5, -1.0], [0.5, 0.99]])
    # a control at its default bound (a = 0) is at rest, not clamped
    np.testing.assert_array_equal(clamped_frames(controls, schema), [0, 1, 1, 0])


def test_head_pose_inverts_the_stabilisation_fit() -> None:
    rng = np.random.default_rng(0)
    neutral = rng.normal(size=(30, 3))
    head = _head(8)
    frames = head.apply(np.broadcast_to(neutral, (8, 30, 3)))
    fit = fit_rigid_batch(frames, neutral)  # Umeyama 1991, as the batch solve runs it
    back = head_pose_from_fit(fit.rotation, fit.translation, fit.scale)
    np.testing.assert_allclose(back.apply(np.broadcast_to(neutral, (8, 30, 3))), frames,
                               atol=1e-9)
    np.testing.assert_allclose(np.abs(np.einsum("ti,ti->t", back.rotation, head.rotation)), 1.0,
                               atol=1e-9)


def test_csv_and_json_carry_quality_and_head_pose(tmp_path: Path) -> None:
    schema = ControlSchema((Control("a", 0.0, 1.0, 0.0), Control("b", 0.0, 1.0, 0.0)))
    t = 6
    controls = np.random.default_rng(1).random((t, 2))
    times = np.arange(t) / 30.0
    quality = FrameQuality(np.linspace(0.1, 0.2, t), np.array([0.3, np.nan, 0.3, 0.3, 0.3, 0.3]),
                           np.array([0, 1, 0, 0, 0, 0], bool), np.zeros(t, bool),
                           np.array([0, 0, 0, 1, 0, 0], bool))
    head = _head(t)
    csv_path = write_controls(tmp_path / "a.csv", schema, controls, times, quality=quality,
                              head=head)
    names, back, _t_back, extras = read_csv_columns(csv_path)
    assert names == ("a", "b")
    np.testing.assert_array_equal(back, controls)
    np.testing.assert_array_equal(extras["fit_rms"], quality.fit_rms)
    assert np.isnan(extras["fit_max"][1]) and extras["off_manifold"][1] == 1
    np.testing.assert_array_equal(extras["stale"], quality.stale)
    np.testing.assert_array_equal(np.column_stack([extras["head_tx"], extras["head_ty"],
                                                   extras["head_tz"]]), head.translation)
    doc = json.loads(write_controls(tmp_path / "a.json", schema, controls, times, fps=30.0,
                                    quality=quality, head=head).read_text())
    assert doc["version"] == 2 and doc["fps"] == 30.0
    assert doc["quality"]["fit_max"][1] is None  # JSON has no NaN
    assert doc["quality"]["flags"]["stale"] == quality.stale.tolist()
    np.testing.assert_array_equal(doc["head_pose"]["rotation_xyzw"], head.rotation)


@pytest.mark.parametrize("suffix", [".gltf", ".glb"])
def test_skinned_arm_animates_joints_and_reevaluates_to_the_rig(tmp_path: Path, suffix: str
                                                                ) -> None:
    rig = tamsin_lantern_arm()
    skeleton = skeleton_from_rig(rig)
    t = 40
    rng = np.random.default_rng(2)
    controls = np.clip(np.cumsum(rng.normal(0, 3, (t, 12)), axis=0), -35, 35)
    times = np.arange(t) / DEFAULT_FPS
    head = _head(t)
    path = write_gltf(tmp_path / f"arm{suffix}", controls, times, skeleton=skeleton, head=head,
                      fps=DEFAULT_FPS)
    report = assert_valid(path)  # Khronos glTF validator: zero errors
    assert report["info"]["hasSkins"] is True and report["info"]["hasMorphTargets"] is False
    # glTF 2.0 skinning of the file (GltfRig.pose via the take reader) against the rig itself
    take = read_take(path)
    assert take.frame_count == t and take.fps == DEFAULT_FPS and take.fps_source == "file"
    expected = head.apply(rig.evaluate(controls))
    err = np.linalg.norm(take.vertices - expected, axis=-1)
    assert err.max() <= 5e-4 * _diag(rig.neutral), err.max()  # 0.05 % of the diagonal


def test_khronos_simple_skin_rig_writes_back_as_a_skin(tmp_path: Path) -> None:
    rig = GltfRig(DATA / "SimpleSkin.gltf", bounds={"joints": {"node_2": {"z": [-100, 100]}}})
    skeleton = skeleton_from_rig(rig)
    assert skeleton.names == ("node_1", "node_2")
    controls = np.linspace(-90, 90, 25)[:, None]
    path = write_gltf(tmp_path / "skin.gltf", controls, np.arange(25) / 24.0, skeleton=skeleton,
                      fps=24.0)
    assert_valid(path)
    doc = json.loads(path.read_text())
    assert "targets" not in doc["meshes"][0]["primitives"][0]
    assert {c["target"]["path"] for c in doc["animations"][0]["channels"]} == {"rotation"}
    take = read_take(path)
    np.testing.assert_allclose(take.vertices, rig.evaluate(controls), atol=1e-5)



def test_head_pose_is_the_solves_own_stabilisation(tiny_bundle: Path) -> None:
    """The head pose is the inverse of the fits the solve stabilised with (BatchSolve.rigid), so
    a solve that removes scale (--stabilise-scale) writes that scale too; a second rigid-only fit
    of the take would give scale 1. Umeyama 1991 recovers an exact similarity."""
    from rigcast.runtime.bundle import load_bundle
    from rigcast.runtime.serve.config import StreamConfig
    from rigcast.runtime.solve.batch import BatchSolver, SolveOptions

    from rigcast.solving.solve_out import head_pose

    bundle = load_bundle(tiny_bundle)
    t = 12
    moved = _head(t, seed=5)
    truth = HeadPose(moved.translation, moved.rotation, np.linspace(0.9, 1.2, t))
    neutral = np.broadcast_to(bundle.neutral.astype(np.float64), (t, *bundle.neutral.shape))
    frames = truth.apply(neutral).astype(np.float32)
    times = np.arange(t) / 30.0
    solver = BatchSolver(bundle, threads=1)
    scaled = solver.solve(frames, times, SolveOptions(filter="none", stream=StreamConfig(
        stabilise=True, stabilise_scale=True)))
    assert scaled.rigid is not None
    head = head_pose(scaled)
    np.testing.assert_allclose(head.scale, truth.scale, rtol=1e-5)
    np.testing.assert_allclose(head.translation, truth.translation, atol=1e-5)
    np.testing.assert_allclose(np.abs(np.einsum("ti,ti->t", head.rotation, truth.rotation)), 1.0,
                               atol=1e-6)
    rigid = solver.solve(frames, times, SolveOptions(filter="none", stream=StreamConfig(
        stabilise=True)))
    assert np.all(head_pose(rigid).scale == 1.0)  # a rigid solve removes no scale
    off = solver.solve(frames, times, SolveOptions(filter="none", stream=StreamConfig(
        stabilise=False)))
    assert off.rigid is None
    still = head_pose(off)
    np.testing.assert_array_equal(still.translation, np.zeros((t, 3)))
    np.testing.assert_array_equal(still.rotation, np.tile([0.0, 0.0, 0.0, 1.0], (t, 1)))
    np.testing.assert_array_equal(still.scale, np.ones(t))

# --- the solve command ----------------------------------------------------------------------------


def _rigcast(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rigcast", *args], capture_output=True,
                          text=True, timeout=120, check=False, stdin=subprocess.DEVNULL)


def test_solve_writes_quality_head_pose_and_prints_flagged_ranges(tmp_path: Path,
                                                                   tiny_bundle: Path) -> None:
    rig = tiny_rig()
    t = 90
    phase = np.arange(len(rig.schema))[None, :]
    controls = 0.5 + 0.4 * np.sin(2 * np.pi * np.arange(t)[:, None] / 45.0 + phase)
    controls[30:34, 0] = rig.schema.upper[0] + 0.2  # past the bound: clamped frames 30-33
    head = _head(t, seed=7)
    verts = head.apply(rig.evaluate(controls).astype(np.float64)).astype(np.float32)
    keep = np.r_[0:60, 61:t]  # frame 60 dropped: the next one is stale
    np.save(tmp_path / "take.npy", verts[keep])
    out = tmp_path / "solved.csv"
    proc = _rigcast("solve", str(tiny_bundle), str(tmp_path / "take.npy"), "-o", str(out),
                    "--stabilise")
    assert proc.returncode == 0, proc.stderr
    # no times in an NPY: the one default rate, said on stderr and in the summary
    assert f"assuming {DEFAULT_FPS:g} fps" in proc.stderr
    assert f"at {DEFAULT_FPS:g} fps (default" in proc.stdout
    assert "clamped frames: 30-33" in proc.stdout
    assert "stale frames: none" in proc.stdout  # evenly spaced by the default rate
    _names, solved, times, extras = read_csv_columns(out)
    np.testing.assert_allclose(times, np.arange(t - 1) / DEFAULT_FPS)
    np.testing.assert_array_equal(np.flatnonzero(extras["clamped"]), [30, 31, 32, 33])
    assert np.all(np.isfinite(extras["fit_rms"]))
    pose = HeadPose(np.column_stack([extras[f"head_t{a}"] for a in "xyz"]),
                    np.column_stack([extras[f"head_q{a}"] for a in "xyzw"]), extras["head_scale"])
    # the head pose carries the rig's mesh back onto the take
    back = pose.apply(rig.evaluate(solved).astype(np.float64))
    fine = np.setdiff1d(np.arange(t - 1), [30, 31, 32, 33])  # the clamped frames cannot match
    assert np.abs(back - verts[keep])[fine].max() < 1e-3 * _diag(verts)
    # with times that skip a frame, the frame after the gap is stale
    np.savez(tmp_path / "gap.npz", vertices=verts[keep], times=keep / 30.0)
    proc = _rigcast("solve", str(tiny_bundle), str(tmp_path / "gap.npz"), "-o",
                    str(tmp_path / "gap.json"))
    assert proc.returncode == 0, proc.stderr
    assert "stale frames: 60" in proc.stdout and "at 30 fps (from the take)" in proc.stdout
    doc = json.loads((tmp_path / "gap.json").read_text())
    assert doc["fps"] == 30.0 and np.flatnonzero(doc["quality"]["flags"]["stale"]).tolist() == [60]


def test_skinned_bundle_needs_its_rig_and_the_right_one(tmp_path: Path, tiny_bundle: Path) -> None:
    from rigcast.writers.animation_out import AnimationError, morph_basis

    rig = tamsin_lantern_arm()
    # Degrees are not weights: without the rig, joint controls never become morph targets,
    # even when the (learned) evaluation looks linear.
    with pytest.raises(AnimationError, match="give the rig with --rig"):
        morph_basis("arm", rig.schema, rig.neutral, rig.faces, rig.evaluate, linearity_tol=1.0,
                    max_span=2.0)
    np.save(tmp_path / "t.npy", np.repeat(tiny_rig().neutral[None], 3, axis=0))
    proc = _rigcast("solve", str(tiny_bundle), str(tmp_path / "t.npy"), "-o",
                    str(tmp_path / "t.glb"), "--rig", "demo:arm")
    assert proc.returncode == 1
    assert "rigcast: error: rig demo:arm (fingerprint" in proc.stderr
    assert "is not the rig bundle 'tiny' was built from" in proc.stderr
    assert not (tmp_path / "t.glb").exists()


def test_cli_states_the_one_default_rate() -> None:
    from rigcast.commands import cli

    assert cli._DEFAULT_FPS == DEFAULT_FPS
    for command in ("send", "solve"):
        text = " ".join(_rigcast(command, "--help").stdout.split())
        assert f"else {DEFAULT_FPS:g}, said when assumed" in text, text
