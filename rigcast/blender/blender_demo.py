"""The demo `.blend` rig, made by this script (inside a Python with ``bpy``): Tamsin's head, a
lighthouse keeper of our own invention, as a Blender rig with every kind of control rigcast reads.

- ``TamsinHead``: a UV sphere (32 segments x 16 rings, 482 vertices), squashed to a round face;
- shape keys ``cheek_puff``, ``brow_lift``, ``lip_corner_lift`` (sliders 0..1) and ``lid_squint``;
- a corrective shape key ``cheek_lip_fix`` set by a driver, ``cheek_puff * lip_corner_lift``
  (the combination shapes of Lewis et al., "Practice and Theory of Blendshape Facial Models",
  Eurographics 2014 STAR): a driven key, so not a control;
- a custom property ``squint`` (UI limits 0..1) on the head object, driving ``lid_squint`` through
  a driver: the property is the control, the key is not;
- an armature ``TamsinRig`` with bones ``head`` and ``jaw``; the lower face is skinned to the jaw
  (smooth weights), the rest to the head; the jaw has a Limit Rotation constraint of -2..25
  degrees about x, so ``jaw:x`` gives a control ``jaw_rot_x`` with those bounds.
"""

from __future__ import annotations

import logging
import math

import numpy as np

log = logging.getLogger(__name__)

SHAPES = ("cheek_puff", "brow_lift", "lip_corner_lift", "lid_squint", "cheek_lip_fix")


def _falloff(co: np.ndarray, centre: tuple[float, float, float], width: float) -> np.ndarray:
    """(V,) Gaussian falloff of the distance from ``centre``."""
    d2 = ((co - np.asarray(centre)) ** 2).sum(axis=1)
    return np.exp(-d2 / (2.0 * width * width))


def make_demo_blend(path: str) -> str:
    """Write the demo rig to ``path`` and return it."""
    import bpy

    bpy.ops.wm.read_factory_settings(use_empty=True)
    bpy.ops.mesh.primitive_uv_sphere_add(segments=32, ring_count=16, radius=1.0)
    head = bpy.context.active_object
    head.name = "TamsinHead"
    head.scale = (0.9, 1.0, 0.85)
    bpy.ops.object.transform_apply(location=False, rotation=False, scale=True)
    v = len(head.data.vertices)
    flat = np.empty(v * 3, np.float32)
    head.data.vertices.foreach_get("co", flat)
    co = flat.reshape(-1, 3).astype(np.float64)
    # Blender: +z up, -y is the front of the face
    front = np.clip(-co[:, 1], 0.0, None)
    offsets = {
        "cheek_puff": np.stack([np.sign(co[:, 0]) * 0.12, -0.05 * np.ones(v), np.zeros(v)], 1)
        * (_falloff(co, (0.5, -0.7, -0.1), 0.3) + _falloff(co, (-0.5, -0.7, -0.1), 0.3))[:, None],
        "brow_lift": np.array([0.0, 0.0, 0.1]) * (front * _falloff(co, (0, -0.8, 0.45), 0.35))[:, None],
        "lip_corner_lift": np.stack([np.sign(co[:, 0]) * 0.03, np.zeros(v), 0.08 * np.ones(v)], 1)
        * (_falloff(co, (0.3, -0.85, -0.35), 0.15) + _falloff(co, (-0.3, -0.85, -0.35), 0.15))[:, None],
        "lid_squint": np.array([0.0, 0.0, -0.06]) * (front * _falloff(co, (0, -0.85, 0.2), 0.2))[:, None],
        "cheek_lip_fix": np.array([0.0, 0.05, -0.04]) * _falloff(co, (0, -0.85, -0.3), 0.3)[:, None],
    }
    head.shape_key_add(name="Basis")
    keys = {}
    for name in SHAPES:
        kb = head.shape_key_add(name=name, from_mix=False)
        kb.data.foreach_set("co", (co + offsets[name]).astype(np.float32).reshape(-1))
        kb.slider_min, kb.slider_max, kb.value = 0.0, 1.0, 0.0
        keys[name] = kb
    shape_keys = head.data.shape_keys
    fix = keys["cheek_lip_fix"].driver_add("value").driver
    fix.type, fix.expression = "SCRIPTED", "a * b"
    for var_name, key in (("a", "cheek_puff"), ("b", "lip_corner_lift")):
        var = fix.variables.new()
        var.name = var_name
        var.targets[0].id_type = "KEY"
        var.targets[0].id = shape_keys
        var.targets[0].data_path = f'key_blocks["{key}"].value'
    head["squint"] = 0.0
    head.id_properties_ui("squint").update(min=0.0, max=1.0, soft_min=0.0, soft_max=1.0)
    squint = keys["lid_squint"].driver_add("value").driver
    squint.type, squint.expression = "SCRIPTED", "s"
    var = squint.variables.new()
    var.name = "s"
    var.targets[0].id_type = "OBJECT"
    var.targets[0].id = head
    var.targets[0].data_path = '["squint"]'

    # armature: head bone up the middle, jaw bone from below the ears to the chin
    bpy.ops.object.armature_add(enter_editmode=True, location=(0.0, 0.0, 0.0))
    rig = bpy.context.active_object
    rig.name = "TamsinRig"
    bones = rig.data.edit_bones
    root = bones[0]
    root.name = "head"
    root.head, root.tail = (0.0, 0.0, -0.2), (0.0, 0.0, 0.9)
    jaw = bones.new("jaw")
    jaw.head, jaw.tail, jaw.parent = (0.0, 0.1, -0.15), (0.0, -0.8, -0.6), root
    bpy.ops.object.mode_set(mode="OBJECT")
    limit = rig.pose.bones["jaw"].constraints.new("LIMIT_ROTATION")
    limit.use_limit_x, limit.min_x, limit.max_x = True, math.radians(-2.0), math.radians(25.0)
    limit.owner_space = "LOCAL"
    rig.pose.bones["jaw"].rotation_mode = "XYZ"
    jaw_w = np.clip((-0.15 - co[:, 2]) / 0.35, 0.0, 1.0) * np.clip(-co[:, 1] * 1.5 + 0.2, 0.0, 1.0)
    groups = {"jaw": head.vertex_groups.new(name="jaw"),
              "head": head.vertex_groups.new(name="head")}
    for i, w in enumerate(jaw_w.tolist()):
        if w > 0.0:
            groups["jaw"].add([i], w, "REPLACE")
        if w < 1.0:
            groups["head"].add([i], 1.0 - w, "REPLACE")
    mod = head.modifiers.new("rig", "ARMATURE")
    mod.object = rig
    bpy.ops.wm.save_as_mainfile(filepath=str(path))
    log.info("wrote the demo rig %s (%d vertices)", path, v)
    return str(path)
