"""The Blender side of the `.blend` rig source: runs inside a Python that has ``bpy`` (the
``blender`` extra), never in rigcast's own process. ``export/rigs/blender_rig.py`` starts it.

Controls of a rig (one mesh object, found by name or as the first mesh with shape keys):

- every shape key but the basis that no driver sets, named as the key, bounds from its slider
  limits (``slider_min``/``slider_max``), default its current value;
- every custom property (of the mesh object or its armature) that a driver reads: named as the
  property, bounds from its UI limits (``id_properties_ui(name)``: ``min``/``max``);
- listed pose-bone rotations ``BONE:AXES`` (``jaw:x``): ``<bone>_rot_<axis>`` in degrees, Euler
  XYZ, bounds from the bone's Limit Rotation constraint or the bounds file
  ``{"bones": {"jaw": {"x": [lo, hi]}}}``.

The mesh is read from the evaluated depsgraph (``evaluated_get(depsgraph).to_mesh()``, object
space), so drivers, corrective shape keys, armatures, constraints and modifiers act as the artist
sees them. A modifier stack that changes the vertex count or the faces is refused.

Commands (``python -m rigcast.blender.blender_scene COMMAND ...``): ``describe`` (schema JSON on
stdout), ``serve`` (the NPY-frame process-rig protocol of docs/rig-sources.md), ``key`` (write a
solve as keyframes on a copy of the file), ``play`` (evaluate frames of a keyed file),
``demo`` (write the demo rig).
"""

from __future__ import annotations

import argparse
import io
import json
import logging
import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.runtime.errors import EXIT_USAGE, RigcastError

log = logging.getLogger(__name__)

_AXES = "xyz"


class BlendError(RigcastError, ValueError):
    """The .blend cannot be used as a rig; the message names what is wrong."""

    advice = "fix the .blend as named above; `rigcast build --help` lists the rig sources"
    exit_code = EXIT_USAGE


@dataclass(frozen=True)
class BlendControl:
    """name, min, max, default; kind "key" | "prop" | "bone"; target: key or property name, or
    (bone, axis index)."""

    name: str
    lo: float
    hi: float
    default: float
    kind: str
    owner: str
    target: Any


