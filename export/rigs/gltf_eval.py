"""Pure math of glTF 2.0 rig evaluation: morph targets, node transforms and linear blend skinning.

Everything here is a function over numpy arrays; loading files lives in ``export/rigs/gltf_rig.py``.
The formulas follow the glTF 2.0 specification, sections "Morph Targets" and
"Skins" (with "Joint Hierarchy" and "Skinned Mesh Attributes"):

- morphed position = base + sum_i w_i * target_i.POSITION
- jointMatrix_j = globalTransform(joint_j) * inverseBindMatrix_j (the transform of the node
  holding the skinned mesh is ignored)
- skinned position = sum_k weight_k * jointMatrix_{joint_k} * (morphed position, 1)

The demo rigs reuse ``skin_points`` and ``euler_xyz_matrices`` for their own joints.
"""

from __future__ import annotations

import logging

import numpy as np

log = logging.getLogger(__name__)


def morph_positions(base: np.ndarray, targets: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Apply morph targets.

    base: (V, 3); targets: (T, V, 3) POSITION displacements; weights: (B, T).
    returns: (B, V, 3) = base + sum_t weights[b, t] * targets[t].
    """
    v = base.shape[0]
    t = targets.shape[0]
    if t == 0:
        return np.broadcast_to(base, (weights.shape[0], v, 3)).copy()
    # (B, T) @ (T, V*3) -> (B, V*3)
    flat = weights @ targets.reshape(t, v * 3)
    return base[None] + flat.reshape(-1, v, 3)


def morph_positions_naive(base: np.ndarray, targets: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Loop twin of ``morph_positions``: one pose and one target at a time."""
    out = np.zeros((weights.shape[0], base.shape[0], 3))
    for b in range(weights.shape[0]):
        p = base.astype(np.float64).copy()
        for i in range(targets.shape[0]):
            p = p + weights[b, i] * targets[i]
        out[b] = p
    return out


def quat_xyzw_to_matrix(q: np.ndarray) -> np.ndarray:
    """Unit quaternion (x, y, z, w), the glTF node ``rotation`` order, to a (3, 3) matrix."""
    x, y, z, w = (float(c) for c in np.asarray(q, dtype=np.float64) / np.linalg.norm(q))
    return np.array(
        [
            [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
            [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
            [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)],
        ]
    )


def trs_matrix(
    translation: np.ndarray | None, rotation: np.ndarray | None, scale: np.ndarray | None
) -> np.ndarray:
    """glTF node TRS to a (4, 4) matrix M = T * R * S (spec, "Transformations")."""
    m = np.eye(4)
    r = np.eye(3) if rotation is None else quat_xyzw_to_matrix(np.asarray(rotation))
    s = np.ones(3) if scale is None else np.asarray(scale, dtype=np.float64)
    m[:3, :3] = r * s[None, :]
    if translation is not None:
        m[:3, 3] = np.asarray(translation, dtype=np.float64)
    return m


def euler_xyz_matrices(angles: np.ndarray) -> np.ndarray:
    """Intrinsic X-then-Y-then-Z rotations, R = Rx(a) @ Ry(b) @ Rz(c).

    This is SciPy's ``Rotation.from_euler("XYZ", [a, b, c])`` (upper case = intrinsic).
    angles: (B, 3) radians. returns: (B, 3, 3).
    """
    a, b, c = angles[:, 0], angles[:, 1], angles[:, 2]
    ca, sa, cb, sb, cc, sc = np.cos(a), np.sin(a), np.cos(b), np.sin(b), np.cos(c), np.sin(c)
    out = np.empty((angles.shape[0], 3, 3), dtype=angles.dtype)
    # Rx @ Ry @ Rz written out
    out[:, 0, 0] = cb * cc
    out[:, 0, 1] = -cb * sc
    out[:, 0, 2] = sb
    out[:, 1, 0] = ca * sc + sa * sb * cc
    out[:, 1, 1] = ca * cc - sa * sb * sc
    out[:, 1, 2] = -sa * cb
    out[:, 2, 0] = sa * sc - ca * sb * cc
    out[:, 2, 1] = sa * cc + ca * sb * sc
    out[:, 2, 2] = ca * cb
    return out


def skin_points(points: np.ndarray, joint_mats: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Linear blend skinning with dense weights.

    points: (B, V, 3), or (V, 3) shared by every pose; joint_mats: (B, J, 4, 4) skinning matrices;
    weights: (V, J), rows summing to 1.
    returns: (B, V, 3) = sum_j weights[v, j] * (joint_mats[b, j] @ (points[b, v], 1))[:3].
    """
    bsz, j = joint_mats.shape[:2]
    dtype = np.result_type(points.dtype, np.float32)
    w = weights.astype(dtype)
    if points.ndim == 2:
        # q[v, (j, n)] = w[v, j] * (p[v], 1)[n]; out[v, (b, m)] = sum_{j, n} q[v, jn] M[b, j, m, n]
        v = points.shape[0]
        hom = np.concatenate([points.astype(dtype), np.ones((v, 1), dtype)], axis=1)
        q = (w[:, :, None] * hom[:, None, :]).reshape(v, j * 4)
        mats = joint_mats[:, :, :3, :].astype(dtype).transpose(1, 3, 0, 2).reshape(j * 4, bsz * 3)
        return (q @ mats).reshape(v, bsz, 3).transpose(1, 0, 2).copy()
    top = joint_mats[:, :, :3, :].reshape(bsz, j, 12).astype(dtype)
    # blended[b, v, :] = sum_j w[v, j] * top[b, j, :]  -> (B, V, 3, 4)
    blended = np.matmul(w[None], top).reshape(bsz, -1, 3, 4)
    p = points.astype(dtype)
    out = blended[..., 3].copy()
    for n in range(3):
        out += blended[..., n] * p[..., n : n + 1]
    return out


def skin_points_naive(
    points: np.ndarray, joint_mats: np.ndarray, weights: np.ndarray
) -> np.ndarray:
    """Loop twin of ``skin_points``: per pose, vertex and joint, in float64."""
    bsz = joint_mats.shape[0]
    p = np.broadcast_to(points, (bsz, *points.shape[-2:])).astype(np.float64)
    out = np.zeros_like(p)
    for b in range(bsz):
        for v in range(p.shape[1]):
            h = np.append(p[b, v], 1.0)
            for j in range(weights.shape[1]):
                if weights[v, j] != 0.0:
                    out[b, v] += weights[v, j] * (joint_mats[b, j] @ h)[:3]
    return out


def dense_weights(joints: np.ndarray, weights: np.ndarray, joint_count: int) -> np.ndarray:
    """glTF JOINTS_n/WEIGHTS_n (V, 4n) to dense (V, J) weights, each row normalised to sum 1.

    The spec requires the weights to sum to one; exporters round, so we renormalise. A vertex with
    all-zero weights stays on the mesh node (weight 1 on no joint is not expressible), which we
    reject in the loader.
    """
    v = joints.shape[0]
    out = np.zeros((v, joint_count))
    rows = np.repeat(np.arange(v), joints.shape[1])
    np.add.at(out, (rows, joints.reshape(-1).astype(np.int64)), weights.reshape(-1))
    total = out.sum(axis=1, keepdims=True)
    return out / np.where(total > 0, total, 1.0)


def quat_xyzw_to_matrices(q: np.ndarray) -> np.ndarray:
    """Batched ``quat_xyzw_to_matrix``: (B, 4) quaternions (x, y, z, w), normalised here,
    -> (B, 3, 3) rotation matrices."""
    q = np.asarray(q, dtype=np.float64)
    q = q / np.linalg.norm(q, axis=1, keepdims=True)
    x, y, z, w = q[:, 0], q[:, 1], q[:, 2], q[:, 3]
    out = np.empty((q.shape[0], 3, 3))
    out[:, 0, 0] = 1 - 2 * (y * y + z * z)
    out[:, 0, 1] = 2 * (x * y - z * w)
    out[:, 0, 2] = 2 * (x * z + y * w)
    out[:, 1, 0] = 2 * (x * y + z * w)
    out[:, 1, 1] = 1 - 2 * (x * x + z * z)
    out[:, 1, 2] = 2 * (y * z - x * w)
    out[:, 2, 0] = 2 * (x * z - y * w)
    out[:, 2, 1] = 2 * (y * z + x * w)
    out[:, 2, 2] = 1 - 2 * (x * x + y * y)
    return out


def matrices_to_quat_xyzw(r: np.ndarray) -> np.ndarray:
    """(B, 3, 3) rotation matrices -> (B, 4) unit quaternions (x, y, z, w) with w >= 0.

    Each row uses the largest of the four ``4 q_k^2`` diagonal combinations as the divisor
    (Shepperd, "Quaternion from rotation matrix", J. Guidance and Control 1(3), 1978), so no
    division is by a small number. The inverse of ``quat_xyzw_to_matrices``.
    """
    r = np.asarray(r, dtype=np.float64)
    m00, m11, m22 = r[:, 0, 0], r[:, 1, 1], r[:, 2, 2]
    # rows: 4w^2, 4x^2, 4y^2, 4z^2 from the trace and diagonal
    sq = np.stack([1 + m00 + m11 + m22, 1 + m00 - m11 - m22, 1 - m00 + m11 - m22,
                   1 - m00 - m11 + m22], axis=1)
    k = np.argmax(sq, axis=1)
    s = np.sqrt(np.maximum(sq[np.arange(r.shape[0]), k], 1e-300))  # 2 |q_k|
    d21, d02, d10 = r[:, 2, 1] - r[:, 1, 2], r[:, 0, 2] - r[:, 2, 0], r[:, 1, 0] - r[:, 0, 1]
    s21, s02, s10 = r[:, 2, 1] + r[:, 1, 2], r[:, 0, 2] + r[:, 2, 0], r[:, 1, 0] + r[:, 0, 1]
    cand = np.stack([
        np.stack([d21, d02, d10, s * s], 1),   # w largest
        np.stack([s * s, s10, s02, d21], 1),   # x largest
        np.stack([s10, s * s, s21, d02], 1),   # y largest
        np.stack([s02, s21, s * s, d10], 1),   # z largest
    ], axis=1)  # (B, 4 cases, 4): each row is 2 s * (x, y, z, w)
    q = cand[np.arange(r.shape[0]), k] / (2.0 * s[:, None])
    q = q / np.linalg.norm(q, axis=1, keepdims=True)
    return np.where(q[:, 3:4] < 0.0, -q, q)


def trs_matrices(translation: np.ndarray, rotation: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Batched ``trs_matrix``: (B, 3), (B, 4) xyzw, (B, 3) -> (B, 4, 4) = T * R * S."""
    out = np.zeros((translation.shape[0], 4, 4))
    out[:, :3, :3] = quat_xyzw_to_matrices(rotation) * np.asarray(scale, np.float64)[:, None, :]
    out[:, :3, 3] = translation
    out[:, 3, 3] = 1.0
    return out


def decompose_trs(m: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """(B, 4, 4) affine matrices -> (translation (B, 3), rotation (B, 4) xyzw, scale (B, 3),
    largest reconstruction error). glTF node TRS (spec, "Transformations") cannot hold shear, so
    the error says whether ``m`` is a T * R * S at all; a negative determinant flips scale x."""
    m = np.asarray(m, dtype=np.float64)
    lin = m[:, :3, :3]
    scale = np.linalg.norm(lin, axis=1)  # column norms
    scale[:, 0] *= np.where(np.linalg.det(lin) < 0.0, -1.0, 1.0)
    rot = lin / np.where(scale == 0.0, 1.0, scale)[:, None, :]
    quat = matrices_to_quat_xyzw(rot)
    back = trs_matrices(m[:, :3, 3], quat, scale)
    return m[:, :3, 3].copy(), quat, scale, float(np.abs(back - m).max(initial=0.0))


def global_transforms(local: np.ndarray, parents: list[int], order: list[int]) -> np.ndarray:
    """World matrices of a node hierarchy (spec, "Transformations": global = parent's global *
    local). local: (B, N, 4, 4); parents: (N,) parent index or -1; order: parents before
    children. returns: (B, N, 4, 4)."""
    out = np.empty_like(local, dtype=np.float64)
    for n in order:
        p = parents[n]
        out[:, n] = local[:, n] if p < 0 else out[:, p] @ local[:, n]
    return out
