"""The demo face (Tamsin): blendshapes, corrective combination shapes and a jaw skinned with linear
blend skinning (``tamsin_face()``), or its affine variant (``tamsin_face_linear()``).

The head is a deformed UV sphere (``demo_mesh``); the shapes come from ``demo_face_shapes``.
Evaluation is one matrix product: the jaw's skinning of the morphed mesh is folded into the
shape matrix (``fold_jaw``); ``TamsinHead.evaluate_naive`` is its loop twin.
"""

from __future__ import annotations

import logging
from collections.abc import Callable

import numpy as np
from rigcast.export.rigs.demo_face_shapes import (
    COMBO_GAIN,
    JAW,
    JAW_RANGE_DEG,
    expanded_combos,
    expanded_shapes,
    face_schema,
)
from rigcast.export.rigs.demo_mesh import falloff, shape_field, uv_sphere, vertex_normals
from rigcast.export.rigs.rig import Rig, evaluate_in_chunks

log = logging.getLogger(__name__)

_CHUNK = 1024  # poses per evaluation chunk; bounds the intermediate arrays to ~50 MB
JAW_PIVOT = np.array([0.0, -0.2, -0.15])


def _head(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tamsin's round head: (dirs (V, 3), neutral (V, 3), faces (F, 3))."""
    dirs, faces = uv_sphere(58, 64)
    radius = np.ones(len(dirs))
    features = [  # (center, sigma, height): nose, brow ridge, eye sockets, cheeks, chin, lips, ears
        ((0.0, -0.08), (0.06, 0.1, 0.25), 0.16),
        ((0.0, -0.17), (0.1, 0.04, 0.25), 0.05),
        ((0.0, 0.29), (0.35, 0.05, 0.25), 0.035),
        ((0.31, 0.16), (0.09, 0.06, 0.25), -0.05),
        ((-0.31, 0.16), (0.09, 0.06, 0.25), -0.05),
        ((0.44, -0.22), (0.16, 0.16, 0.25), 0.06),
        ((-0.44, -0.22), (0.16, 0.16, 0.25), 0.06),
        ((0.0, -0.76), (0.14, 0.08, 0.25), 0.04),
        ((0.0, -0.395), (0.16, 0.022, 0.25), 0.025),
        ((0.0, -0.455), (0.15, 0.025, 0.25), 0.025),
        ((0.0, -0.425), (0.2, 0.012, 0.25), -0.02),
        ((1.0, 0.05, -0.1), (0.1, 0.14, 0.12), 0.12),
        ((-1.0, 0.05, -0.1), (0.1, 0.14, 0.12), 0.12),
    ]
    for center, sigma, height in features:
        radius += height * falloff(dirs, center, sigma)
    rng = np.random.default_rng(seed)
    for _ in range(12):  # low-frequency individuality; tiny, deterministic
        c = rng.normal(size=3)
        radius += rng.normal(0.0, 0.006) * falloff(dirs, tuple(c / np.linalg.norm(c)), (0.5,) * 3)
    neutral = dirs * radius[:, None] * np.array([0.95, 1.1, 0.92])
    return dirs, neutral, faces


def jaw_weights(neutral: np.ndarray) -> np.ndarray:
    """(V,) smooth jaw skin weight: the front of the face below the mouth line.

    Weights under 1e-6 are set to exactly 0 so evaluation can skip those vertices.
    """
    x, y, z = neutral[:, 0], neutral[:, 1], neutral[:, 2]
    # sharp at the lips, widening past the mouth corners so the cheeks stretch, not split
    width = 0.03 + 0.25 * np.clip(np.abs(x) - 0.22, 0.0, None)
    w = (1 / (1 + np.exp((y + 0.43) / width))) * (1 / (1 + np.exp(-(z + 0.05) / 0.1)))
    return np.where(w < 1e-6, 0.0, w)


def _rotate_jaw(points: np.ndarray, angle_rad: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Two-bone LBS (head fixed, jaw rotating about +x through the pivot c).

    points: (B, V, 3); angle_rad: (B,); weights: (V,) jaw weight.
    returns: (B, V, 3) = (1 - w) p + w (R (p - c) + c) = p + w (R - I)(p - c).
    """
    rel_y = points[..., 1] - JAW_PIVOT[1]
    rel_z = points[..., 2] - JAW_PIVOT[2]
    c = np.cos(angle_rad)[:, None] - 1.0
    s = np.sin(angle_rad)[:, None]
    out = points.copy()
    out[..., 1] += weights * (rel_y * c - rel_z * s)
    out[..., 2] += weights * (rel_y * s + rel_z * c)
    return out


def _fold_jaw(shapes: np.ndarray, neutral: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Fold shapes followed by the jaw LBS into one matrix, so evaluation is one matmul.

    With morphed p = n + sum_g a_g D_g, the jaw adds (y, z components only)
      dy = w ((cos-1) (p_y - c_y) - sin (p_z - c_z)),
      dz = w (sin (p_y - c_y) + (cos-1) (p_z - c_z)),
    which is linear in the features [a, (cos-1) a, sin a, cos-1, sin].
    shapes: (G, V, 3); neutral: (V, 3); weights: (V,). returns: (3G + 2, V * 3).
    """
    g, v = shapes.shape[:2]
    w = weights[None]
    rest_y, rest_z = neutral[:, 1] - JAW_PIVOT[1], neutral[:, 2] - JAW_PIVOT[2]
    m = np.zeros((3 * g + 2, v, 3))
    m[:g] = shapes
    m[g : 2 * g, :, 1] = w * shapes[..., 1]
    m[g : 2 * g, :, 2] = w * shapes[..., 2]
    m[2 * g : 3 * g, :, 1] = -w * shapes[..., 2]
    m[2 * g : 3 * g, :, 2] = w * shapes[..., 1]
    m[3 * g, :, 1], m[3 * g, :, 2] = weights * rest_y, weights * rest_z
    m[3 * g + 1, :, 1], m[3 * g + 1, :, 2] = -weights * rest_z, weights * rest_y
    return m.reshape(3 * g + 2, v * 3)


class TamsinHead(Rig):
    """Blendshapes + corrective combination shapes + a skinned jaw (``linear=False``),
    or the affine variant (``linear=True``). Build it with ``tamsin_face()``."""

    def __init__(self, *, linear: bool = False, seed: int = 7) -> None:
        self._args = (linear, seed)
        self.linear = linear
        self.name = "tamsin-face-linear" if linear else "tamsin-face"
        self.schema = face_schema()
        dirs, neutral, faces = _head(seed)
        self.neutral = neutral.astype(np.float32)
        self.faces = faces
        normals = vertex_normals(neutral, faces)
        v = len(neutral)
        names = self.schema.names
        deltas = np.zeros((len(names), v, 3))
        for name, _, _, terms in expanded_shapes():
            deltas[names.index(name)] = shape_field(dirs, normals, terms)
        self.jaw_index = names.index(JAW)
        self.jaw_weights = jaw_weights(neutral).astype(np.float32)
        self.combos: list[tuple[int, ...]] = []
        combo_deltas = []
        if linear:
            # Jaw as a linear shape: the skinned displacement at full opening, per degree.
            full = np.radians(np.array([JAW_RANGE_DEG[1]]))
            opened = _rotate_jaw(neutral[None], full, jaw_weights(neutral))[0]
            deltas[self.jaw_index] = (opened - neutral) / JAW_RANGE_DEG[1]
        else:
            for combo_names, terms in expanded_combos():
                self.combos.append(tuple(names.index(n) for n in combo_names))
                combo_deltas.append(COMBO_GAIN * shape_field(dirs, normals, terms))
        self.deltas = deltas.reshape(len(names), v * 3).astype(np.float32)
        self.combo_deltas = np.array(combo_deltas, dtype=np.float32).reshape(
            len(self.combos), v * 3
        )
        self.combo_names = [tuple(names[i] for i in c) for c in self.combos]
        if linear:
            self._matrix = self.deltas
        else:
            shapes = np.concatenate([deltas, np.array(combo_deltas).reshape(-1, v, 3)])
            shapes[self.jaw_index] = 0.0  # the jaw acts through skinning only
            self._matrix = _fold_jaw(shapes, neutral, jaw_weights(neutral)).astype(np.float32)

    def __reduce__(self) -> tuple[Callable[..., TamsinHead], tuple[bool, int]]:
        # Rebuild from two arguments instead of shipping ~3 MB of arrays to every worker.
        return (_rebuild_face, self._args)

    def normalised(self, controls: np.ndarray) -> np.ndarray:
        """(B, C) controls -> (B, C) in [0, 1] (or [-1, 1] for bipolar) as used by correctives."""
        out = controls.copy()
        out[:, self.jaw_index] = (controls[:, self.jaw_index] - JAW_RANGE_DEG[0]) / (
            JAW_RANGE_DEG[1] - JAW_RANGE_DEG[0]
        )
        return out

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        return evaluate_in_chunks(self._evaluate_chunk, controls, self.vertex_count, _CHUNK)

    def _evaluate_chunk(self, controls: np.ndarray) -> np.ndarray:
        if self.linear:
            feats = controls.astype(np.float32)
        else:
            wn = self.normalised(controls)
            # products[b, k] = prod over the k-th combo's drivers of wn[b, driver]
            products = np.stack([np.prod(wn[:, list(i)], axis=1) for i in self.combos], axis=1)
            g = np.concatenate([wn, products], axis=1)
            angle = np.radians(controls[:, self.jaw_index])[:, None]
            cm1, sin = np.cos(angle) - 1.0, np.sin(angle)
            feats = np.concatenate([g, cm1 * g, sin * g, cm1, sin], axis=1).astype(np.float32)
        flat = feats @ self._matrix
        flat += self.neutral.reshape(1, -1)
        return flat.reshape(len(controls), -1, 3)

    def evaluate_naive(self, controls: np.ndarray) -> np.ndarray:
        """Loop twin of ``_evaluate`` in float64: shape by shape, combo by combo, then the jaw as
        a two-joint LBS with explicit 4x4 matrices. controls: (B, C) -> (B, V, 3)."""
        v = self.vertex_count
        deltas = self.deltas.reshape(-1, v, 3).astype(np.float64)
        cdeltas = self.combo_deltas.reshape(-1, v, 3).astype(np.float64)
        out = np.zeros((len(controls), v, 3))
        for b, row in enumerate(np.asarray(controls, dtype=np.float64)):
            p = self.neutral.astype(np.float64).copy()
            if self.linear:
                for i in range(len(row)):
                    p += row[i] * deltas[i]
                out[b] = p
                continue
            wn = self.normalised(row[None])[0]
            for i in range(len(row)):
                if i != self.jaw_index:
                    p += wn[i] * deltas[i]
            for k, idx in enumerate(self.combos):
                p += np.prod([wn[i] for i in idx]) * cdeltas[k]
            a = np.radians(row[self.jaw_index])
            rot = np.array([[1, 0, 0], [0, np.cos(a), -np.sin(a)], [0, np.sin(a), np.cos(a)]])
            jaw = np.eye(4)
            jaw[:3, :3] = rot
            jaw[:3, 3] = JAW_PIVOT - rot @ JAW_PIVOT
            hom = np.concatenate([p, np.ones((v, 1))], axis=1)
            wj = self.jaw_weights.astype(np.float64)[:, None]
            out[b] = (1 - wj) * p + wj * (hom @ jaw.T)[:, :3]
        return out


def _rebuild_face(linear: bool, seed: int) -> TamsinHead:
    return TamsinHead(linear=linear, seed=seed)



def tamsin_face() -> TamsinHead:
    """The non-linear demo face: 46 controls, 15 corrective combos, a skinned jaw."""
    return TamsinHead(linear=False)


def tamsin_face_linear() -> TamsinHead:
    """The affine demo face: same schema and shapes, no correctives, jaw as a linear shape."""
    return TamsinHead(linear=True)