class BlendRig:
    """An opened .blend seen as a rig: controls, evaluation, keying."""

    def __init__(self, path: str, obj: str | None = None, bones: list[str] | None = None,
                 bounds: dict[str, Any] | None = None) -> None:
        import bpy

        self.bpy = bpy
        if not Path(path).is_file():
            raise BlendError(f".blend file {path} does not exist")
        bpy.ops.wm.open_mainfile(filepath=str(path))
        meshes = [o for o in bpy.data.objects if o.type == "MESH"]
        if obj is not None:
            found = [o for o in meshes if o.name == obj]
            if not found:
                raise BlendError(f"{path}: no mesh object {obj!r}; meshes are "
                                 f"{[o.name for o in meshes]}")
        else:
            found = [o for o in meshes if o.data.shape_keys is not None] or meshes
        if not found:
            raise BlendError(f"{path}: has no mesh object")
        self.ob = found[0]
        mods = [m for m in self.ob.modifiers if m.type == "ARMATURE" and m.object is not None]
        self.arm: Any = mods[0].object if mods else None
        self.controls = self._controls(bones or [], bounds or {})
        if not self.controls:
            raise BlendError(f"{path}: object {self.ob.name!r} has no controls (no undriven "
                             "shape keys, no driving custom properties, no bones listed)")
        self.rest_vertices = len(self.ob.data.vertices)
        self.faces = self._triangles()
        self._check_topology()

    # --- controls ---------------------------------------------------------------------------

    def _driver_paths(self) -> tuple[set[str], set[tuple[str, str]]]:
        """(shape keys set by drivers, (id name, data path) read by driver variables)."""
        driven: set[str] = set()
        read: set[tuple[str, str]] = set()
        ids = [self.ob, self.ob.data, self.ob.data.shape_keys, self.arm,
               self.arm.data if self.arm else None]
        for idb in ids:
            anim = getattr(idb, "animation_data", None) if idb is not None else None
            for fc in anim.drivers if anim is not None else []:
                if idb is self.ob.data.shape_keys and fc.data_path.startswith("key_blocks["):
                    driven.add(fc.data_path.split('"')[1])
                for var in fc.driver.variables:
                    for t in var.targets:
                        if t.id is not None and t.data_path:
                            read.add((t.id.name, t.data_path))
        return driven, read

    def _controls(self, bones: list[str], bounds: dict[str, Any]) -> list[BlendControl]:
        out: list[BlendControl] = []
        driven, read = self._driver_paths()
        keys = self.ob.data.shape_keys
        if keys is not None:
            for kb in list(keys.key_blocks)[1:]:
                if kb.name in driven or kb.mute:
                    continue
                lo, hi = float(kb.slider_min), float(kb.slider_max)
                out.append(BlendControl(kb.name, lo, hi, float(np.clip(kb.value, lo, hi)), "key",
                                        keys.name, kb.name))
        for owner in (self.ob, self.arm):
            if owner is None:
                continue
            for prop in owner.keys():  # noqa: SIM118  (a bpy ID is not iterable)
                value = owner[prop]
                if not isinstance(value, int | float) or isinstance(value, bool):
                    continue
                if (owner.name, f'["{prop}"]') not in read:
                    continue
                ui = owner.id_properties_ui(prop).as_dict()
                lo, hi = ui.get("min"), ui.get("max")
                if lo is None or hi is None or not lo < hi:
                    raise BlendError(f"custom property {prop!r} of {owner.name!r} drives the rig "
                                     f"but has no UI limits (min {lo}, max {hi}); set them")
                out.append(BlendControl(prop, float(lo), float(hi),
                                        float(np.clip(value, lo, hi)), "prop", owner.name, prop))
        for spec in bones:
            bone, _, axes = spec.partition(":")
            if self.arm is None or bone not in self.arm.pose.bones:
                names = list(self.arm.pose.bones.keys()) if self.arm else []
                raise BlendError(f"bone {bone!r} not found; the armature's bones are {names}")
            if not axes or set(axes) - set(_AXES):
                raise BlendError(f"bone control {spec!r} must be BONE:AXES, e.g. jaw:x or neck:xz")
            pose = self.arm.pose.bones[bone]
            pose.rotation_mode = "XYZ"
            for axis in axes:
                lo, hi = self._bone_bounds(pose, axis, bounds.get("bones", {}).get(bone, {}))
                out.append(BlendControl(f"{bone}_rot_{axis}", lo, hi, float(np.clip(0.0, lo, hi)),
                                        "bone", self.arm.name, (bone, _AXES.index(axis))))
        return out

    @staticmethod
    def _bone_bounds(pose: Any, axis: str, side: dict[str, Any]) -> tuple[float, float]:
        if axis in side:
            lo, hi = (float(v) for v in side[axis])
            return lo, hi
        for con in pose.constraints:
            if con.type == "LIMIT_ROTATION" and getattr(con, f"use_limit_{axis}"):
                return (math.degrees(getattr(con, f"min_{axis}")),
                        math.degrees(getattr(con, f"max_{axis}")))
        raise BlendError(f"bone {pose.name!r} axis {axis}: no Limit Rotation constraint on that "
                         "axis and no bounds given ({\"bones\": {...}})")

    def schema(self) -> dict[str, Any]:
        return {"controls": [{"name": c.name, "min": c.lo, "max": c.hi, "default": c.default,
                              "group": c.kind} for c in self.controls],
                "faces": self.faces.tolist()}

    # --- evaluation -------------------------------------------------------------------------

    def _triangles(self) -> np.ndarray:
        """Polygons fanned into triangles (F, 3)."""
        tris = []
        for poly in self.ob.data.polygons:
            v = list(poly.vertices)
            tris += [(v[0], v[i], v[i + 1]) for i in range(1, len(v) - 1)]
        return np.array(tris, np.int64).reshape(-1, 3)

    def _check_topology(self) -> None:
        dg = self.bpy.context.evaluated_depsgraph_get()
        ev = self.ob.evaluated_get(dg)
        mesh = ev.to_mesh()
        try:
            same = (len(mesh.vertices) == self.rest_vertices
                    and len(mesh.polygons) == len(self.ob.data.polygons)
                    and all(tuple(a.vertices) == tuple(b.vertices)
                            for a, b in zip(mesh.polygons, self.ob.data.polygons, strict=True)))
        finally:
            ev.to_mesh_clear()
        if not same:
            stack = [f"{m.name} ({m.type})" for m in self.ob.modifiers if m.show_viewport]
            raise BlendError(f"object {self.ob.name!r}: its modifier stack {stack} changes the "
                             "topology (vertex count or faces); rigcast needs a fixed vertex order "
                             "— apply or disable the modifiers that add or remove geometry")

    def apply(self, values: np.ndarray) -> None:
        """Set every control (C,) on the scene."""
        bpy = self.bpy
        for c, v in zip(self.controls, values.tolist(), strict=True):
            if c.kind == "key":
                self.ob.data.shape_keys.key_blocks[c.target].value = v
            elif c.kind == "prop":
                bpy.data.objects[c.owner][c.target] = v
            else:
                bone, axis = c.target
                self.arm.pose.bones[bone].rotation_euler[axis] = math.radians(v)
        for owner in (self.ob, self.arm):
            if owner is not None:
                owner.update_tag()
        bpy.context.view_layer.update()

    def current(self) -> np.ndarray:
        """(C,) the values the scene holds now (read back from Blender)."""
        out = []
        for c in self.controls:
            if c.kind == "key":
                out.append(self.ob.data.shape_keys.key_blocks[c.target].value)
            elif c.kind == "prop":
                out.append(self.bpy.data.objects[c.owner][c.target])
            else:
                bone, axis = c.target
                out.append(math.degrees(self.arm.pose.bones[bone].rotation_euler[axis]))
        return np.array(out, np.float64)

    def mesh(self) -> np.ndarray:
        """(V, 3) float32 evaluated vertices, object space."""
        dg = self.bpy.context.evaluated_depsgraph_get()
        ev = self.ob.evaluated_get(dg)
        mesh = ev.to_mesh()
        try:
            if len(mesh.vertices) != self.rest_vertices:
                raise BlendError(f"object {self.ob.name!r}: the evaluated mesh has "
                                 f"{len(mesh.vertices)} vertices, the rest {self.rest_vertices}")
            co = np.empty(self.rest_vertices * 3, np.float32)
            mesh.vertices.foreach_get("co", co)
        finally:
            ev.to_mesh_clear()
        return co.reshape(-1, 3)

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) -> (B, V, 3) float32."""
        out = np.empty((controls.shape[0], self.rest_vertices, 3), np.float32)
        for b, row in enumerate(np.asarray(controls, np.float64)):
            self.apply(row)
            out[b] = self.mesh()
        return out

    # --- keyed animation --------------------------------------------------------------------

    def key(self, out: str, controls: np.ndarray, times_s: np.ndarray, fps: float,
            head: np.ndarray | None = None) -> None:
        """Key ``controls`` (T, C) at frame 1 + round(time * fps), scene rate ``fps``, and save
        a copy at ``out`` (the original file is left as it was). ``head`` (T, 4, 4), the head
        pose: an empty ``rigcast_head`` becomes the parent of the mesh and its armature (so the
        armature's deformation is unchanged) and is keyed with it."""
        bpy = self.bpy
        scene = bpy.context.scene
        base = max(1, round(fps))
        scene.render.fps, scene.render.fps_base = base, base / fps
        frames = 1 + np.round(np.asarray(times_s) * fps).astype(int)
        scene.frame_start, scene.frame_end = int(frames[0]), int(frames[-1])
        keys = self.ob.data.shape_keys
        for f, row in zip(frames.tolist(), np.asarray(controls, np.float64), strict=True):
            self.apply(row)
            for c in self.controls:
                if c.kind == "key":
                    keys.key_blocks[c.target].keyframe_insert("value", frame=f)
                elif c.kind == "prop":
                    bpy.data.objects[c.owner].keyframe_insert(f'["{c.target}"]', frame=f)
                else:
                    bone, axis = c.target
                    self.arm.pose.bones[bone].keyframe_insert("rotation_euler", index=axis,
                                                              frame=f)
        if head is not None:
            self._key_head(frames.tolist(), np.asarray(head, np.float64))
        bpy.ops.wm.save_as_mainfile(filepath=str(out), copy=True)

    def _key_head(self, frames: list[int], head: np.ndarray) -> None:
        from mathutils import Matrix

        bpy = self.bpy
        empty = bpy.data.objects.new("rigcast_head", None)
        bpy.context.scene.collection.objects.link(empty)
        for child in (self.ob, self.arm):
            if child is not None and child.parent is None:
                child.parent = empty  # the empty sits at the origin: no parent inverse needed
        empty.rotation_mode = "QUATERNION"
        for f, m in zip(frames, head, strict=True):
            loc, rot, scale = Matrix(m.tolist()).decompose()
            empty.location, empty.rotation_quaternion, empty.scale = loc, rot, scale
            for path in ("location", "rotation_quaternion", "scale"):
                empty.keyframe_insert(path, frame=f)

    def play(self, frames: list[int], world: bool = False) -> np.ndarray:
        """(N, V, 3) evaluated meshes at scene frames (a keyed file plays its animation), in
        object space, or in world space (with the head pose) when ``world``."""
        out = np.empty((len(frames), self.rest_vertices, 3), np.float32)
        for i, f in enumerate(frames):
            self.bpy.context.scene.frame_set(f)
            out[i] = self.mesh()
            if world:
                m = np.array(self.ob.evaluated_get(
                    self.bpy.context.evaluated_depsgraph_get()).matrix_world)
                out[i] = out[i] @ m[:3, :3].T + m[:3, 3]
        return out


# --- the process-rig protocol (docs/rig-sources.md, "External process") ------------------------


class _StdinReader:
    """read(n) on stdin, after ``prefix``; not a real file, so numpy reads through it."""

    def __init__(self, prefix: bytes) -> None:
        self.prefix = prefix

    def read(self, n: int = -1) -> bytes:
        head, self.prefix = self.prefix[:n], self.prefix[n:]
        return head + sys.stdin.buffer.read(n - len(head)) if n > len(head) else head


def _read_frame() -> np.ndarray | None:
    first = sys.stdin.buffer.read(1)
    return None if not first else np.lib.format.read_array(_StdinReader(first),
                                                           allow_pickle=False)


_OUT: Any = None  # the real stdout; Blender's own prints go to stderr (see ``_claim_stdout``)


def _claim_stdout() -> None:
    """Keep the process's stdout for our frames and send everything else written to fd 1
    (Blender prints "Info: ..." lines from C) to stderr, so nothing corrupts the protocol."""
    global _OUT
    if _OUT is None:
        sys.stdout.flush()
        _OUT = os.fdopen(os.dup(1), "wb")
        os.dup2(2, 1)


def _write_frame(array: np.ndarray) -> None:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.ascontiguousarray(array), allow_pickle=False)
    _OUT.write(buf.getvalue())
    _OUT.flush()


