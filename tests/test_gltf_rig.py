"""glTF 2.0 rigs against hand-computed examples.

Reference: the glTF 2.0 specification (Khronos), sections "Morph Targets" (position = base +
sum_i w_i * target_i.POSITION) and "Skins" / "Joint Hierarchy" / "Skinned Mesh Attributes"
(jointMatrix_j = globalTransform(joint_j) * inverseBindMatrix_j; skinned = sum_k weight_k *
jointMatrix_{joint_k} * (position, 1); the transform of the node holding a skinned mesh is
ignored, so skinned positions are in the scene's frame).
The expected positions below were worked out by hand and are written as literals.
"""

from __future__ import annotations

import json
import pickle
from pathlib import Path

import numpy as np
import pygltflib
import pytest
from rigcast.export.rigs.gltf_eval import morph_positions, morph_positions_naive
from rigcast.export.rigs.gltf_rig import GltfRig
from rigcast.export.rigs.rig import RigError

from tests.fixtures_rigs import TRIANGLE, NodeSpec, morph_triangle, two_joint_strip, write_gltf

TIP_Z = {"joints": {"Tip": {"z": [-90, 90]}}}


@pytest.mark.parametrize("suffix", [".gltf", ".glb"])
def test_morph_targets_hand_computed(tmp_path: Path, suffix: str) -> None:
    rig = GltfRig(morph_triangle(tmp_path / f"tri{suffix}"))
    assert rig.schema.names == ("lift", "spread")
    assert rig.schema.lower.tolist() == [0, 0] and rig.schema.upper.tolist() == [1, 1]
    got = rig.evaluate(np.array([[0.5, 0.25]]))[0]
    # base (0,0,0),(1,0,0),(0,1,0); lift (0,0,1),(0,0,0),(0,0,2); spread (0,0,0),(1,0,0),(0,-2,0)
    want = np.array([[0.0, 0.0, 0.5], [1.25, 0.0, 0.0], [0.0, 0.5, 1.0]])
    np.testing.assert_allclose(got, want, atol=1e-6)
    np.testing.assert_array_equal(rig.faces, [[0, 1, 2]])


def test_sparse_targets_and_external_bin_and_stride(tmp_path: Path) -> None:
    path = morph_triangle(tmp_path / "tri.gltf", sparse_targets=True, external_bin=True,
                          position_stride_pad=4)
    assert (tmp_path / "tri.bin").is_file()
    got = GltfRig(path).evaluate(np.array([[0.5, 0.25]]))[0]
    np.testing.assert_allclose(got, [[0, 0, 0.5], [1.25, 0, 0], [0, 0.5, 1]], atol=1e-6)


def test_default_weights_and_names_fallback(tmp_path: Path) -> None:
    t = np.array([[0.0, 0.0, 1.0]] * 3)
    path = write_gltf(tmp_path / "w.gltf", np.eye(3), np.array([[0, 1, 2]]), targets=[t],
                      mesh_weights=[0.5])
    rig = GltfRig(path)
    assert rig.schema.names == ("target_0",)
    assert rig.schema.defaults.tolist() == [0.5]
    np.testing.assert_allclose(rig.neutral[:, 2], [0.5, 0.5, 1.5], atol=1e-6)  # eye(3) + 0.5 z


def test_morph_bounds_from_file(tmp_path: Path) -> None:
    bounds = tmp_path / "b.json"
    bounds.write_text(json.dumps({"morph": {"spread": [-1, 2]}}))
    rig = GltfRig(morph_triangle(tmp_path / "tri.gltf"), bounds=bounds)
    assert rig.schema.lower.tolist() == [0, -1] and rig.schema.upper.tolist() == [1, 2]


def test_skin_rest_pose_is_identity(tmp_path: Path) -> None:
    rig = GltfRig(two_joint_strip(tmp_path / "s.gltf"), bounds=TIP_Z)
    np.testing.assert_allclose(rig.neutral, [[0, 0, 0], [1, 0, 0], [0, 2, 0], [1, 1, 0]],
                               atol=1e-6)


