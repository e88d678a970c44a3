"""Tamsin's lantern arm: no blendshapes at all; a six-joint tentacle arm holding a lantern, skinned
with linear blend skinning, two bounded angles per joint (``tamsin_lantern_arm()``)."""

from __future__ import annotations

import logging
from collections.abc import Callable

import numpy as np
from rigcast.export.rigs.demo_mesh import uv_sphere
from rigcast.export.rigs.gltf_eval import euler_xyz_matrices, skin_points
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)

_CHUNK = 1024  # poses per evaluation chunk; bounds the intermediate arrays to ~50 MB
_ARM_JOINTS = ("base", "lower", "middle", "upper", "wrist", "grip")
_SEGMENT = 0.3


def _arm_schema() -> ControlSchema:
    controls = []
    for k, joint in enumerate(_ARM_JOINTS):
        limit = 40.0 if k == 0 else 35.0
        for axis in ("curl", "sway"):
            controls.append(Control(f"arm_{joint}_{axis}", -limit, limit, 0.0, f"arm_{joint}", ""))
    return ControlSchema(tuple(controls))


def _arm_mesh(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tapered tube along +y with a lantern at the tip: (verts (V,3), faces (F,3), height (V,))."""
    rings, around = 72, 24
    length = _SEGMENT * len(_ARM_JOINTS)
    t = np.linspace(0.0, 1.0, rings)
    ang = np.linspace(0, 2 * np.pi, around, endpoint=False)
    rng = np.random.default_rng(seed)
    radius = 0.12 - 0.07 * t
    bumps = 1 + 0.04 * np.sin(3 * ang[None] + rng.uniform(0, 6.3)) * np.sin(9 * np.pi * t)[:, None]
    r = radius[:, None] * bumps
    tube = np.stack(
        [r * np.cos(ang), np.broadcast_to(t[:, None] * length, r.shape), r * np.sin(ang)]
    )
    tube = tube.transpose(1, 2, 0).reshape(-1, 3)
    idx = np.arange(rings * around).reshape(rings, around)
    nxt = np.roll(idx, -1, axis=1)
    faces = [
        np.stack([idx[:-1], idx[1:], nxt[1:]], -1),
        np.stack([idx[:-1], nxt[1:], nxt[:-1]], -1),
    ]
    faces = [f.reshape(-1, 3) for f in faces]
    dirs, sphere_faces = uv_sphere(14, 20)
    lantern = dirs * np.array([0.08, 0.11, 0.08]) + np.array([0.0, length + 0.12, 0.0])
    verts = np.concatenate([tube, lantern])
    faces.append(sphere_faces + len(tube))
    return verts, np.concatenate(faces).astype(np.int32), verts[:, 1]


class TamsinLanternArm(Rig):
    """A six-joint tentacle arm carrying a lantern: LBS only, two angles per joint (degrees,
    intrinsic X (curl) then Z (sway) about each joint's rest frame). Build it with
    ``tamsin_lantern_arm()``."""

    linear = False

    def __init__(self, *, seed: int = 11) -> None:
        self._seed = seed
        self.name = "tamsin-lantern-arm"
        self.schema = _arm_schema()
        verts, self.faces, height = _arm_mesh(seed)
        self.neutral = verts.astype(np.float32)
        joints = len(_ARM_JOINTS)
        self.joint_heights = _SEGMENT * np.arange(joints)
        centers = self.joint_heights + _SEGMENT / 2
        # hat weights between neighbouring segment centres, clamped at both ends
        h = np.clip(height, centers[0], centers[-1])
        w = np.clip(1 - np.abs(h[:, None] - centers[None]) / _SEGMENT, 0, 1)
        self.skin_weights = (w / w.sum(axis=1, keepdims=True)).astype(np.float32)

    def __reduce__(self) -> tuple[Callable[..., TamsinLanternArm], tuple[int]]:
        return (_rebuild_arm, (self._seed,))

    def joint_matrices(self, controls: np.ndarray) -> np.ndarray:
        """controls: (B, 2J) degrees -> (B, J, 4, 4) skinning matrices G_j @ inverse(G_j rest).

        Forward kinematics: G_0 = T(rest_0) R_0, G_j = G_{j-1} T(0, segment, 0) R_j.
        """
        bsz, joints = controls.shape[0], len(_ARM_JOINTS)
        ang = np.radians(controls.reshape(bsz, joints, 2))
        xyz = np.zeros((bsz * joints, 3))
        xyz[:, 0] = ang[..., 0].reshape(-1)
        xyz[:, 2] = ang[..., 1].reshape(-1)
        rots = euler_xyz_matrices(xyz).reshape(bsz, joints, 3, 3)
        out = np.empty((bsz, joints, 4, 4))
        g = np.broadcast_to(np.eye(4), (bsz, 4, 4)).copy()
        for j in range(joints):
            local = np.broadcast_to(np.eye(4), (bsz, 4, 4)).copy()
            local[:, :3, :3] = rots[:, j]
            local[:, 1, 3] = self.joint_heights[0] if j == 0 else _SEGMENT
            g = g @ local
            inv_rest = np.eye(4)
            inv_rest[1, 3] = -self.joint_heights[j]
            out[:, j] = g @ inv_rest
        return out

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        out = np.empty((controls.shape[0], self.vertex_count, 3), dtype=np.float32)
        for start in range(0, controls.shape[0], _CHUNK):
            mats = self.joint_matrices(controls[start : start + _CHUNK])
            out[start : start + _CHUNK] = skin_points(self.neutral, mats, self.skin_weights)
        return out


def _rebuild_arm(seed: int) -> TamsinLanternArm:
    return TamsinLanternArm(seed=seed)



def tamsin_lantern_arm() -> TamsinLanternArm:
    """The skinning-only demo rig: a six-joint tentacle arm with a lantern, 12 controls."""
    return TamsinLanternArm()

