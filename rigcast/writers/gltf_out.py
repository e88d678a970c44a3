"""Solved controls as a glTF 2.0 animation (``.gltf`` with an embedded base64 buffer, or ``.glb``).

Layout (glTF 2.0 specification: "Buffers and Buffer Views", "Accessors", "Morph Targets",
"Skins", "Animations", "GLB File Format Specification"):

- node 0, ``<rig>_head``: the root. With a head pose it is animated (translation, rotation,
  scale) by the rigid motion that stabilisation removed, so the result moves as the take did.
- the mesh node: base POSITION and, for blendshape controls, one morph target per control (the
  delta of one unit, named in ``mesh.extras.targetNames``), driven by a ``weights`` channel.
  Without a skin it is a child of the root.
- a skinned rig (``Skeleton``): its joints are nodes under the root with their rest TRS, the mesh
  carries ``JOINTS_n``/``WEIGHTS_n`` and the skin its inverse bind matrices, and each driven joint
  gets a ``rotation`` channel (unit quaternions, LINEAR = slerp). Joint controls are never written
  as morph targets. The skinned mesh node sits at the scene root (the spec ignores its transform).

All channels are keyed at the take's frame times; ``asset.extras`` records the frame rate.
"""

from __future__ import annotations

import base64
import json
import logging
import struct
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.export.rigs.gltf_eval import decompose_trs
from rigcast.writers.animation_out import AnimationError, MorphBasis, _check_take
from rigcast.writers.frame_info import HeadPose
from rigcast.writers.skeleton import Skeleton

log = logging.getLogger(__name__)

# glTF 2.0 enums (spec 5.1 "accessor.componentType", 5.11 "bufferView.target", 5.24 "mode")
_FLOAT = 5126
_UNSIGNED_SHORT = 5123
_UNSIGNED_INT = 5125
_ARRAY_BUFFER = 34962
_ELEMENT_ARRAY_BUFFER = 34963
_TRIANGLES = 4
_POINTS = 0
_GLB_MAGIC = 0x46546C67  # "glTF"
_CHUNK_JSON = 0x4E4F534A  # "JSON"
_CHUNK_BIN = 0x004E4942  # "BIN\0"
_WIDTH = {"SCALAR": 1, "VEC3": 3, "VEC4": 4, "MAT4": 16}
_TRS_TOL = 1e-5  # largest TRS reconstruction error of a joint's local matrix (float32 data)