@pytest.mark.parametrize("weights_dtype", ["<f4", "<u1", "<u2"])
@pytest.mark.parametrize("joints_dtype", ["<u1", "<u2"])
def test_skin_tip_rotation_hand_computed(tmp_path: Path, weights_dtype: str,
                                         joints_dtype: str) -> None:
    w = np.array([[1, 0, 0, 0], [1, 0, 0, 0], [1, 0, 0, 0], [0.5, 0.5, 0, 0]])
    if weights_dtype != "<f4":  # normalized integers: 1.0 -> max, 0.5 -> half of max
        top = np.iinfo(np.dtype(weights_dtype)).max
        w = np.round(w * top)
    j = np.array([[0, 0, 0, 0], [0, 0, 0, 0], [1, 0, 0, 0], [0, 1, 0, 0]])
    path = two_joint_strip(tmp_path / "s.glb", weights=w.astype(weights_dtype),
                           joints=j.astype(joints_dtype))
    rig = GltfRig(path, bounds=TIP_Z)
    assert rig.schema.names == ("Tip_rot_z",)
    got = rig.evaluate(np.array([[90.0]]))[0]
    # Tip: T(0,1,0) Rz(90) T(0,-1,0); (0,2,0) -> (0,1,0) -> (-1,0,0) -> (-1,1,0)
    # (1,1,0) half Root (1,1,0), half Tip (1,0,0) -> (0,1,0) -> (0,2,0): mean (0.5, 1.5, 0)
    want = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [-1.0, 1.0, 0.0], [0.5, 1.5, 0.0]])
    np.testing.assert_allclose(got, want, atol=2e-3 if weights_dtype == "<u1" else 1e-5)


def test_skin_root_rotation_moves_the_child(tmp_path: Path) -> None:
    bounds = {"joints": {"Root": {"z": [-90, 90]}, "Tip": {"z": [-90, 90]}}}
    rig = GltfRig(two_joint_strip(tmp_path / "s.gltf"), bounds=bounds)
    assert rig.schema.names == ("Root_rot_z", "Tip_rot_z")
    got = rig.evaluate(np.array([[90.0, 0.0], [90.0, 90.0]]))
    # Root Rz(90) maps (x, y) -> (-y, x) for every vertex
    np.testing.assert_allclose(got[0], [[0, 0, 0], [0, 1, 0], [-2, 0, 0], [-1, 1, 0]],
                               atol=1e-6)
    # both 90: Tip vertex (0,2,0) -> (-1,1,0) by Tip, then Root -> (-1,-1,0)
    np.testing.assert_allclose(got[1, 2], [-1, -1, 0], atol=1e-6)


def test_the_skinned_mesh_node_transform_is_ignored(tmp_path: Path) -> None:
    """glTF 2.0, "Skins": only the joints' transforms apply to a skinned mesh, not its node's."""
    rig = GltfRig(two_joint_strip(tmp_path / "s.gltf", mesh_translation=(5.0, 0.0, 0.0)),
                  bounds=TIP_Z)
    np.testing.assert_allclose(rig.neutral[:, 0], [0, 1, 0, 1], atol=1e-6)
    got = rig.evaluate(np.array([[90.0]]))[0]
    # Tip Rz(90) about (0, 1, 0): (0, 2, 0) -> (-1, 1, 0)
    np.testing.assert_allclose(got[2], [-1, 1, 0], atol=1e-5)


def test_a_skinned_mesh_under_a_posed_joint_still_follows_the_joints(tmp_path: Path) -> None:
    """The mesh node is a child of the controlled joint: its own (moving) transform must not
    cancel the pose."""
    path = two_joint_strip(tmp_path / "s.gltf")
    gltf = pygltflib.GLTF2().load(str(path))
    gltf.nodes[0].children = [1, 2]  # body under Root
    gltf.scenes[0].nodes = [0]
    gltf.save_json(str(path))
    rig = GltfRig(path, bounds={"joints": {"Root": {"z": [-90, 90]}}})
    got = rig.evaluate(np.array([[90.0]]))[0]
    # Root Rz(90) maps (x, y) -> (-y, x) for every vertex
    np.testing.assert_allclose(got, [[0, 0, 0], [0, 1, 0], [-2, 0, 0], [-1, 1, 0]], atol=1e-6)


def test_second_joint_set_counts(tmp_path: Path) -> None:
    """JOINTS_1/WEIGHTS_1 add four more influences (glTF 2.0, "Skinned Mesh Attributes")."""
    joints = np.array([[0, 0, 0, 0], [0, 0, 0, 0], [1, 0, 0, 0], [0, 0, 0, 0]], dtype=np.uint8)
    weights = np.array([[1, 0, 0, 0], [1, 0, 0, 0], [1, 0, 0, 0], [0.5, 0, 0, 0]], "<f4")
    joints_1 = np.array([[0, 0, 0, 0]] * 3 + [[1, 0, 0, 0]], dtype=np.uint8)
    weights_1 = np.array([[0, 0, 0, 0]] * 3 + [[0.5, 0, 0, 0]], "<f4")
    split = GltfRig(two_joint_strip(tmp_path / "split.gltf", joints=joints, weights=weights,
                                    joints_1=joints_1, weights_1=weights_1), bounds=TIP_Z)
    whole = GltfRig(two_joint_strip(tmp_path / "whole.gltf"), bounds=TIP_Z)
    poses = np.array([[0.0], [90.0], [-30.0]])
    np.testing.assert_allclose(split.evaluate(poses), whole.evaluate(poses), atol=1e-6)


