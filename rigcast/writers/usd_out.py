"""Solved controls as an OpenUSD stage (``.usda`` text, ``.usdc`` crate, ``.usd`` crate), through
usd-core's UsdSkel schemas (the ``usd`` extra).

Layout (UsdSkel: SkelRoot, Skeleton, SkelAnimation, BlendShape, SkelBindingAPI):

- ``/<Rig>`` SkelRoot, the default prim. Its ``xformOp:transform`` is time-sampled with the head
  pose (the rigid motion stabilisation removed), so the result moves as the take did. It also
  holds the per-frame quality as custom attributes ``rigcast:fitRms``, ``rigcast:fitMax``
  (NaN: not computed), ``rigcast:offManifold``, ``rigcast:clamped`` and ``rigcast:stale``.
- ``/<Rig>/Skel`` Skeleton: a skinned rig's joints (rest and bind transforms), or one ``root``
  joint for a blendshape rig; bound to ``/<Rig>/Skel/Anim``.
- ``/<Rig>/Skel/Anim`` SkelAnimation: joint translations, rotations and scales per frame, and
  ``blendShapeWeights`` per frame for the blendshape controls; every control's value as a custom
  attribute ``rigcast:controls:<name>``.
- ``/<Rig>/Mesh`` Mesh with SkelBindingAPI: rest points (pre-skinning), joint influences, and a
  BlendShape prim per blendshape control (the delta of one unit).

Time codes are frames: ``timeCodesPerSecond`` and ``framesPerSecond`` are the take's rate and
frame i is at time code ``times_s[i] * fps``.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.export.rigs.gltf_eval import decompose_trs
from rigcast.runtime.schema import ControlSchema
from rigcast.writers.animation_out import AnimationError, MorphBasis, _check_take
from rigcast.writers.frame_info import FLAG_NAMES, FrameQuality, HeadPose
from rigcast.writers.skeleton import Skeleton

log = logging.getLogger(__name__)

INSTALL_HINT = "pip install 'rigcast[usd]'"


def _pxr() -> Any:
    try:
        from pxr import Gf, Sdf, Tf, Usd, UsdGeom, UsdSkel, Vt
    except ImportError:
        raise AnimationError(f"USD output needs usd-core: {INSTALL_HINT}") from None
    return Gf, Sdf, Tf, Usd, UsdGeom, UsdSkel, Vt


def _rows(m: np.ndarray) -> list[list[float]]:
    """Our column-vector matrix (4, 4) -> USD's row-vector layout (translation in the last row)."""
    return np.asarray(m, np.float64).T.tolist()


def _unique_identifiers(names: list[str], make_valid: Any) -> list[str]:
    out: list[str] = []
    for n in names:
        base = make_valid(n)
        name, k = base, 1
        while name in out:
            k += 1
            name = f"{base}_{k}"
        out.append(name)
    return out


