"""OpenUSD output read back through usd-core's own UsdSkel API (AnimQuery, SkinningQuery,
BlendShapeQuery) and checked by its validators (the UsdValidation framework behind usdchecker)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import tiny_rig
from rigcast.export.rigs.demo_rigs import tamsin_lantern_arm
from rigcast.runtime.schema import Control, ControlSchema
from scipy.spatial.transform import Rotation

from rigcast.writers.animation_out import morph_basis
from rigcast.writers.frame_info import FrameQuality, HeadPose
from rigcast.writers.skeleton import skeleton_from_rig

if os.environ.get("CI"):
    import pxr
pxr = pytest.importorskip("pxr", reason="usd-core not installed: pip install 'rigcast[usd]'")
from pxr import Usd, UsdGeom, UsdSkel, Vt  # noqa: E402

from rigcast.writers.usd_out import validation_issues, write_usd  # noqa: E402

TOL = 1e-5  # issue 14's acceptance: UsdSkel reads back the solved values within 1e-5


def _head(t: int) -> HeadPose:
    rng = np.random.default_rng(4)
    rot = Rotation.from_rotvec(np.cumsum(rng.normal(0, 0.02, (t, 3)), axis=0)).as_quat()
    return HeadPose(np.cumsum(rng.normal(0, 0.01, (t, 3)), axis=0), rot, np.ones(t))


def _queries(path: Path) -> tuple[object, object, object, object]:
    stage = Usd.Stage.Open(str(path))
    root = UsdSkel.Root(stage.GetDefaultPrim())
    cache = UsdSkel.Cache()
    cache.Populate(root, Usd.TraverseInstanceProxies())
    skel = UsdSkel.Skeleton(stage.GetPrimAtPath(root.GetPath().AppendChild("Skel")))
    mesh = stage.GetPrimAtPath(root.GetPath().AppendChild("Mesh"))
    return stage, cache.GetSkelQuery(skel), cache.GetSkinningQuery(mesh), mesh


def _errors(path: Path) -> list[tuple[str, str, str]]:
    return [i for i in validation_issues(path) if i[0] == "Error"]


@pytest.mark.parametrize("suffix", [".usda", ".usdc", ".usd"])
def test_joint_rig_reads_back_through_usdskel(tmp_path: Path, suffix: str) -> None:
    rig = tamsin_lantern_arm()
    skeleton = skeleton_from_rig(rig)
    t = 24
    rng = np.random.default_rng(0)
    controls = np.clip(np.cumsum(rng.normal(0, 4, (t, 12)), axis=0), -35, 35)
    times = np.arange(t) / 24.0
    head = _head(t)
    path = write_usd(tmp_path / f"arm{suffix}", rig.schema, controls, times, skeleton=skeleton,
                     head=head, fps=24.0)
    assert _errors(path) == []
    stage, skel_query, skin_query, mesh = _queries(path)
    assert stage.GetTimeCodesPerSecond() == 24.0 and stage.GetEndTimeCode() == t - 1
    anim = skel_query.GetAnimQuery()
    points = np.array(UsdGeom.Mesh(mesh).GetPointsAttr().Get(), np.float32)
    xforms = UsdGeom.XformCache()
    expected = head.apply(rig.evaluate(controls).astype(np.float64))
    diag = float(np.linalg.norm(rig.neutral.max(0) - rig.neutral.min(0)))
    for f in range(t):
        code = Usd.TimeCode(f)
        # joint local transforms (USD row-vector matrices, transposed) = the solved joint poses
        local = np.array([np.array(m) for m in anim.ComputeJointLocalTransforms(code)])
        np.testing.assert_allclose(local.transpose(0, 2, 1),
                                   skeleton.local_matrices(controls[f : f + 1])[0], atol=TOL)
        # UsdSkel's own linear blend skinning, then the root's head-pose transform
        skinned = Vt.Vec3fArray.FromNumpy(points.copy())
        assert skin_query.ComputeSkinnedPoints(skel_query.ComputeSkinningTransforms(code),
                                               skinned, code)
        xforms.SetTime(code)
        world = np.array(xforms.GetLocalToWorldTransform(mesh))
        moved = np.array(skinned, np.float64) @ world[:3, :3] + world[3, :3]
        assert np.abs(moved - expected[f]).max() <= TOL * diag
    values = [stage.GetPrimAtPath("/tamsin_lantern_arm/Skel/Anim").GetAttribute(
        f"rigcast:controls:{n}").Get(Usd.TimeCode(5)) for n in rig.schema.names]
    np.testing.assert_allclose(values, controls[5], atol=TOL * 40)  # float32 degrees


def test_blendshape_rig_reads_back_weights_and_quality(tmp_path: Path) -> None:
    rig = tiny_rig()
    basis = morph_basis("tiny", rig.schema, rig.neutral, rig.faces, rig.evaluate)
    t = 30
    controls = np.random.default_rng(1).random((t, len(rig.schema)))
    times = np.arange(t) / 30.0
    fit = np.linspace(0.001, 0.003, t)
    quality = FrameQuality(fit, 2 * fit, np.arange(t) == 7, np.arange(t) == 9,
                           np.zeros(t, bool))
    path = write_usd(tmp_path / "tiny.usda", rig.schema, controls, times, basis=basis,
                     quality=quality, head=_head(t), fps=30.0)
    assert _errors(path) == []
    stage, skel_query, _skin_query, mesh = _queries(path)
    anim = skel_query.GetAnimQuery()
    assert list(anim.GetBlendShapeOrder()) == list(basis.names)
    binding = UsdSkel.BindingAPI(mesh)
    shapes = UsdSkel.BlendShapeQuery(binding)
    points = np.array(UsdGeom.Mesh(mesh).GetPointsAttr().Get(), np.float32)
    for f in (0, 11, t - 1):
        code = Usd.TimeCode(f)
        weights = np.array(anim.ComputeBlendShapeWeights(code))
        assert np.abs(weights - controls[f, list(basis.control_indices)]).max() <= TOL
        # UsdSkel's blend shape evaluation against the rig (a linear rig: exact)
        sub = shapes.ComputeSubShapeWeights(Vt.FloatArray(weights.tolist()))
        deformed = Vt.Vec3fArray.FromNumpy(points.copy())
        assert shapes.ComputeDeformedPoints(*sub,
                                            shapes.ComputeBlendShapePointIndices(),
                                            shapes.ComputeSubShapePointOffsets(), deformed)
        np.testing.assert_allclose(np.array(deformed), rig.evaluate(controls[f : f + 1])[0],
                                   atol=1e-5)
    root = stage.GetDefaultPrim()
    for name, expected in (("fitRms", fit), ("offManifold", quality.off_manifold),
                           ("clamped", quality.clamped)):
        got = [root.GetAttribute(f"rigcast:{name}").Get(Usd.TimeCode(f)) for f in range(t)]
        np.testing.assert_allclose(np.asarray(got, np.float64), expected, atol=1e-7)


def test_the_validators_can_fail(tmp_path: Path) -> None:
    """A skinned mesh whose binding API schema is missing is an error the validators report."""
    rig = tamsin_lantern_arm()
    path = write_usd(tmp_path / "arm.usda", rig.schema, np.zeros((2, 12)), np.array([0.0, 0.1]),
                     skeleton=skeleton_from_rig(rig), fps=10.0)
    text = path.read_text().replace('prepend apiSchemas = ["SkelBindingAPI"]', "")
    path.write_text(text)
    assert any("SkelBindingApiAppliedValidator" in name for _, name, _ in _errors(path))


def test_solve_writes_usd(tmp_path: Path, tiny_bundle: Path) -> None:
    rig = tiny_rig()
    controls = 0.5 + 0.3 * np.sin(np.arange(40)[:, None] / 6.0 + np.arange(len(rig.schema)))
    np.savez(tmp_path / "take.npz", vertices=rig.evaluate(controls), times=np.arange(40) / 25.0)
    out = tmp_path / "take.usdc"
    proc = subprocess.run([sys.executable, "-m", "rigcast", "solve", str(tiny_bundle),
                           str(tmp_path / "take.npz"), "-o", str(out)], capture_output=True,
                          text=True, timeout=120, check=False, stdin=subprocess.DEVNULL)
    assert proc.returncode == 0, proc.stderr
    assert _errors(out) == []
    stage, skel_query, _, _ = _queries(out)
    assert stage.GetTimeCodesPerSecond() == 25.0
    weights = np.array(skel_query.GetAnimQuery().ComputeBlendShapeWeights(Usd.TimeCode(10)))
    np.testing.assert_allclose(weights, controls[10], atol=0.02)  # the tiny bundle's solve


def test_usd_needs_a_rig_form(tmp_path: Path) -> None:
    from rigcast.writers.animation_out import AnimationError

    schema = ControlSchema((Control("a", 0.0, 1.0, 0.0),))
    with pytest.raises(AnimationError, match="morph targets or its skeleton"):
        write_usd(tmp_path / "x.usda", schema, np.zeros((2, 1)), np.array([0.0, 1.0]))