def test_percent_encoded_buffer_uri(tmp_path: Path) -> None:
    path = morph_triangle(tmp_path / "tri.gltf", external_bin=True)
    spaced = tmp_path / "my buf.bin"
    path.with_suffix(".bin").rename(spaced)
    gltf = pygltflib.GLTF2().load(str(path))
    gltf.buffers[0].uri = "my%20buf.bin"
    gltf.save_json(str(path))
    np.testing.assert_allclose(GltfRig(path).neutral, TRIANGLE, atol=1e-7)


@pytest.mark.parametrize("edit", ["accessor", "node_mesh", "no_primitives", "matrix"])
def test_malformed_files_are_rig_errors(tmp_path: Path, edit: str) -> None:
    path = two_joint_strip(tmp_path / "s.gltf")
    gltf = pygltflib.GLTF2().load(str(path))
    if edit == "accessor":
        gltf.meshes[0].primitives[0].attributes.POSITION = 99
    elif edit == "node_mesh":
        gltf.nodes[2].mesh = 7
    elif edit == "no_primitives":
        gltf.meshes[0].primitives = []
    else:
        gltf.nodes[1].translation = None
        gltf.nodes[1].matrix = [1.0, 0.0, 0.0]
    gltf.save_json(str(path))
    with pytest.raises(RigError, match=str(path.name)):
        GltfRig(path, bounds=TIP_Z)


def test_matrix_node_and_euler_order(tmp_path: Path) -> None:
    """A joint given by a column-major matrix, rotated about x then y (intrinsic)."""
    positions = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    joints = np.zeros((3, 4), np.uint8)
    weights = np.array([[1, 0, 0, 0]] * 3, "<f4")
    nodes = [NodeSpec("Bone", matrix=np.eye(4).reshape(-1).tolist()),
             NodeSpec("body", mesh=0, skin=0)]
    nodes[0].matrix = [1, 0, 0, 0, 0, 1, 0, 0, 0, 0, 1, 0, 0, 0, 0.5, 1]  # translate z by 0.5
    ibm = np.eye(4)[None].copy()
    ibm[0, 2, 3] = -0.5
    path = write_gltf(tmp_path / "m.gltf", positions, np.array([[0, 1, 2]]), nodes=nodes,
                      skin_joints=[0], joints=joints, weights=weights, inverse_bind=ibm)
    rig = GltfRig(path, bounds={"joints": {"Bone": {"x": [-90, 90], "y": [-90, 90]}}})
    got = rig.evaluate(np.array([[90.0, 90.0]]))[0]
    # about the bone at (0,0,0.5): Rx(90) @ Ry(90) maps (x,y,z) -> (z, x, y);
    # (0,0,1): rel (0,0,0.5) -> (0.5,0,0) -> (0.5,0,0.5); (1,0,0): rel (1,0,-0.5) -> (-0.5,1,0)
    np.testing.assert_allclose(got[1], [0.5, 0.0, 0.5], atol=1e-6)
    np.testing.assert_allclose(got[2], [-0.5, 1.0, 0.5], atol=1e-6)


def test_pickle_round_trip(tmp_path: Path) -> None:
    rig = GltfRig(two_joint_strip(tmp_path / "s.gltf"), bounds=TIP_Z)
    back = pickle.loads(pickle.dumps(rig))
    poses = np.array([[10.0], [-45.0]])
    np.testing.assert_array_equal(back.evaluate(poses), rig.evaluate(poses))
    assert back.fingerprint() == rig.fingerprint()


def test_morph_fast_matches_naive() -> None:
    rng = np.random.default_rng(0)
    base, tg, w = rng.normal(size=(7, 3)), rng.normal(size=(4, 7, 3)), rng.random((5, 4))
    np.testing.assert_allclose(morph_positions(base, tg, w), morph_positions_naive(base, tg, w))


def test_errors_name_the_problem(tmp_path: Path) -> None:
    with pytest.raises(RigError, match=r"nope\.glb"):
        GltfRig(tmp_path / "nope.glb")
    strip = two_joint_strip(tmp_path / "s.gltf")
    with pytest.raises(RigError, match="'Elbow'"):
        GltfRig(strip, bounds={"joints": {"Elbow": {"z": [-10, 10]}}})
    with pytest.raises(RigError, match="lo < hi"):
        GltfRig(strip, bounds={"joints": {"Tip": {"z": [10, -10]}}})
    with pytest.raises(RigError, match="no controls"):
        GltfRig(strip)
    with pytest.raises(RigError, match="'w'"):
        GltfRig(strip, bounds={"joints": {"Tip": {"w": [0, 1]}}})
    with pytest.raises(RigError, match="no mesh named 'face'"):
        GltfRig(strip, mesh="face", bounds=TIP_Z)
    bad = tmp_path / "bad.gltf"
    bad.write_text("{ not json")
    with pytest.raises(RigError, match=r"bad\.gltf"):
        GltfRig(bad)
