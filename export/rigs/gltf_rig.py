"""glTF 2.0 files (.gltf with its buffers, or .glb) as rigs: morph-target weights and joint
rotations are the controls. The math is in ``export/rigs/gltf_eval.py``; this module reads the file.

Supported (see docs/rig-sources.md):
- one mesh: the one named ``mesh=``, else the first mesh that a node of the default scene uses
  (else mesh 0); all its primitives (TRIANGLES only) are concatenated, and each needs the same
  number of morph targets;
- morph targets (POSITION only): controls ``[0, 1]`` named from ``mesh.extras.targetNames``, else
  ``target_<i>``; defaults from ``mesh.weights``;
- the skin of the node that uses the mesh: only the joints and axes listed in the bounds become
  controls, in degrees, intrinsic Euler XYZ applied in the joint's rest frame
  (posed local = T * R_rest * Rx(x) * Ry(y) * Rz(z) * S; for a matrix node, M * Rx * Ry * Rz);
- accessors with byteStride, normalized integers, sparse storage, data URIs and external files.

Skinned outputs are in the scene's frame: the spec ignores the transform of the node that holds a
skinned mesh. Unskinned outputs are in the mesh's own frame.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.rigs.gltf_eval import (
    dense_weights,
    euler_xyz_matrices,
    global_transforms,
    morph_positions,
    skin_points,
    trs_matrix,
)
from rigcast.export.rigs.gltf_io import GltfReader, load_bounds
from rigcast.export.rigs.rig import Rig, RigError
from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)

_AXES = ("x", "y", "z")
_CHUNK = 512


def _is_matrix(node: Any) -> bool:
    return node.matrix is not None and list(node.matrix) != list(np.eye(4).reshape(-1))


def _node_local(node: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(T R, R_rest-free right factor S, full rest matrix) of a node, all (4, 4).

    The posed local matrix of a rotated joint is ``left @ E @ right`` with E the Euler rotation.
    """
    if _is_matrix(node):
        m = np.asarray(node.matrix, dtype=np.float64).reshape(4, 4).T  # column-major in the file
        return m, np.eye(4), m
    left = trs_matrix(np.asarray(node.translation) if node.translation else None,
                      np.asarray(node.rotation) if node.rotation else None, None)
    right = trs_matrix(None, None, np.asarray(node.scale) if node.scale else None)
    return left, right, left @ right


