"""The rig zoo: deterministic per seed, every kind reachable, sizes in bounds, rigid regions really
unmoved, picklable, finite; the jaw and chain math against their naive twins."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from rigcast.export.rigs import zoo_mesh as zm
from rigcast.export.rigs.gltf_eval import skin_points
from rigcast.export.rigs.rig import Rig, RigError
from rigcast.export.rigs.rig_loader import load_rig
from rigcast.export.rigs.zoo import KINDS, ZooRig, make_zoo_rig
from scipy.spatial.transform import Rotation

SMALL = {"max_vertices": 1500, "max_controls": 24}


def _poses(rig: Rig, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo, hi = rig.schema.lower.astype(np.float64), rig.schema.upper.astype(np.float64)
    return lo + (hi - lo) * rng.random((n, rig.control_count))


def _one_per_kind() -> dict[tuple[str, bool], ZooRig]:
    """The first small rig of each (kind, rigid region) among seeds 0, 1, 2, ..."""
    found: dict[tuple[str, bool], ZooRig] = {}
    for seed in range(80):
        rig = make_zoo_rig(seed, **SMALL)
        found.setdefault((rig.spec.kind, rig.rigid_region), rig)
        if len(found) == 2 * len(KINDS):
            break
    return found


@pytest.fixture(scope="module")
def per_kind() -> dict[tuple[str, bool], ZooRig]:
    return _one_per_kind()


def test_every_kind_with_and_without_a_rigid_region_is_reachable(
    per_kind: dict[tuple[str, bool], ZooRig],
) -> None:
    assert set(per_kind) == {(k, r) for k in KINDS for r in (False, True)}
    assert per_kind[("blendshapes", True)].linear
    assert not any(rig.linear for (k, _), rig in per_kind.items() if k != "blendshapes")
    kinds = {k: rig.spec for (k, _), rig in per_kind.items()}
    assert sum(kinds["correctives"].corrective_orders) > 0
    assert kinds["jaw_face"].jaw_controls in (1, 2) and "jaw_open" in per_kind[
        ("jaw_face", True)].schema.names
    assert kinds["chain"].chains >= 1 and kinds["chain"].surface == "tubes"


def test_same_seed_same_rig_and_different_seeds_differ() -> None:
    a, b, c = make_zoo_rig(17, **SMALL), make_zoo_rig(17, **SMALL), make_zoo_rig(18, **SMALL)
    assert a.spec == b.spec
    assert a.schema.to_dict() == b.schema.to_dict()
    np.testing.assert_array_equal(a.neutral, b.neutral)
    np.testing.assert_array_equal(a.faces, b.faces)
    w = _poses(a, 8)
    np.testing.assert_array_equal(a.evaluate(w), b.evaluate(w))
    assert a.fingerprint() == b.fingerprint() != c.fingerprint()
    assert a.neutral.shape != c.neutral.shape or not np.array_equal(a.neutral, c.neutral)


def test_sizes_respect_the_bounds_and_most_rigs_are_small() -> None:
    sizes = [(r.vertex_count, r.control_count) for r in (make_zoo_rig(s) for s in range(40))]
    assert all(1000 <= v <= 20000 and 10 <= c <= 150 for v, c in sizes), sizes
    assert sum(v <= 5000 for v, _ in sizes) >= 0.6 * len(sizes)
    assert max(v for v, _ in sizes) > 5000 and max(c for _, c in sizes) > 60  # both tails reached
    for seed in range(12):
        rig = make_zoo_rig(seed, max_vertices=1200, max_controls=12)
        assert 1000 <= rig.vertex_count <= 1200 and 10 <= rig.control_count <= 12, rig.spec
        assert rig.spec.vertices == rig.vertex_count and rig.spec.controls == rig.control_count


def test_meshes_are_surfaces_of_about_a_head_size(per_kind: dict[tuple[str, bool], ZooRig]) -> None:
    for rig in per_kind.values():
        diag = float(np.linalg.norm(np.ptp(rig.neutral, axis=0)))
        assert 1.5 <= diag <= 6.0, (rig.spec, diag)
        f = rig.faces
        assert f.dtype == np.int32 and f.ndim == 2 and f.shape[1] == 3
        assert f.min() >= 0 and f.max() < rig.vertex_count and len(f) >= rig.vertex_count
        used = np.zeros(rig.vertex_count, bool)
        used[f.reshape(-1)] = True
        assert used.all(), rig.spec  # every vertex belongs to a face


def test_a_claimed_rigid_region_is_unmoved_and_otherwise_every_vertex_moves(
    per_kind: dict[tuple[str, bool], ZooRig],
) -> None:
    for (_, rigid), rig in per_kind.items():
        s = rig.schema
        w = np.concatenate([_poses(rig, 16), s.lower[None], s.upper[None]])
        moved = np.linalg.norm(rig.evaluate(w) - rig.neutral, axis=2).max(axis=0)  # (V,)
        if rigid:
            assert 0.05 <= rig.rigid_mask.mean() <= 0.6, rig.spec
            np.testing.assert_array_equal(moved[rig.rigid_mask], 0.0)
            assert (moved[~rig.rigid_mask] > 0).mean() > 0.9
        else:
            assert not rig.rigid_mask.any()
            assert moved.min() > 1e-4 * np.ptp(rig.neutral), rig.spec


def test_pickles_and_evaluates_finite(per_kind: dict[tuple[str, bool], ZooRig]) -> None:
    for rig in per_kind.values():
        w = _poses(rig, 5, seed=3)
        out = rig.evaluate(w)
        assert out.dtype == np.float32 and np.isfinite(out).all()
        again = pickle.loads(pickle.dumps(rig))
        np.testing.assert_array_equal(again.evaluate(w), out)
        np.testing.assert_array_equal(rig.evaluate(rig.schema.defaults[None])[0], rig.neutral)
        assert len(pickle.dumps(rig)) < 1000  # rebuilt from its seed, not shipped as arrays


def test_linear_kind_superposes_and_correctives_do_not(
    per_kind: dict[tuple[str, bool], ZooRig],
) -> None:
    def defect(rig: Rig) -> float:
        d = rig.schema.defaults[None].astype(np.float64)
        a, b = _poses(rig, 4, seed=5), _poses(rig, 4, seed=6)
        mid = d + 0.5 * (a - d) + 0.5 * (b - d)
        lhs = rig.evaluate(mid).astype(np.float64)
        rhs = 0.5 * (rig.evaluate(a).astype(np.float64) + rig.evaluate(b))
        return float(np.abs(lhs - rhs).max())

    assert defect(per_kind[("blendshapes", False)]) < 1e-5
    for kind in ("correctives", "jaw_face", "chain"):
        assert defect(per_kind[(kind, False)]) > 1e-3, kind


def test_local_shapes_touch_a_few_percent_of_the_vertices() -> None:
    rig = next(r for r in (make_zoo_rig(s) for s in range(40))
               if r.spec.local_shapes >= 3 and r.spec.large_shapes >= 3)
    s = rig.schema
    share: dict[str, list[float]] = {"local": [], "large": []}
    for i, group in enumerate(s.groups):
        if group in share:
            w = s.defaults[None].astype(np.float64).copy()
            w[0, i] = s.upper[i]
            d = np.linalg.norm(rig.evaluate(w)[0] - rig.neutral, axis=1)
            share[group].append(float((d > 0.1 * d.max()).mean()))
    assert np.median(share["local"]) < 0.06 < np.median(share["large"]), share


def test_jaw_skin_equals_two_bone_skin_points() -> None:
    rng = np.random.default_rng(0)
    points = rng.normal(size=(3, 40, 3))
    angles = rng.uniform(-0.5, 0.5, size=(3, 3))
    pivot = np.array([0.0, -0.2, -0.15])
    w = rng.random(40)
    w[:12] = 0.0  # vertices off the jaw take the fast path's skip
    rot = Rotation.from_euler("XYZ", angles).as_matrix()  # outside reference: SciPy
    mats = np.tile(np.eye(4), (3, 2, 1, 1))
    mats[:, 1, :3, :3] = rot
    mats[:, 1, :3, 3] = pivot - rot @ pivot
    naive = skin_points(points, mats, np.stack([1 - w, w], axis=1))
    np.testing.assert_allclose(zm.jaw_skin(points, angles, pivot, w), naive, atol=1e-12)


def test_chain_kinematics_and_weights() -> None:
    rng = np.random.default_rng(1)
    angles = rng.uniform(-0.6, 0.6, size=(2, 4, 3))
    mats = zm.chain_matrices(angles, 0.25)
    # Joint 3's rest position (0, 0.75, 0) goes where the composed rotations take it.
    tip = np.zeros(3)
    for j in range(3, 0, -1):  # p_j = R_j-frame offsets composed from the root outwards
        tip = Rotation.from_euler("XYZ", angles[0, j - 1]).apply(tip + np.array([0.0, 0.25, 0.0]))
    np.testing.assert_allclose(mats[0, 3, :3, :3] @ [0, 0.75, 0] + mats[0, 3, :3, 3], tip,
                               atol=1e-12)
    w = zm.chain_weights(np.linspace(-0.2, 1.2, 50), 4, 0.25, 1.0, root=True)
    assert w.shape == (50, 5)
    np.testing.assert_allclose(w.sum(axis=1), 1.0)
    for d in (np.array([0.3, 0.5, -0.2]), np.array([0.0, -1.0, 0.0])):
        r = zm.rotation_to(d)
        np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-12)
        np.testing.assert_allclose(r @ [0, 1, 0], d / np.linalg.norm(d), atol=1e-12)


def test_zoo_spec_loads_and_bad_specs_are_named() -> None:
    rig = load_rig("zoo:5")
    assert rig.name == "zoo-5" and rig.fingerprint() == make_zoo_rig(5).fingerprint()
    for bad in ("zoo:x", "zoo:-1", "zoo:"):
        with pytest.raises(RigError, match="zoo seed"):
            load_rig(bad)
    with pytest.raises(RigError, match="max_vertices"):
        make_zoo_rig(1, max_vertices=500)
    with pytest.raises(RigError, match="max_controls"):
        make_zoo_rig(1, max_controls=400)