def serve(rig: BlendRig) -> int:
    """Hello (neutral at the defaults, faces), then one vertex batch per control batch."""
    defaults = np.array([c.default for c in rig.controls])
    _write_frame(rig.evaluate(defaults[None])[0])
    _write_frame(rig.faces.astype("<i4"))
    while (controls := _read_frame()) is not None:
        _write_frame(rig.evaluate(controls))
    return 0


def main(argv: list[str] | None = None) -> int:
    from rigcast.blender.blender_demo import make_demo_blend

    p = argparse.ArgumentParser(prog="python -m rigcast.blender.blender_scene")
    p.add_argument("command", choices=("describe", "serve", "key", "play", "demo"))
    p.add_argument("blend")
    p.add_argument("--object", default=None)
    p.add_argument("--bones", default="", help="comma-separated BONE:AXES")
    p.add_argument("--bounds", default=None, help="bounds JSON file or string")
    p.add_argument("--take", default=None,
                   help="key: NPZ with names, controls, times_s, fps and optionally head")
    p.add_argument("--out", default=None, help="key: the keyed copy; play: NPY of meshes")
    p.add_argument("--frames", default="", help="play: comma-separated scene frames")
    p.add_argument("--world", action="store_true", help="play: world space (with the head pose)")
    args = p.parse_args(argv)
    _claim_stdout()
    if args.command == "demo":
        make_demo_blend(args.blend)
        return 0
    bounds = None
    if args.bounds:
        text = args.bounds
        bounds = json.loads(text if text.lstrip().startswith("{") else Path(text).read_text())
    try:
        rig = BlendRig(args.blend, args.object, [b for b in args.bones.split(",") if b], bounds)
    except BlendError as exc:
        sys.stderr.write(f"rigcast blender: {exc}\n")
        return 1
    if args.command == "describe":
        _OUT.write((json.dumps(rig.schema()) + "\n").encode())
        _OUT.flush()
    elif args.command == "serve":
        return serve(rig)
    elif args.command == "key":
        with np.load(args.take) as take:
            names = [str(n) for n in take["names"]]
            if names != [c.name for c in rig.controls]:
                sys.stderr.write(f"rigcast blender: the solve's controls {names} are not the "
                                 f"rig's {[c.name for c in rig.controls]}\n")
                return 1
            rig.key(args.out, take["controls"], take["times_s"], float(take["fps"]),
                    take["head"] if "head" in take.files else None)
    else:
        np.save(args.out, rig.play([int(f) for f in args.frames.split(",") if f], args.world))
    return 0


if __name__ == "__main__":
    sys.exit(main())