class GltfRig(Rig):
    """A glTF 2.0 mesh as a rig.

    ``bounds``: ``{"joints": {NODE_NAME: {"x": [lo, hi], "z": [lo, hi]}},
    "morph": {TARGET_NAME: [lo, hi]}}`` in degrees (joints) and weight units (morph targets).
    """

    def __init__(self, path: str | Path, *, mesh: str | None = None,
                 bounds: str | Path | Mapping[str, Any] | None = None) -> None:
        import pygltflib  # only the glTF source needs it

        self.path = Path(path)
        if not self.path.is_file():
            raise RigError(f"glTF file {self.path} does not exist")
        self.name = f"gltf:{self.path.name}"
        bound_data = load_bounds(bounds)
        try:
            gltf = pygltflib.GLTF2().load(str(self.path))
        except Exception as e:  # pygltflib raises many kinds on a corrupt file
            raise RigError(f"glTF file {self.path} could not be read: {e}") from None
        if gltf is None or not gltf.meshes:
            raise RigError(f"glTF file {self.path} has no meshes")
        reader = GltfReader(gltf, self.path)
        try:
            mesh_index, node_index = self._pick_mesh(gltf, mesh)
            self._load_mesh(gltf, reader, mesh_index)
            self._load_nodes(gltf, node_index)
            self._load_skin(gltf, reader, node_index, bound_data.get("joints", {}))
            self.schema = self._make_schema(gltf.meshes[mesh_index], bound_data.get("morph", {}))
        except (IndexError, KeyError, TypeError, ValueError, AttributeError) as e:
            # An index out of range, a wrong count or a wrong type somewhere in the JSON: the
            # file breaks the glTF 2.0 schema in a way the checks above do not name.
            raise RigError(f"glTF file {self.path} is malformed ({type(e).__name__}: {e})") from None
        self.neutral = np.zeros((self.base.shape[0], 3), dtype=np.float32)
        self.neutral = self._evaluate(self.schema.defaults[None].astype(np.float64))[0].astype(
            np.float32)
        log.info("loaded %s: %d vertices, %d morph targets, %d joint controls", self.path,
                 self.vertex_count, self.targets.shape[0], len(self.joint_controls))

    # --- loading --------------------------------------------------------------------------

    def _pick_mesh(self, gltf: Any, name: str | None) -> tuple[int, int | None]:
        if name is not None:
            names = [m.name for m in gltf.meshes]
            if name not in names:
                raise RigError(f"{self.path}: no mesh named {name!r}; meshes are {names}")
            mesh_index = names.index(name)
        else:
            used = [n.mesh for n in gltf.nodes if n.mesh is not None]
            mesh_index = used[0] if used else 0
        nodes = [i for i, n in enumerate(gltf.nodes) if n.mesh == mesh_index]
        return mesh_index, (nodes[0] if nodes else None)

    def _load_mesh(self, gltf: Any, reader: GltfReader, mesh_index: int) -> None:
        mesh = gltf.meshes[mesh_index]
        bases, targets, faces, joints, weights = [], [], [], [], []
        offset = 0
        for p, prim in enumerate(mesh.primitives):
            where = f"{self.path}: mesh {mesh_index} primitive {p}"
            if prim.mode not in (None, 4):
                raise RigError(f"{where} has mode {prim.mode}; only TRIANGLES (4) is supported")
            if prim.attributes.POSITION is None:
                raise RigError(f"{where} has no POSITION")
            base = reader.read(prim.attributes.POSITION)
            n = base.shape[0]
            if prim.indices is not None:
                idx = reader.read(prim.indices).astype(np.int64).reshape(-1)
            else:
                idx = np.arange(n)
            if idx.size % 3 or (idx.size and idx.max() >= n):
                raise RigError(f"{where} has indices that do not form triangles of its vertices")
            faces.append(idx.reshape(-1, 3) + offset)
            tgt = [reader.read(t["POSITION"]) if t.get("POSITION") is not None else np.zeros((n, 3))
                   for t in (prim.targets or [])]
            targets.append(np.array(tgt).reshape(len(tgt), n, 3))
            sets = _skin_sets(prim.attributes)
            if sets:
                # Every JOINTS_n/WEIGHTS_n pair counts (glTF 2.0 allows more than 4 influences).
                joints.append(np.concatenate([reader.read(j) for j, _ in sets], axis=1))
                weights.append(np.concatenate([reader.read(w, normalize_ints=True)
                                               for _, w in sets], axis=1))
            bases.append(base)
            offset += n
        counts = {t.shape[0] for t in targets}
        if len(counts) > 1:
            raise RigError(f"{self.path}: primitives of mesh {mesh_index} have different "
                           f"morph target counts {sorted(counts)}")
        if joints and len(joints) != len(bases):
            raise RigError(f"{self.path}: only some primitives of mesh {mesh_index} are skinned")
        self.base = np.concatenate(bases)
        self.targets = np.concatenate(targets, axis=1)
        self.faces = np.concatenate(faces).astype(np.int32)
        self._joints = np.concatenate(joints) if joints else None
        self._weights = np.concatenate(weights) if weights else None

    def _load_nodes(self, gltf: Any, node_index: int | None) -> None:
        count = len(gltf.nodes)
        self.parents = [-1] * count
        for i, node in enumerate(gltf.nodes):
            for c in node.children or []:
                if self.parents[c] != -1:
                    raise RigError(f"{self.path}: node {c} has two parents")
                self.parents[c] = i
        order: list[int] = []
        state = [0] * count

        def visit(i: int) -> None:  # parents before children; cycles are an error
            if state[i] == 1:
                raise RigError(f"{self.path}: the node hierarchy has a cycle at node {i}")
            if state[i] == 0:
                state[i] = 1
                if self.parents[i] >= 0:
                    visit(self.parents[i])
                state[i] = 2
                order.append(i)

        for i in range(count):
            visit(i)
        self.order = order
        locals_ = [_node_local(n) for n in gltf.nodes]
        self.local_left = np.array([x[0] for x in locals_]).reshape(count, 4, 4)
        self.local_right = np.array([x[1] for x in locals_]).reshape(count, 4, 4)
        self.local_rest = np.array([x[2] for x in locals_]).reshape(count, 4, 4)
        self.node_names = [n.name or f"node_{i}" for i, n in enumerate(gltf.nodes)]
        # Rest TRS of every node (spec defaults where absent), the base that animation channels
        # override; a node given by a matrix cannot be animated (spec, "Transformations").
        self.node_is_matrix = [_is_matrix(n) for n in gltf.nodes]
        self.node_trs = (
            np.array([n.translation or [0.0, 0.0, 0.0] for n in gltf.nodes], np.float64),
            np.array([n.rotation or [0.0, 0.0, 0.0, 1.0] for n in gltf.nodes], np.float64),
            np.array([n.scale or [1.0, 1.0, 1.0] for n in gltf.nodes], np.float64),
        )
        self.mesh_node = node_index
        self.rest_global = global_transforms(self.local_rest[None], self.parents, self.order)[0]

    def _load_skin(self, gltf: Any, reader: GltfReader, node_index: int | None,
                   joint_bounds: Mapping[str, Any]) -> None:
        self.joint_controls: list[tuple[int, int, float, float]] = []  # (node, axis, lo, hi)
        self.skin_nodes: list[int] = []
        skin_index = gltf.nodes[node_index].skin if node_index is not None else None
        if skin_index is None:
            if joint_bounds:
                raise RigError(f"{self.path}: joint bounds given but the mesh has no skin")
            return
        if self._joints is None or self._weights is None:
            raise RigError(f"{self.path}: skinned mesh has no JOINTS_0/WEIGHTS_0")
        skin = gltf.skins[skin_index]
        self.skin_nodes = list(skin.joints)
        j = len(self.skin_nodes)
        if skin.inverseBindMatrices is not None:
            ibm = reader.read(skin.inverseBindMatrices)
            if ibm.shape[0] < j or ibm.shape[1] != 16:
                raise RigError(f"{self.path}: skin {skin_index} inverseBindMatrices too short")
            self.ibm = ibm[:j].reshape(j, 4, 4).transpose(0, 2, 1)  # column-major in the file
        else:
            self.ibm = np.broadcast_to(np.eye(4), (j, 4, 4)).copy()
        if self._joints.size and self._joints.max() >= j:
            raise RigError(f"{self.path}: JOINTS_n refers to joint {int(self._joints.max())}, "
                           f"the skin has {j}")
        self.skin_weights = dense_weights(self._joints, self._weights, j)
        if np.any(self.skin_weights.sum(axis=1) == 0):
            raise RigError(f"{self.path}: some vertices have all-zero skin weights")
        names = {self.node_names[n]: n for n in self.skin_nodes}
        for joint, axes in joint_bounds.items():
            if joint not in names:
                raise RigError(f"{self.path}: bounds name joint {joint!r}; skin joints are "
                               f"{sorted(names)}")
            if not isinstance(axes, Mapping) or not set(axes) <= set(_AXES) or not axes:
                raise RigError(f"bounds for joint {joint!r} must map 'x'/'y'/'z' to [lo, hi], "
                               f"got {axes!r}")
            for axis in _AXES:
                if axis in axes:
                    lo, hi = _pair(axes[axis], f"joint {joint!r} axis {axis!r}")
                    self.joint_controls.append((names[joint], _AXES.index(axis), lo, hi))

    def _make_schema(self, mesh: Any, morph_bounds: Mapping[str, Any]) -> ControlSchema:
        t = self.targets.shape[0]
        extras = mesh.extras if isinstance(mesh.extras, dict) else {}
        names = list(extras.get("targetNames") or [])
        if len(names) != t:
            names = [f"target_{i}" for i in range(t)]
        # glTF 2.0 lets a node's weights override its mesh's; pygltflib drops node.weights on
        # load, so the defaults come from mesh.weights only (docs/rig-sources.md says so).
        defaults = list(mesh.weights or [0.0] * t)
        unknown = set(morph_bounds) - set(names)
        if unknown:
            raise RigError(f"{self.path}: bounds name morph targets {sorted(unknown)}; "
                           f"targets are {names}")
        controls = []
        for i, name in enumerate(names):
            lo, hi = _pair(morph_bounds[name], name) if name in morph_bounds else (0.0, 1.0)
            d = float(np.clip(defaults[i] if i < len(defaults) else 0.0, lo, hi))
            controls.append(Control(str(name), lo, hi, d, "morph", ""))
        for node, axis, lo, hi in self.joint_controls:
            joint = self.node_names[node]
            name = f"{joint}_rot_{_AXES[axis]}"
            controls.append(Control(name, lo, hi, float(np.clip(0.0, lo, hi)), joint, ""))
        if not controls:
            raise RigError(f"{self.path}: no controls (no morph targets, no joint bounds given)")
        return ControlSchema(tuple(controls))

    # --- evaluation -----------------------------------------------------------------------

    def joint_matrices(self, controls: np.ndarray) -> np.ndarray:
        """controls: (B, C) -> (B, J, 4, 4) jointMatrix_j = G(joint_j) @ inverseBindMatrix_j.

        glTF 2.0 (3.7.3, skins): only the joint transforms apply to a skinned mesh; the transform
        of the node that holds the mesh is ignored, so skinned vertices are in the scene's frame.
        """
        bsz, t = controls.shape[0], self.targets.shape[0]
        euler = {n: np.zeros((bsz, 3)) for n, _, _, _ in self.joint_controls}
        for k, (node, axis, _, _) in enumerate(self.joint_controls):
            euler[node][:, axis] = np.radians(controls[:, t + k])
        glob: dict[int, np.ndarray] = {}
        for n in self.order:
            if n in euler:
                rot = np.zeros((bsz, 4, 4))
                rot[:, :3, :3] = euler_xyz_matrices(euler[n])
                rot[:, 3, 3] = 1.0
                local = self.local_left[n] @ rot @ self.local_right[n]
            else:
                local = np.broadcast_to(self.local_rest[n], (bsz, 4, 4))
            p = self.parents[n]
            glob[n] = local if p < 0 else glob[p] @ local
        joints = np.stack([glob[n] for n in self.skin_nodes], axis=1)  # (B, J, 4, 4)
        return joints @ self.ibm[None]

    def pose(self, weights: np.ndarray, local: np.ndarray) -> np.ndarray:
        """Vertices of any scene pose, as a glTF 2.0 viewer evaluates it (animated takes).

        weights: (B, T) morph weights; local: (B, N, 4, 4) every node's local matrix.
        returns: (B, V, 3). Skinned meshes are in the scene's frame (joint globals times inverse
        bind matrices); an unskinned mesh stays in its own rest frame and moves by its node's
        motion from rest, inverse(G_rest) * G_t, so static node transforms cancel.
        """
        out = np.empty((weights.shape[0], self.base.shape[0], 3), dtype=np.float32)
        t = self.targets.shape[0]
        rest_inv = np.linalg.inv(self.rest_global[self.mesh_node]) if self.mesh_node is not None \
            else None
        for s in range(0, weights.shape[0], _CHUNK):
            glob = global_transforms(local[s : s + _CHUNK], self.parents, self.order)
            w = weights[s : s + _CHUNK]
            pts: np.ndarray = morph_positions(self.base, self.targets, w) if t else \
                np.broadcast_to(self.base, (w.shape[0], *self.base.shape))
            if self.skin_nodes:
                pts = skin_points(pts, glob[:, self.skin_nodes] @ self.ibm[None], self.skin_weights)
            elif rest_inv is not None and self.mesh_node is not None:
                motion = rest_inv[None] @ glob[:, self.mesh_node]  # (b, 4, 4)
                # out[b, v, i] = sum_j motion[b, i, j] * pts[b, v, j] + motion[b, i, 3]
                pts = np.einsum("bij,bvj->bvi", motion[:, :3, :3], pts) + motion[:, None, :3, 3]
            out[s : s + _CHUNK] = pts
        return out

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        out = np.empty((controls.shape[0], self.base.shape[0], 3), dtype=np.float32)
        t = self.targets.shape[0]
        for s in range(0, controls.shape[0], _CHUNK):
            c = controls[s : s + _CHUNK]
            pts: np.ndarray = morph_positions(self.base, self.targets, c[:, :t]) if t else self.base
            if self.skin_nodes:
                pts = skin_points(pts, self.joint_matrices(c), self.skin_weights)
            out[s : s + _CHUNK] = pts
        return out


def _skin_sets(attributes: Any) -> list[tuple[int, int]]:
    """[(JOINTS_n accessor, WEIGHTS_n accessor), ...] for n = 0, 1, ... while both exist."""
    raw = attributes if isinstance(attributes, Mapping) else vars(attributes)
    extra = {k: v for k, v in raw.items() if v is not None}
    sets = []
    n = 0
    while f"JOINTS_{n}" in extra and f"WEIGHTS_{n}" in extra:
        sets.append((int(extra[f"JOINTS_{n}"]), int(extra[f"WEIGHTS_{n}"])))
        n += 1
    return sets


def _pair(value: Any, where: str) -> tuple[float, float]:
    ok = (isinstance(value, list | tuple) and len(value) == 2
          and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value))
    if not ok or not value[0] < value[1]:
        raise RigError(f"bounds for {where} must be [lo, hi] with lo < hi, got {value!r}")
    return float(value[0]), float(value[1])
