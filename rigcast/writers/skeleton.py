"""A skinned rig's skeleton, as the glTF and USD writers need it: joints, rest transforms, skin
weights, inverse bind matrices, which control turns which joint about which axis, and the
pre-skinning mesh with its morph targets.

Posed local matrix of joint j: ``left_j @ E(angles_j) @ right_j``, E the intrinsic Euler XYZ
rotation of the joint's controls in degrees (``euler_xyz_matrices``). Skinning is glTF 2.0's
("Skins"): ``sum_j w[v, j] * global_j @ inverse_bind_j @ (morphed base, 1)``.

``skeleton_from_rig`` reads it off the two skinned rig sources: a glTF rig with a skin
(``GltfRig``) and the demo arm (``TamsinLanternArm``). Non-joint ancestors of a glTF skin are
folded into the root joints' ``left`` (they are not animated by any control).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import numpy as np

from rigcast.export.rigs.gltf_eval import (
    euler_xyz_matrices,
    global_transforms,
    morph_positions,
    skin_points,
)
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)


class SkeletonError(RigcastError, ValueError):
    """A rig has no skeleton that the writers can express; the message says why."""

    advice = "write the controls instead (CSV or JSON); `rigcast solve --help` lists the formats"


@dataclass(frozen=True)
class Skeleton:
    """names (J,); parents (J,) joint index or -1, parents first; left, right (J, 4, 4);
    inverse_bind (J, 4, 4); weights (V, J) rows summing to 1; drives: (control column, joint,
    axis 0..2) per joint control; base (V, 3) pre-skinning mesh; faces (F, 3); targets (M, V, 3)
    morph targets applied before skinning, driven by control columns ``target_controls`` (M,)
    and named ``target_names``."""

    name: str
    names: tuple[str, ...]
    parents: tuple[int, ...]
    left: np.ndarray
    right: np.ndarray
    inverse_bind: np.ndarray
    weights: np.ndarray
    drives: tuple[tuple[int, int, int], ...]
    base: np.ndarray
    faces: np.ndarray
    targets: np.ndarray
    target_controls: tuple[int, ...]
    target_names: tuple[str, ...]

    @property
    def joint_count(self) -> int:
        return len(self.names)

    def local_matrices(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) -> (B, J, 4, 4) posed local matrices."""
        b, j = controls.shape[0], self.joint_count
        angles = np.zeros((b, j, 3))
        for col, joint, axis in self.drives:
            angles[:, joint, axis] = np.radians(controls[:, col])
        rot = np.zeros((b * j, 4, 4))
        rot[:, :3, :3] = euler_xyz_matrices(angles.reshape(-1, 3))
        rot[:, 3, 3] = 1.0
        return self.left[None] @ rot.reshape(b, j, 4, 4) @ self.right[None]

    def global_matrices(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) -> (B, J, 4, 4) joint world matrices."""
        return global_transforms(self.local_matrices(controls), list(self.parents),
                                 list(range(self.joint_count)))

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) -> (B, V, 3): morph, then skin (glTF 2.0 order)."""
        pts = morph_positions(self.base, self.targets,
                              np.asarray(controls, np.float64)[:, list(self.target_controls)])
        return skin_points(pts, self.global_matrices(controls) @ self.inverse_bind[None],
                           self.weights)


def skeleton_from_rig(rig: Any) -> Skeleton:
    """The skeleton of a skinned rig (a glTF rig with a skin, or the demo arm)."""
    from rigcast.export.rigs.demo_rigs import TamsinLanternArm
    from rigcast.export.rigs.gltf_rig import GltfRig

    if isinstance(rig, TamsinLanternArm):
        return _arm_skeleton(rig)
    if isinstance(rig, GltfRig) and rig.skin_nodes:
        return _gltf_skeleton(rig)
    raise SkeletonError(f"rig {rig.name!r} has no skeleton rigcast can write (skinned glTF rigs "
                        "and demo:arm have one); write its morph targets or CSV/JSON instead")


def _arm_skeleton(rig: Any) -> Skeleton:
    heights = np.asarray(rig.joint_heights, np.float64)
    j = heights.shape[0]
    left = np.broadcast_to(np.eye(4), (j, 4, 4)).copy()
    left[0, 1, 3] = heights[0]
    left[1:, 1, 3] = np.diff(heights)  # each joint one segment above its parent
    ibm = np.broadcast_to(np.eye(4), (j, 4, 4)).copy()
    ibm[:, 1, 3] = -heights
    # controls 2k and 2k + 1: joint k's curl (about x) and sway (about z)
    drives = tuple((2 * k + a, k, axis) for k in range(j) for a, axis in ((0, 0), (1, 2)))
    names = tuple(c.name.removesuffix("_curl") for c in rig.schema.controls[::2])
    v = rig.neutral.shape[0]
    return Skeleton(rig.name, names, tuple(range(-1, j - 1)), left,
                    np.broadcast_to(np.eye(4), (j, 4, 4)).copy(), ibm,
                    np.asarray(rig.skin_weights, np.float64), drives,
                    np.asarray(rig.neutral, np.float64), np.asarray(rig.faces, np.int32),
                    np.zeros((0, v, 3)), (), ())


def _gltf_skeleton(rig: Any) -> Skeleton:
    nodes = list(rig.skin_nodes)
    index = {n: k for k, n in enumerate(nodes)}
    parents: list[int] = []
    left = np.array(rig.local_left[nodes], np.float64)
    for k, n in enumerate(nodes):
        p = rig.parents[n]
        while p >= 0 and p not in index:
            p = rig.parents[p]
        parents.append(index[p] if p >= 0 else -1)
        # non-joint ancestors between this joint and the next joint up: fold their rest globals
        up = rig.parents[n]
        above = rig.rest_global[p] if p >= 0 else np.eye(4)
        if up >= 0 and up != p:
            left[k] = np.linalg.inv(above) @ rig.rest_global[up] @ left[k]
    # parents first (the skin's joint list need not be): weights, drives and IBMs follow
    order = _parents_first(parents)
    new_of = {old: new for new, old in enumerate(order)}
    parents = [new_of[parents[k]] if parents[k] >= 0 else -1 for k in order]
    nodes, left = [nodes[k] for k in order], left[order]
    pos = {n: k for k, n in enumerate(nodes)}
    t = rig.targets.shape[0]
    drives = tuple((t + c, pos[node], axis)
                   for c, (node, axis, _, _) in enumerate(rig.joint_controls))
    weights = np.asarray(rig.skin_weights, np.float64)[:, order]
    ibm = np.asarray(rig.ibm, np.float64)[order]
    names = tuple(rig.node_names[n] for n in nodes)
    return Skeleton(rig.name, names, tuple(parents), left, np.array(rig.local_right[nodes]), ibm,
                    weights, drives, np.asarray(rig.base, np.float64),
                    np.asarray(rig.faces, np.int32), np.asarray(rig.targets, np.float64),
                    tuple(range(t)), tuple(c.name for c in rig.schema.controls[:t]))


def _parents_first(parents: list[int]) -> list[int]:
    order: list[int] = []
    placed: set[int] = set()
    while len(order) < len(parents):
        before = len(order)
        for k, p in enumerate(parents):
            if k not in placed and (p < 0 or p in placed):
                order.append(k)
                placed.add(k)
        if len(order) == before:
            raise SkeletonError(f"skin joints form a cycle: parents {parents}")
    return order
