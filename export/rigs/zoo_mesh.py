"""Pure geometry and deformation math for the rig zoo (export/rigs/zoo.py): surfaces, displacement
fields, a two-bone jaw and joint chains with linear blend skinning.

Every function is a pure numpy function of its arguments; randomness comes in as a
``numpy.random.Generator``. Mesh units are those of the demo face (a head about 2 units tall).
"""

from __future__ import annotations

import logging

import numpy as np
from rigcast.export.rigs.demo_rigs import _uv_sphere, _vertex_normals
from rigcast.export.rigs.gltf_eval import euler_xyz_matrices

log = logging.getLogger(__name__)


def grid_dims(target: int, lo: int, hi: int, extra: int = 0, aspect: float = 1.0) -> tuple[int, int]:
    """(rows, cols) with ``lo <= rows * cols + extra <= hi``, close to ``target`` vertices and to
    ``cols / rows ~ aspect``."""
    target = int(np.clip(target, lo, hi))
    cols = max(8, round(np.sqrt((target - extra) * aspect)))
    rows = max(4, round((target - extra) / cols))
    while rows * cols + extra > hi:
        rows -= 1
    while rows * cols + extra < lo:
        rows += 1
    return rows, cols


def head_surface(
    target: int, lo: int, hi: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """A lumpy, squashed sphere about a head's size: (vertices (V, 3), faces (F, 3) int32)."""
    rows, cols = grid_dims(target, lo, hi, extra=2, aspect=1.1)
    dirs, faces = _uv_sphere(rows, cols)
    radius = np.ones(len(dirs))
    for _ in range(int(rng.integers(4, 12))):
        c = rng.normal(size=3)
        radius += rng.normal(0.0, 0.04) * gaussian(dirs, c / np.linalg.norm(c), (0.4,) * 3)
    scale = rng.uniform(0.85, 1.12, size=3)
    return dirs * radius[:, None] * scale, faces


def sheet_surface(
    target: int, lo: int, hi: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """A curved, gently rippled patch about 2 x 2 units (a mask or cloth panel):
    (vertices (V, 3), faces (F, 3) int32)."""
    rows, cols = grid_dims(target, lo, hi, aspect=rng.uniform(0.7, 1.4))
    x, y = np.meshgrid(np.linspace(-1, 1, cols), np.linspace(-1.1, 1.1, rows))
    bend = rng.uniform(0.1, 0.5)
    z = -bend * (x**2 + 0.6 * y**2)
    for _ in range(int(rng.integers(2, 6))):
        cx, cy = rng.uniform(-1, 1, size=2)
        z += rng.normal(0, 0.06) * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / 0.2)
    verts = np.stack([x, y, z], -1).reshape(-1, 3)
    return verts, quad_faces(rows, cols)


def quad_faces(rows: int, cols: int, wrap: bool = False) -> np.ndarray:
    """Two triangles per quad of a (rows, cols) vertex grid, row-major; ``wrap`` joins the last
    column to the first (a tube). returns (F, 3) int32."""
    idx = np.arange(rows * cols).reshape(rows, cols)
    nxt = np.roll(idx, -1, axis=1) if wrap else idx[:, 1:]
    cur = idx if wrap else idx[:, :-1]
    a, b, c, d = cur[:-1], nxt[:-1], nxt[1:], cur[1:]
    tris = np.concatenate([np.stack([a, c, b], -1).reshape(-1, 3),
                           np.stack([a, d, c], -1).reshape(-1, 3)])
    return tris.astype(np.int32)


def tube_surface(rings: int, around: int, length: float, radius: float,
                 rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A tapered, slightly lumpy tube along +y from y = 0 to ``length``:
    (vertices (rings * around, 3), faces (F, 3) int32)."""
    t = np.linspace(0.0, 1.0, rings)
    ang = np.linspace(0, 2 * np.pi, around, endpoint=False)
    bumps = 1 + 0.05 * np.sin(rng.integers(2, 5) * ang[None] + rng.uniform(0, 6.3)) * np.sin(
        rng.uniform(3, 12) * np.pi * t)[:, None]
    r = radius * (1.0 - 0.55 * t)[:, None] * bumps
    y = np.broadcast_to(t[:, None] * length, r.shape)
    verts = np.stack([r * np.cos(ang), y, r * np.sin(ang)], -1).reshape(-1, 3)
    return verts, quad_faces(rings, around, wrap=True)


def normals(verts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(V, 3), (F, 3) -> (V, 3) unit area-weighted vertex normals."""
    return _vertex_normals(np.asarray(verts, np.float64), faces)


def gaussian(points: np.ndarray, centre: np.ndarray, sigma: tuple[float, ...] | np.ndarray
             ) -> np.ndarray:
    """points (V, 3), centre (3,), sigma (3,) per-axis widths -> (V,) exp(-|(p - c) / s|^2 / 2)."""
    d = (points - np.asarray(centre)) / np.asarray(sigma)
    return np.exp(-0.5 * np.sum(d * d, axis=1))


def region_mask(coord: np.ndarray, edge: float, width: float) -> np.ndarray:
    """coord (V,) -> (V,) in [0, 1]: exactly 0 where coord <= edge, smoothstep up to 1 at
    edge + width. Multiplying a field by it leaves the region coord <= edge exactly unmoved."""
    x = np.clip((coord - edge) / width, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


def shape_field(points: np.ndarray, normal: np.ndarray, local: bool, extent: float,
                rng: np.random.Generator, centre: np.ndarray) -> np.ndarray:
    """One blendshape's displacement at full weight: 1 to 3 Gaussian terms around ``centre`` (3,),
    each pushing along a random vector or along the normal. ``local`` shapes are small (a few %
    of a head's surface, like an eyelid or nostril); others span a large area. ``extent``: the
    mesh's size (bbox diagonal / 3.5, ~1 for a head). returns (V, 3)."""
    out = np.zeros_like(points)
    for k in range(int(rng.integers(1, 4))):
        c = centre if k == 0 else centre + rng.normal(0, 0.08 if local else 0.25, 3) * extent
        base = rng.uniform(0.08, 0.16) if local else rng.uniform(0.25, 0.6)
        sigma = base * extent * rng.uniform(0.6, 1.5, size=3)
        size = (rng.uniform(0.01, 0.04) if local else rng.uniform(0.02, 0.08)) * extent
        f = gaussian(points, c, sigma)[:, None]
        if rng.random() < 0.3:
            out += f * normal * size * rng.choice([-1.0, 1.0])
        else:
            v = rng.normal(size=3)
            out += f * v / np.linalg.norm(v) * size
    return out


def global_field(points: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A whole-mesh deformation at full weight (squash and stretch about the centroid, with a
    shear), 3 to 6 % of the size: every vertex moves. points (V, 3) -> (V, 3)."""
    a = np.diag(rng.uniform(0.03, 0.06, size=3) * rng.choice([-1.0, 1.0], size=3))
    a[0, 1] = rng.uniform(-0.03, 0.03)
    return (points - points.mean(axis=0)) @ a.T


def jaw_weights(points: np.ndarray, mouth_y: float, width: float) -> np.ndarray:
    """(V, 3) -> (V,) jaw skin weight: the front of the head below the mouth line, smooth, with
    weights under 1e-6 set to exactly 0."""
    y, z = points[:, 1], points[:, 2]
    w = 1 / (1 + np.exp((y - mouth_y) / width)) * (1 / (1 + np.exp(-(z + 0.05) / 0.1)))
    return np.where(w < 1e-6, 0.0, w)


def jaw_skin(points: np.ndarray, angles_rad: np.ndarray, pivot: np.ndarray,
             weights: np.ndarray) -> np.ndarray:
    """Two-bone LBS, head fixed, jaw rotating about ``pivot`` (3,) by intrinsic XYZ ``angles_rad``
    (B, 3): out = (1 - w) p + w (R (p - c) + c) = p + w (R - I)(p - c).

    points (B, V, 3); weights (V,). returns (B, V, 3). The naive twin is
    ``gltf_eval.skin_points`` with joint matrices [I, T(c) R T(-c)] and weights [1 - w, w].
    """
    rot_t = (euler_xyz_matrices(angles_rad) - np.eye(3)).transpose(0, 2, 1)  # (B, 3, 3)
    moving = np.flatnonzero(weights)  # only the jaw's vertices; the others stay exactly put
    rel = points[:, moving] - pivot  # (B, M, 3)
    # move[b, v, i] = sum_j (R_b - I)[i, j] rel[b, v, j], written as three broadcast products
    # (a batched (M, 3) @ (3, 3) matmul is several times slower in numpy)
    move = sum(rel[:, :, j : j + 1] * rot_t[:, None, j, :] for j in range(3))
    out = np.array(points, dtype=np.result_type(points.dtype, np.float64))
    out[:, moving] += weights[moving, None] * move
    return out


def chain_matrices(angles_rad: np.ndarray, segment: float) -> np.ndarray:
    """Forward kinematics of a joint chain along +y: joint j sits at height ``segment * j`` at
    rest and turns by intrinsic XYZ angles (B, J, 3) radians.

    G_0 = R_0, G_j = G_{j-1} T(0, segment, 0) R_j; skinning matrix S_j = G_j T(0, -segment j, 0).
    returns (B, J, 4, 4).
    """
    bsz, joints = angles_rad.shape[:2]
    rots = euler_xyz_matrices(angles_rad.reshape(-1, 3)).reshape(bsz, joints, 3, 3)
    out = np.empty((bsz, joints, 4, 4))
    g = np.broadcast_to(np.eye(4), (bsz, 4, 4)).copy()
    for j in range(joints):
        local = np.broadcast_to(np.eye(4), (bsz, 4, 4)).copy()
        local[:, :3, :3] = rots[:, j]
        local[:, 1, 3] = 0.0 if j == 0 else segment
        g = g @ local
        inv_rest = np.eye(4)
        inv_rest[1, 3] = -segment * j
        out[:, j] = g @ inv_rest
    return out


def chain_weights(height: np.ndarray, joints: int, segment: float, blend: float,
                  root: bool) -> np.ndarray:
    """Hat skin weights along a chain: height (V,) -> (V, J) rows summing to 1 (or (V, J + 1)
    with a fixed root bone first when ``root``). Segment j's centre is ``segment * (j + 0.5)``;
    a hat spans ``blend * segment`` each side."""
    centres = segment * (np.arange(joints) + 0.5)
    if root:
        centres = np.concatenate([[-0.5 * segment], centres])
    h = np.clip(height, centres[0], centres[-1])
    w = np.clip(1 - np.abs(h[:, None] - centres[None]) / (blend * segment), 0, 1)
    return w / w.sum(axis=1, keepdims=True)


def rotation_to(direction: np.ndarray) -> np.ndarray:
    """(3,) unit vector d -> (3, 3) rotation taking +y to d (Rodrigues' formula)."""
    y = np.array([0.0, 1.0, 0.0])
    d = direction / np.linalg.norm(direction)
    v, c = np.cross(y, d), float(y @ d)
    if c < -1 + 1e-9:
        return np.diag([1.0, -1.0, -1.0])
    k = np.array([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])
    return np.eye(3) + k + k @ k / (1 + c)
