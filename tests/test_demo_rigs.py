"""The built-in Tamsin demo rigs: schema, determinism, fast-vs-naive, (non-)linearity, skinning."""

from __future__ import annotations

import pickle
import re

import numpy as np
import pytest
from rigcast.export.rigs.demo_rigs import (
    DEMO_RIGS,
    JAW,
    JAW_RANGE_DEG,
    tamsin_face,
    tamsin_face_linear,
    tamsin_lantern_arm,
)
from rigcast.export.rigs.gltf_eval import euler_xyz_matrices, skin_points, skin_points_naive
from rigcast.export.rigs.rig import Rig, RigError
from scipy.spatial.transform import Rotation


def _random_poses(rig: Rig, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo, hi = rig.schema.lower.astype(np.float64), rig.schema.upper.astype(np.float64)
    return lo + (hi - lo) * rng.random((n, rig.control_count))


@pytest.fixture(scope="module")
def head() -> Rig:
    return tamsin_face()


@pytest.fixture(scope="module")
def face_linear() -> Rig:
    return tamsin_face_linear()


@pytest.fixture(scope="module")
def arm() -> Rig:
    return tamsin_lantern_arm()


def test_registry_names() -> None:
    assert set(DEMO_RIGS) == {"face", "face-linear", "arm"}
    assert DEMO_RIGS["face-linear"]().linear
    assert not DEMO_RIGS["face"]().linear


def test_face_schema(head: Rig) -> None:
    s = head.schema
    assert 40 <= len(s) <= 60
    assert 3000 <= head.vertex_count <= 4000
    for c in s.controls:
        assert re.fullmatch(r"[a-z]+(_[a-z]+)*", c.name), c.name
        assert c.group, c.name
        if c.name.endswith(("_l", "_r")):
            twin = s.controls[s.index(c.pair)]
            assert twin.pair == c.name and twin.name[:-2] == c.name[:-2]
    jaw = s.controls[s.index(JAW)]
    assert (jaw.minimum, jaw.maximum, jaw.default) == (*JAW_RANGE_DEG, 0.0)
    bipolar = [c.name for c in s.controls if c.minimum < 0]
    assert set(bipolar) == {"mouth_shift", "jaw_slide"}
    assert all(
        c.minimum == 0 and c.maximum == 1 for c in s.controls if c.name not in {JAW, *bipolar}
    )


def test_faces_valid(head: Rig, arm: Rig) -> None:
    for rig in (head, arm):
        assert rig.faces.dtype == np.int32 and rig.faces.shape[1] == 3
        assert rig.faces.min() == 0 and rig.faces.max() == rig.vertex_count - 1
        tri = rig.neutral[rig.faces]
        area = np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
        assert area.min() > 0


@pytest.mark.parametrize("name", sorted(DEMO_RIGS))
def test_neutral_at_defaults_and_deterministic(name: str) -> None:
    a, b = DEMO_RIGS[name](), DEMO_RIGS[name]()
    np.testing.assert_array_equal(a.neutral, b.neutral)
    rest = a.evaluate(a.schema.defaults[None])
    np.testing.assert_allclose(rest[0], a.neutral, atol=1e-6)
    poses = _random_poses(a, 16)
    np.testing.assert_array_equal(a.evaluate(poses), b.evaluate(poses))
    assert a.fingerprint() == b.fingerprint()


@pytest.mark.parametrize("name", sorted(DEMO_RIGS))
def test_pickle_round_trip(name: str) -> None:
    rig = DEMO_RIGS[name]()
    blob = pickle.dumps(rig)
    assert len(blob) < 1000  # rebuilt from its arguments, not shipped as arrays
    back = pickle.loads(blob)
    poses = _random_poses(rig, 8, seed=3)
    np.testing.assert_array_equal(back.evaluate(poses), rig.evaluate(poses))
    assert back.fingerprint() == rig.fingerprint()


def test_fast_matches_naive(head: Rig, face_linear: Rig) -> None:
    for rig in (head, face_linear):
        poses = _random_poses(rig, 5, seed=1)
        fast = rig.evaluate(poses)
        naive = rig.evaluate_naive(poses)
        np.testing.assert_allclose(fast, naive, atol=2e-5)


def test_chunked_batch_matches_single_rows(head: Rig) -> None:
    poses = _random_poses(head, 1100, seed=2)  # crosses the 1024-pose chunk boundary
    batch = head.evaluate(poses)
    for i in (0, 1023, 1024, 1099):
        np.testing.assert_allclose(batch[i], head.evaluate(poses[i : i + 1])[0], atol=1e-6)


def test_face_is_not_linear(head: Rig) -> None:
    s = head.schema
    a, b = s.defaults.astype(np.float64).copy(), s.defaults.astype(np.float64).copy()
    a[s.index(JAW)] = 20.0
    b[s.index("lip_pucker")] = 1.0
    b[s.index("lip_funnel")] = 1.0
    f0, fa, fb, fab = head.evaluate(np.stack([s.defaults, a, b, a + b - s.defaults]))
    assert np.abs(fab - (fa + fb - f0)).max() > 0.01


def test_linear_variant_superposes_exactly(face_linear: Rig) -> None:
    s = face_linear.schema
    rng = np.random.default_rng(5)
    d = s.defaults.astype(np.float64)
    a = d + 0.5 * (rng.random(len(s)) * (s.upper - d))
    b = d + 0.5 * (rng.random(len(s)) * (s.upper - d))
    f0, fa, fb, fab = face_linear.evaluate(np.stack([d, a, b, a + b - d]))
    np.testing.assert_allclose(fab, fa + fb - f0, atol=2e-5)


def test_shapes_are_localised_and_mirrored(face_linear: Rig) -> None:
    s, n = face_linear.schema, face_linear.neutral
    # mirror map: the vertex at (-x, y, z); the sphere grid is symmetric, the noise is tiny
    mirrored = n * np.array([-1.0, 1.0, 1.0])
    poses = np.zeros((2, len(s)))
    poses[0, s.index("brow_arch_l")] = 1.0
    poses[1, s.index("brow_arch_r")] = 1.0
    left, right = face_linear.evaluate(poses) - n
    size = np.linalg.norm(left, axis=1)
    assert size[n[:, 0] < 0].sum() < 0.05 * size.sum()  # a left control moves the left (+x)
    assert size[n[:, 1] < 0.1].sum() < 0.01 * size.sum()  # and the brow moves the upper head
    i = int(np.argmax(np.linalg.norm(left, axis=1)))
    j = int(np.argmin(np.linalg.norm(n - mirrored[i], axis=1)))
    np.testing.assert_allclose(right[j], left[i] * np.array([-1.0, 1.0, 1.0]), atol=2e-3)


def test_jaw_rotation_matches_scipy(head: Rig) -> None:
    """The jaw is two-bone LBS: p + w (R (p - c) + c - p), R about +x (SciPy as the reference)."""
    from rigcast.export.rigs.demo_face import JAW_PIVOT, jaw_weights

    s = head.schema
    pose = s.defaults.astype(np.float64)
    pose[s.index(JAW)] = 18.0
    got = head.evaluate(pose[None])[0]
    n = head.neutral.astype(np.float64)
    rot = Rotation.from_euler("x", 18.0, degrees=True)
    w = jaw_weights(n)[:, None]
    want = n + w * (rot.apply(n - JAW_PIVOT) + JAW_PIVOT - n)
    np.testing.assert_allclose(got, want, atol=1e-5)
    front = np.flatnonzero(n[:, 2] > 0.4)
    chin = int(front[np.argmin(n[front, 1])])  # the lowest vertex on the front
    assert got[chin, 1] < n[chin, 1] - 0.1  # the jaw opens downwards


def test_euler_matches_scipy() -> None:
    ang = np.random.default_rng(0).uniform(-2, 2, (20, 3))
    want = Rotation.from_euler("XYZ", ang).as_matrix()
    np.testing.assert_allclose(euler_xyz_matrices(ang), want, atol=1e-12)


def test_skin_fast_matches_naive(arm: Rig) -> None:
    poses = _random_poses(arm, 3, seed=4)
    mats = arm.joint_matrices(poses)
    w = arm.skin_weights
    naive = skin_points_naive(arm.neutral, mats, w)
    np.testing.assert_allclose(skin_points(arm.neutral, mats, w), naive, atol=1e-5)
    per_pose = np.broadcast_to(arm.neutral, (3, *arm.neutral.shape)).copy()
    np.testing.assert_allclose(skin_points(per_pose, mats, w), naive, atol=1e-5)
    np.testing.assert_allclose(arm.evaluate(poses), naive, atol=1e-5)


def test_arm_base_curl_is_rigid_rotation(arm: Rig) -> None:
    s = arm.schema
    assert len(s) == 12 and all(c.minimum < 0 < c.maximum for c in s.controls)
    pose = np.zeros((1, len(s)))
    pose[0, s.index("arm_base_curl")] = 30.0
    got = arm.evaluate(pose)[0]
    want = Rotation.from_euler("x", 30.0, degrees=True).apply(arm.neutral.astype(np.float64))
    np.testing.assert_allclose(got, want, atol=1e-5)


def test_arm_tip_joint_moves_only_the_top(arm: Rig) -> None:
    s = arm.schema
    pose = np.zeros((1, len(s)))
    pose[0, s.index("arm_grip_sway")] = 35.0
    delta = np.linalg.norm(arm.evaluate(pose)[0] - arm.neutral, axis=1)
    assert delta[arm.neutral[:, 1] < 1.2].max() < 1e-6
    assert delta.max() > 0.1


def test_bad_shape_is_rig_error(head: Rig) -> None:
    with pytest.raises(RigError, match=r"\(B, 46\)"):
        head.evaluate(np.zeros((2, 3)))