def write_usd(path: str | Path, schema: ControlSchema, controls: np.ndarray, times_s: np.ndarray,
              *, basis: MorphBasis | None = None, skeleton: Skeleton | None = None,
              head: HeadPose | None = None, quality: FrameQuality | None = None,
              fps: float | None = None) -> Path:
    """Write a UsdSkel stage; see the module docstring. controls (T, C) in schema order."""
    gf, sdf, tf, usd, usd_geom, usd_skel, vt = _pxr()
    path = Path(path)
    if path.suffix.lower() not in (".usda", ".usdc", ".usd"):
        raise AnimationError(f"{path}: USD output needs a .usda, .usdc or .usd extension")
    if basis is None and skeleton is None:
        raise AnimationError("USD output needs the rig's morph targets or its skeleton")
    controls, times_s = _check_take(controls, times_s, len(schema))
    rate = float(fps) if fps else (1.0 / float(np.median(np.diff(times_s)))
                                   if times_s.shape[0] > 1 else 60.0)
    codes = times_s * rate
    name = (skeleton.name if skeleton else basis.name if basis else "") or "rig"
    if skeleton is not None:
        base, faces = skeleton.base, skeleton.faces
        targets, shape_names, cols = (skeleton.targets, skeleton.target_names,
                                      skeleton.target_controls)
        joint_names, parents = list(skeleton.names), list(skeleton.parents)
        weights = np.asarray(skeleton.weights, np.float64)
    else:
        assert basis is not None
        base, faces = basis.neutral, basis.faces
        targets, shape_names, cols = basis.targets, basis.names, basis.control_indices
        joint_names, parents = ["root"], [-1]
        weights = np.ones((base.shape[0], 1))
    stage = usd.Stage.CreateNew(str(path))
    stage.SetTimeCodesPerSecond(rate)
    stage.SetFramesPerSecond(rate)
    stage.SetStartTimeCode(float(codes[0]))
    stage.SetEndTimeCode(float(codes[-1]))
    usd_geom.SetStageUpAxis(stage, usd_geom.Tokens.y)
    usd_geom.SetStageMetersPerUnit(stage, 1.0)
    root_path = sdf.Path("/" + tf.MakeValidIdentifier(name))
    root = usd_skel.Root.Define(stage, root_path)
    stage.SetDefaultPrim(root.GetPrim())

    # --- skeleton and animation -------------------------------------------------------------
    idents = _unique_identifiers(joint_names, tf.MakeValidIdentifier)
    tokens: list[str] = []
    for k, p in enumerate(parents):
        tokens.append(idents[k] if p < 0 else f"{tokens[p]}/{idents[k]}")
    skel = usd_skel.Skeleton.Define(stage, root_path.AppendChild("Skel"))
    skel.CreateJointsAttr(tokens)
    t, j = controls.shape[0], len(tokens)
    if skeleton is not None:
        rest_local = skeleton.local_matrices(np.zeros((1, controls.shape[1])))[0]
        bind_world = np.linalg.inv(skeleton.inverse_bind)
        local = skeleton.local_matrices(controls).reshape(t * j, 4, 4)
    else:
        rest_local = bind_world = np.eye(4)[None]
        local = np.broadcast_to(np.eye(4), (t, 4, 4)).copy()
    skel.CreateRestTransformsAttr(vt.Matrix4dArray([gf.Matrix4d(_rows(m)) for m in rest_local]))
    skel.CreateBindTransformsAttr(vt.Matrix4dArray([gf.Matrix4d(_rows(m)) for m in bind_world]))
    trans, rot, scale, err = decompose_trs(local)
    if err > 1e-5 * max(1.0, float(np.abs(local[:, :3, 3]).max(initial=0.0))):
        raise AnimationError(f"{name}: a joint's local transform has shear (TRS error {err:.2g}); "
                             "UsdSkel animation cannot hold it")
    anim = usd_skel.Animation.Define(stage, skel.GetPath().AppendChild("Anim"))
    anim.CreateJointsAttr(tokens)
    t_attr, r_attr, s_attr = (anim.CreateTranslationsAttr(), anim.CreateRotationsAttr(),
                              anim.CreateScalesAttr())
    trans, rot, scale = trans.reshape(t, j, 3), rot.reshape(t, j, 4), scale.reshape(t, j, 3)
    shape_ids = _unique_identifiers(list(shape_names), tf.MakeValidIdentifier)
    bs_attr = None
    if shape_ids:
        anim.CreateBlendShapesAttr(shape_ids)
        bs_attr = anim.CreateBlendShapeWeightsAttr()
    prim = anim.GetPrim()
    control_attrs = [prim.CreateAttribute(f"rigcast:controls:{n}", sdf.ValueTypeNames.Float)
                     for n in _unique_identifiers(list(schema.names), tf.MakeValidIdentifier)]
    for f in range(t):
        code = usd.TimeCode(float(codes[f]))
        t_attr.Set(vt.Vec3fArray([gf.Vec3f(*v) for v in trans[f]]), code)
        # USD quaternions are (real, imaginary); ours are (x, y, z, w)
        r_attr.Set(vt.QuatfArray([gf.Quatf(float(q[3]), gf.Vec3f(*q[:3])) for q in rot[f]]), code)
        s_attr.Set(vt.Vec3hArray([gf.Vec3h(*v) for v in scale[f]]), code)
        if bs_attr is not None:
            bs_attr.Set(vt.FloatArray([float(controls[f, c]) for c in cols]), code)
        for c, attr in enumerate(control_attrs):
            attr.Set(float(controls[f, c]), code)
    binding = usd_skel.BindingAPI.Apply(skel.GetPrim())
    binding.CreateAnimationSourceRel().SetTargets([anim.GetPath()])

    # --- mesh -----------------------------------------------------------------------------
    mesh = usd_geom.Mesh.Define(stage, root_path.AppendChild("Mesh"))
    points = np.asarray(base, np.float32)
    mesh.CreatePointsAttr(vt.Vec3fArray.FromNumpy(points))
    mesh.CreateExtentAttr(vt.Vec3fArray([gf.Vec3f(*points.min(0).tolist()),
                                         gf.Vec3f(*points.max(0).tolist())]))
    faces = np.asarray(faces, np.int32).reshape(-1, 3)
    mesh.CreateFaceVertexCountsAttr(vt.IntArray([3] * faces.shape[0]))
    mesh.CreateFaceVertexIndicesAttr(vt.IntArray(faces.reshape(-1).tolist()))
    mesh.CreateSubdivisionSchemeAttr(usd_geom.Tokens.none)
    mesh_binding = usd_skel.BindingAPI.Apply(mesh.GetPrim())
    mesh_binding.CreateSkeletonRel().SetTargets([skel.GetPath()])
    width = max(1, int((weights > 0).sum(axis=1).max()))
    order = np.argsort(-weights, axis=1, kind="stable")[:, :width]
    vals = np.take_along_axis(weights, order, axis=1)
    vals = vals / vals.sum(axis=1, keepdims=True)
    mesh_binding.CreateJointIndicesPrimvar(False, width).Set(
        vt.IntArray(np.where(vals > 0, order, 0).reshape(-1).tolist()))
    mesh_binding.CreateJointWeightsPrimvar(False, width).Set(
        vt.FloatArray(vals.reshape(-1).tolist()))
    mesh_binding.CreateGeomBindTransformAttr(gf.Matrix4d(1.0))
    if shape_ids:
        mesh_binding.CreateBlendShapesAttr(shape_ids)
        shape_paths = []
        for ident, delta in zip(shape_ids, targets, strict=True):
            shape = usd_skel.BlendShape.Define(stage, mesh.GetPath().AppendChild(ident))
            shape.CreateOffsetsAttr(vt.Vec3fArray.FromNumpy(np.asarray(delta, np.float32)))
            shape_paths.append(shape.GetPath())
        mesh_binding.CreateBlendShapeTargetsRel().SetTargets(shape_paths)

    # --- head pose and per-frame quality on the root ------------------------------------------
    if head is not None:
        op = root.AddTransformOp()
        for f, m in enumerate(head.matrices()):
            op.Set(gf.Matrix4d(_rows(m)), usd.TimeCode(float(codes[f])))
    if quality is not None:
        rp = root.GetPrim()
        specs = [("rigcast:fitRms", sdf.ValueTypeNames.Float, quality.fit_rms),
                 ("rigcast:fitMax", sdf.ValueTypeNames.Float, quality.fit_max),
                 *((f"rigcast:{_camel(n)}", sdf.ValueTypeNames.Bool, quality.flags(n))
                   for n in FLAG_NAMES)]
        for attr_name, kind, values in specs:
            attr = rp.CreateAttribute(attr_name, kind)
            for f in range(t):
                value = bool(values[f]) if kind == sdf.ValueTypeNames.Bool else float(values[f])
                attr.Set(value, usd.TimeCode(float(codes[f])))
    stage.GetRootLayer().Save()
    log.info("wrote %s: %d frames at %g fps, %d joints, %d blendshapes", path, t, rate, j,
             len(shape_ids))
    return path


def _camel(name: str) -> str:
    head, *rest = name.split("_")
    return head + "".join(w.capitalize() for w in rest)


def validation_issues(path: str | Path) -> list[tuple[str, str, str]]:
    """Run every validator usd-core registers (the UsdValidation framework, which replaced
    UsdUtils.ComplianceChecker and runs behind `usdchecker`) on the stage at ``path``.
    Returns (severity, validator, message) per issue; severity "Error", "Warn" or "Info"."""
    _, _, _, usd, _, _, _ = _pxr()
    from pxr import UsdValidation

    registry = UsdValidation.ValidationRegistry()
    context = UsdValidation.ValidationContext(registry.GetOrLoadAllValidators())
    stage = usd.Stage.Open(str(path))
    out = []
    for issue in context.Validate(stage):
        validator = issue.GetValidator()
        name = validator.GetMetadata().name if validator is not None else "?"
        out.append((str(issue.GetType()).rsplit(".", 1)[-1], str(name), issue.GetMessage()))
    return out