class _BufferBuilder:
    """Packs arrays into one binary buffer with one bufferView and accessor each."""

    def __init__(self) -> None:
        self.blob = bytearray()
        self.views: list[dict[str, Any]] = []
        self.accessors: list[dict[str, Any]] = []

    def add(self, data: np.ndarray, component: int, kind: str, *, target: int | None = None,
            bounds: bool = False) -> int:
        raw = np.ascontiguousarray(data).tobytes()
        # 4-byte alignment satisfies spec 3.6.2.4 (an accessor's offset is a multiple of its
        # component size) for every component type used here.
        while len(self.blob) % 4:
            self.blob.append(0)
        view: dict[str, Any] = {"buffer": 0, "byteOffset": len(self.blob), "byteLength": len(raw)}
        if target is not None:
            view["target"] = target
        self.blob.extend(raw)
        self.views.append(view)
        width = _WIDTH[kind]
        accessor: dict[str, Any] = {"bufferView": len(self.views) - 1, "componentType": component,
                                    "count": int(data.size // width), "type": kind}
        if bounds:
            # Spec 3.6.2.5: POSITION and animation input accessors MUST carry min and max; the
            # validator compares them with the stored data exactly.
            rows = data.reshape(-1, width)
            cast = int if component != _FLOAT else float
            accessor["min"] = [cast(v) for v in rows.min(axis=0)]
            accessor["max"] = [cast(v) for v in rows.max(axis=0)]
        self.accessors.append(accessor)
        return len(self.accessors) - 1


def _joint_sets(weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Dense (V, J) weights -> JOINTS (V, 4n) uint16 and WEIGHTS (V, 4n) float32, the nonzero
    influences of each vertex, largest first, renormalised in float32 (spec, "Skinned Mesh
    Attributes": unused entries have joint 0 and weight 0)."""
    w = np.asarray(weights, np.float64)
    width = 4 * -(-max(1, int((w > 0).sum(axis=1).max())) // 4)
    if w.shape[1] < width:
        w = np.pad(w, ((0, 0), (0, width - w.shape[1])))  # zero columns for the last set
    order = np.argsort(-w, axis=1, kind="stable")[:, :width]
    vals = np.take_along_axis(w, order, axis=1)
    joints = np.where(vals > 0, order, 0).astype(np.uint16)
    vals32 = vals.astype(np.float32)
    vals32 /= vals32.sum(axis=1, keepdims=True)
    return joints, vals32


def _joint_channels(skeleton: Skeleton, controls: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[dict[str, Any]]]:
    """Per frame TRS of every joint (T, J, 3 | 4 | 3) and the rest TRS node dicts."""
    t, j = controls.shape[0], skeleton.joint_count
    local = skeleton.local_matrices(controls).reshape(t * j, 4, 4)
    trans, rot, scale, err = decompose_trs(local)
    size = max(1.0, float(np.abs(local[:, :3, 3]).max(initial=0.0)))
    if err > _TRS_TOL * size:
        raise AnimationError(f"{skeleton.name}: a joint's local transform has shear (TRS error "
                             f"{err:.2g}); glTF nodes cannot hold it")
    rest = skeleton.local_matrices(np.zeros((1, controls.shape[1])))[0]
    rt, rr, rs, _ = decompose_trs(rest)
    nodes = [{"name": skeleton.names[k], "translation": rt[k].tolist(),
              "rotation": rr[k].tolist(), "scale": rs[k].tolist()} for k in range(j)]
    return trans.reshape(t, j, 3), rot.reshape(t, j, 4), scale.reshape(t, j, 3), nodes


def gltf_document(controls: np.ndarray, times_s: np.ndarray, *, basis: MorphBasis | None = None,
                  skeleton: Skeleton | None = None, head: HeadPose | None = None,
                  fps: float | None = None) -> tuple[dict[str, Any], bytes]:
    """Build the glTF JSON (without the buffer's uri) and its binary buffer.

    controls: (T, C) solved controls (all of the rig's controls); times_s: (T,) seconds, >= 0.
    A skeleton brings its own mesh and morph targets; ``basis`` is then ignored.
    """
    if basis is None and skeleton is None:
        raise AnimationError("glTF output needs the rig's morph targets or its skeleton")
    controls = np.asarray(controls, dtype=np.float64)
    if controls.ndim != 2:
        raise AnimationError(f"controls must be (T, C), got {controls.shape}")
    controls, times_s = _check_take(controls, times_s, controls.shape[1])
    times32 = times_s.astype(np.float32)
    if times32[0] < 0.0:
        raise AnimationError(f"glTF animation times must be >= 0, first is {times32[0]}")
    if times32.shape[0] > 1 and not np.all(np.diff(times32) > 0):
        raise AnimationError("times_s are too close to stay increasing in float32")
    if skeleton is not None:
        name, base, faces = skeleton.name, skeleton.base, skeleton.faces
        targets, names, cols = skeleton.targets, skeleton.target_names, skeleton.target_controls
    else:
        assert basis is not None
        name, base, faces = basis.name, basis.neutral, basis.faces
        targets, names, cols = basis.targets, basis.names, basis.control_indices
    used = [*cols, *(d[0] for d in skeleton.drives)] if skeleton is not None else list(cols)
    if used and controls.shape[1] <= max(used):
        raise AnimationError(f"controls must be (T, C) with C > {max(used)}, got "
                             f"{controls.shape}")
    name = name or "rig"
    buf = _BufferBuilder()
    t_in = buf.add(times32, _FLOAT, "SCALAR", bounds=True)
    samplers: list[dict[str, Any]] = []
    channels: list[dict[str, Any]] = []

    def animate(node: int, path: str, values: np.ndarray, kind: str) -> None:
        out = buf.add(values.astype(np.float32).reshape(-1), _FLOAT, kind)
        samplers.append({"input": t_in, "output": out, "interpolation": "LINEAR"})
        channels.append({"sampler": len(samplers) - 1, "target": {"node": node, "path": path}})

    primitive: dict[str, Any] = {"attributes": {}, "mode": _TRIANGLES}
    if faces.shape[0]:
        primitive["indices"] = buf.add(np.asarray(faces, np.uint32).reshape(-1), _UNSIGNED_INT,
                                       "SCALAR", target=_ELEMENT_ARRAY_BUFFER)
    else:
        primitive["mode"] = _POINTS
    primitive["attributes"]["POSITION"] = buf.add(np.asarray(base, np.float32), _FLOAT, "VEC3",
                                                  target=_ARRAY_BUFFER, bounds=True)
    mesh: dict[str, Any] = {"name": name, "primitives": [primitive]}
    if len(names):
        primitive["targets"] = [{"POSITION": buf.add(np.asarray(tg, np.float32), _FLOAT, "VEC3",
                                                     target=_ARRAY_BUFFER, bounds=True)}
                                for tg in targets]
        mesh["weights"] = [0.0] * len(names)
        mesh["extras"] = {"targetNames": list(names)}
    root: dict[str, Any] = {"name": f"{name}_head", "children": []}
    nodes: list[dict[str, Any]] = [root, {"name": name, "mesh": 0}]
    scene_nodes = [0]
    if skeleton is None:
        root["children"].append(1)
    else:
        scene_nodes.append(1)  # the spec ignores a skinned mesh node's transform: keep it a root
        nodes[1]["skin"] = 0
        joints, wts = _joint_sets(skeleton.weights)
        for k in range(joints.shape[1] // 4):
            primitive["attributes"][f"JOINTS_{k}"] = buf.add(joints[:, 4 * k : 4 * k + 4],
                                                             _UNSIGNED_SHORT, "VEC4",
                                                             target=_ARRAY_BUFFER)
            primitive["attributes"][f"WEIGHTS_{k}"] = buf.add(wts[:, 4 * k : 4 * k + 4], _FLOAT,
                                                              "VEC4", target=_ARRAY_BUFFER)
        trans, rot, scale, joint_nodes = _joint_channels(skeleton, controls)
        first = len(nodes)
        for k, parent in enumerate(skeleton.parents):
            (root if parent < 0 else joint_nodes[parent]).setdefault("children", []).append(
                first + k)
        nodes.extend(joint_nodes)
        ibm = np.asarray(skeleton.inverse_bind, np.float32).transpose(0, 2, 1)  # column-major
        skin = {"joints": [first + k for k in range(skeleton.joint_count)],
                "inverseBindMatrices": buf.add(ibm, _FLOAT, "MAT4"), "skeleton": 0}
        for k in sorted({d[1] for d in skeleton.drives}):
            animate(first + k, "rotation", rot[:, k], "VEC4")
            for path, values in (("translation", trans[:, k]), ("scale", scale[:, k])):
                if np.ptp(values, axis=0).max() > 1e-6:
                    animate(first + k, path, values, "VEC3")
    if len(names):
        animate(1, "weights", controls[:, list(cols)], "SCALAR")
    if head is not None:
        if head.translation.shape[0] != controls.shape[0]:
            raise AnimationError(f"head pose has {head.translation.shape[0]} frames, the "
                                 f"controls {controls.shape[0]}")
        animate(0, "translation", head.translation, "VEC3")
        animate(0, "rotation", head.rotation, "VEC4")
        animate(0, "scale", np.repeat(head.scale[:, None], 3, axis=1), "VEC3")
    if not root["children"]:
        del root["children"]
    doc: dict[str, Any] = {
        "asset": {"version": "2.0", "generator": "rigcast",
                  "extras": {"fps": None if fps is None else float(fps)}},
        "scene": 0,
        "scenes": [{"nodes": scene_nodes}],
        "nodes": nodes,
        "meshes": [mesh],
        "animations": [{"name": "solve", "samplers": samplers, "channels": channels,
                        "extras": {"omittedControls": list(basis.omitted) if basis else []}}],
        "accessors": buf.accessors,
        "bufferViews": buf.views,
        "buffers": [{"byteLength": len(buf.blob)}],
    }
    if skeleton is not None:
        doc["skins"] = [skin]
    return doc, bytes(buf.blob)


def write_gltf(path: str | Path, controls: np.ndarray, times_s: np.ndarray, *,
               basis: MorphBasis | None = None, skeleton: Skeleton | None = None,
               head: HeadPose | None = None, fps: float | None = None) -> Path:
    """Write ``.gltf`` (embedded base64 buffer) or ``.glb`` (binary), chosen by the extension."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".gltf", ".glb"):
        raise AnimationError(f"{path}: glTF output needs a .gltf or .glb extension")
    doc, blob = gltf_document(controls, times_s, basis=basis, skeleton=skeleton, head=head,
                              fps=fps)
    if suffix == ".gltf":
        doc["buffers"][0]["uri"] = (
            "data:application/octet-stream;base64," + base64.b64encode(blob).decode("ascii")
        )
        path.write_text(json.dumps(doc))
    else:
        path.write_bytes(_glb(doc, blob))
    log.info("wrote %s: %d frames, %s", path, len(times_s),
             f"skeleton of {skeleton.joint_count} joints" if skeleton else "morph targets")
    return path


def _glb(doc: dict[str, Any], blob: bytes) -> bytes:
    """GLB container (spec 4.4): 12-byte header, JSON chunk space-padded, BIN chunk 0-padded."""
    text = json.dumps(doc, separators=(",", ":")).encode("utf-8")
    text += b" " * (-len(text) % 4)
    binary = blob + b"\0" * (-len(blob) % 4)
    total = 12 + 8 + len(text) + 8 + len(binary)
    return b"".join([
        struct.pack("<III", _GLB_MAGIC, 2, total),
        struct.pack("<II", len(text), _CHUNK_JSON), text,
        struct.pack("<II", len(binary), _CHUNK_BIN), binary,
    ])
