"""What every solved frame carries besides its controls: fit quality, flags and the head pose.

- ``FrameQuality``: fit RMS and max (mesh units, NaN when not computed) and three flags, named as
  the live protocol's (docs/protocol.md, "flags"), computed offline as follows:
  ``off_manifold`` the batch solve's detector; ``clamped`` at least one control sits on a bound
  that is not its default (the solve, or its filter, wanted to go further); ``stale`` frames are
  missing just before this one (its time step is more than 1.5 times the take's median step).
- ``HeadPose``: the rigid (or similarity) transform that stabilisation removed, as the pose of the
  head in the take's frame: ``x_take = scale * R(rotation) @ x_rig + translation``. It is the
  inverse of the fit ``x_rig = s R x_take + t`` (Umeyama 1991) that ``fit_rigid_batch`` returns.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from rigcast.runtime.schema import ControlSchema

log = logging.getLogger(__name__)

STALE_STEP_FACTOR = 1.5  # a step this much above the median means frames are missing (common practice)
FLAG_NAMES = ("off_manifold", "clamped", "stale")
POSE_COLUMNS = ("head_tx", "head_ty", "head_tz", "head_qx", "head_qy", "head_qz", "head_qw",
                "head_scale")


@dataclass(frozen=True)
class FrameQuality:
    """fit_rms, fit_max (T,) float64 (NaN: not computed); off_manifold, clamped, stale (T,) bool."""

    fit_rms: np.ndarray
    fit_max: np.ndarray
    off_manifold: np.ndarray
    clamped: np.ndarray
    stale: np.ndarray

    def __post_init__(self) -> None:
        t = self.fit_rms.shape
        for name in ("fit_max", *FLAG_NAMES):
            if getattr(self, name).shape != t:
                raise ValueError(f"FrameQuality.{name} has shape {getattr(self, name).shape}, "
                                 f"fit_rms has {t}")

    @property
    def frames(self) -> int:
        return int(self.fit_rms.shape[0])

    def flags(self, name: str) -> np.ndarray:
        """(T,) bool of one of FLAG_NAMES."""
        if name not in FLAG_NAMES:
            raise ValueError(f"unknown flag {name!r}; flags are {FLAG_NAMES}")
        return np.asarray(getattr(self, name), dtype=bool)


@dataclass(frozen=True)
class HeadPose:
    """translation (T, 3), rotation (T, 4) unit quaternions (x, y, z, w), scale (T,); float64."""

    translation: np.ndarray
    rotation: np.ndarray
    scale: np.ndarray

    def matrices(self) -> np.ndarray:
        """(T, 4, 4) = T * R * S, the pose as affine matrices."""
        from rigcast.export.rigs.gltf_eval import trs_matrices

        s = np.repeat(self.scale[:, None], 3, axis=1)
        return trs_matrices(self.translation, self.rotation, s)

    def apply(self, points: np.ndarray) -> np.ndarray:
        """points (T, V, 3) in the rig's frame -> (T, V, 3) in the take's frame."""
        m = self.matrices()
        # out[t, v, i] = sum_j m[t, i, j] * points[t, v, j] + m[t, i, 3]
        return np.einsum("tij,tvj->tvi", m[:, :3, :3], points) + m[:, None, :3, 3]

    def table(self) -> np.ndarray:
        """(T, 8) columns of POSE_COLUMNS."""
        return np.column_stack([self.translation, self.rotation, self.scale])


def head_pose_from_fit(rotation: np.ndarray, translation: np.ndarray, scale: np.ndarray
                       ) -> HeadPose:
    """Invert the stabilisation fits ``x_rig = s R x_take + t`` (rotation (T, 3, 3), translation
    (T, 3), scale (T,)) into head poses ``x_take = (1/s) R^T x_rig - (1/s) R^T t``."""
    from rigcast.export.rigs.gltf_eval import matrices_to_quat_xyzw

    rot_t = np.transpose(np.asarray(rotation, np.float64), (0, 2, 1))
    inv_s = 1.0 / np.asarray(scale, np.float64)
    trans = -inv_s[:, None] * np.einsum("tij,tj->ti", rot_t, translation)
    return HeadPose(trans, matrices_to_quat_xyzw(rot_t), inv_s)


def identity_pose(frames: int) -> HeadPose:
    """No head motion (stabilisation off)."""
    return HeadPose(np.zeros((frames, 3)), np.tile([0.0, 0.0, 0.0, 1.0], (frames, 1)),
                    np.ones(frames))


def clamped_frames(controls: np.ndarray, schema: ControlSchema) -> np.ndarray:
    """(T, C) solved controls -> (T,) bool: some control on a bound that is not its default."""
    lo, hi, d = schema.lower[None], schema.upper[None], schema.defaults[None]
    # float32 clamping: compare with the bounds rounded to float32 (docs/protocol.md)
    lo32, hi32 = lo.astype(np.float32), hi.astype(np.float32)
    c = np.asarray(controls, np.float32)
    at = ((c <= lo32) & (d != lo)) | ((c >= hi32) & (d != hi))
    return np.asarray(at.any(axis=1))


def stale_frames(times_s: np.ndarray) -> np.ndarray:
    """(T,) times -> (T,) bool: the step before this frame exceeds STALE_STEP_FACTOR x median."""
    t = np.asarray(times_s, np.float64)
    out = np.zeros(t.shape[0], bool)
    if t.shape[0] > 2:
        step = np.diff(t)
        out[1:] = step > STALE_STEP_FACTOR * float(np.median(step))
    return out


def flag_ranges(flags: np.ndarray) -> list[tuple[int, int]]:
    """(T,) bool -> inclusive frame ranges [(first, last), ...] where it is set."""
    f = np.concatenate([[False], np.asarray(flags, bool), [False]])
    edges = np.flatnonzero(np.diff(f.astype(np.int8)))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def describe_ranges(flags: np.ndarray, limit: int = 8) -> str:
    """``"12-30, 95, 200-204"`` (at most ``limit`` ranges, then ``"(+N more)"``); ``"none"``."""
    ranges = flag_ranges(flags)
    if not ranges:
        return "none"
    text = ", ".join(f"{a}" if a == b else f"{a}-{b}" for a, b in ranges[:limit])
    return text + (f" (+{len(ranges) - limit} more)" if len(ranges) > limit else "")
