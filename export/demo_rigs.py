"""Built-in demo rigs of "Tamsin", a round-faced lighthouse keeper of our own invention.

Three rigs, all procedural and deterministic (seeded numpy, no files):

- ``tamsin_face()``: a face of ~3,700 vertices with 46 controls: linear blendshapes, corrective
  combination shapes driven by products of 2 and 3 weights (the "combination shapes" of the
  blendshape literature, e.g. Lewis et al., "Practice and Theory of Blendshape Facial Models",
  Eurographics 2014 STAR), and a jaw joint with linear blend skinning, so the rig is non-linear.
- ``tamsin_face_linear()``: the same linear shapes, no correctives, and the jaw as a linear shape
  (its displacement at full opening, per degree). Affine in the controls.
- ``tamsin_lantern_arm()``: no blendshapes at all; a six-joint tentacle arm holding a lantern,
  linear blend skinning, two bounded angles per joint.

Axes: +y up, +z out of the face, +x the character's left. ``_l`` controls act on +x.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from rigcast.export.gltf_eval import euler_xyz_matrices, skin_points
from rigcast.export.rig import Rig, evaluate_in_chunks
from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)

_CHUNK = 1024  # poses per evaluation chunk; bounds the intermediate arrays to ~50 MB


@dataclass(frozen=True)
class Term:
    """A smooth localised displacement: an anisotropic Gaussian falloff times a vector.

    ``center`` is (x, y) on the front of the unit sphere, or a full 3-vector direction;
    ``sigma`` the falloff widths in x, y, z; ``vec`` a world displacement; ``normal`` a
    displacement along the surface normal.
    """

    center: tuple[float, ...]
    sigma: tuple[float, float, float]
    vec: tuple[float, float, float] = (0.0, 0.0, 0.0)
    normal: float = 0.0

    def mirrored(self) -> Term:
        c = (-self.center[0], *self.center[1:])
        return Term(c, self.sigma, (-self.vec[0], self.vec[1], self.vec[2]), self.normal)


def _s(sx: float, sy: float) -> tuple[float, float, float]:
    return (sx, sy, 0.25)


# name (left or centre), group, (min, max), terms. "_l" names are mirrored into "_r".
_SHAPES: list[tuple[str, str, tuple[float, float], list[Term]]] = [
    ("brow_arch_l", "brow", (0, 1), [Term((0.3, 0.34), _s(0.16, 0.08), (0, 0.06, 0.01))]),
    ("brow_knit_l", "brow", (0, 1), [Term((0.12, 0.3), _s(0.09, 0.07), (-0.035, -0.02, 0.015))]),
    ("brow_outer_lift_l", "brow", (0, 1), [Term((0.46, 0.3), _s(0.1, 0.08), (0, 0.055, 0))]),
    ("brow_sink_l", "brow", (0, 1), [Term((0.28, 0.32), _s(0.16, 0.08), (0, -0.045, 0.01))]),
    ("lid_shut_l", "lid", (0, 1), [Term((0.3, 0.19), _s(0.11, 0.05), (0, -0.06, 0.015))]),
    ("lid_widen_l", "lid", (0, 1), [Term((0.3, 0.21), _s(0.11, 0.05), (0, 0.035, 0.005))]),
    ("lid_squint_l", "lid", (0, 1), [Term((0.3, 0.09), _s(0.12, 0.045), (0, 0.03, 0.01))]),
    ("cheek_swell_l", "cheek", (0, 1), [Term((0.42, -0.25), _s(0.14, 0.14), normal=0.07)]),
    ("cheek_lift_l", "cheek", (0, 1), [Term((0.38, -0.1), _s(0.14, 0.1), (0, 0.045, 0.02))]),
    ("cheek_hollow_l", "cheek", (0, 1), [Term((0.44, -0.3), _s(0.1, 0.12), normal=-0.04)]),
    ("nostril_widen_l", "nose", (0, 1), [Term((0.07, -0.14), _s(0.05, 0.05), (0.025, 0, 0))]),
    ("nose_wrinkle_l", "nose", (0, 1), [Term((0.07, -0.02), _s(0.06, 0.07), (0, 0.025, 0.01))]),
    (
        "lip_corner_lift_l",
        "lip",
        (0, 1),
        [Term((0.24, -0.42), _s(0.07, 0.06), (0.015, 0.05, -0.005))],
    ),
    ("lip_corner_sink_l", "lip", (0, 1), [Term((0.24, -0.44), _s(0.07, 0.06), (0, -0.045, 0))]),
    ("lip_stretch_l", "lip", (0, 1), [Term((0.24, -0.43), _s(0.09, 0.06), (0.05, -0.005, -0.01))]),
    ("upper_lip_raise_l", "lip", (0, 1), [Term((0.1, -0.37), _s(0.08, 0.04), (0, 0.035, 0.01))]),
    ("lower_lip_drop_l", "lip", (0, 1), [Term((0.1, -0.48), _s(0.08, 0.04), (0, -0.035, 0.005))]),
    (
        "ear_wiggle_l",
        "ear",
        (0, 1),
        [Term((1.0, 0.05, -0.1), (0.12, 0.15, 0.15), (0, 0.03, -0.03))],
    ),
    ("lip_press", "lip", (0, 1), [Term((0, -0.42), _s(0.2, 0.035), (0, 0, -0.02))]),
    (
        "lip_pucker",
        "lip",
        (0, 1),
        [
            Term((0.0, -0.42), _s(0.1, 0.07), (0, 0, 0.05)),
            Term((0.14, -0.42), _s(0.07, 0.07), (-0.03, 0, 0.01)),
            Term((-0.14, -0.42), _s(0.07, 0.07), (0.03, 0, 0.01)),
        ],
    ),
    (
        "lip_funnel",
        "lip",
        (0, 1),
        [
            Term((0, -0.42), _s(0.14, 0.08), (0, 0, 0.04)),
            Term((0, -0.38), _s(0.12, 0.03), (0, 0.015, 0)),
            Term((0, -0.47), _s(0.12, 0.03), (0, -0.015, 0)),
        ],
    ),
    ("lip_roll_upper", "lip", (0, 1), [Term((0, -0.39), _s(0.16, 0.03), (0, -0.01, -0.025))]),
    ("lip_roll_lower", "lip", (0, 1), [Term((0, -0.46), _s(0.16, 0.03), (0, 0.01, -0.025))]),
    ("mouth_shift", "lip", (-1, 1), [Term((0, -0.43), _s(0.22, 0.08), (0.05, 0, 0))]),
    ("chin_raise", "jaw", (0, 1), [Term((0, -0.62), _s(0.12, 0.08), (0, 0.03, 0.015))]),
    ("jaw_slide", "jaw", (-1, 1), [Term((0, -0.72), _s(0.35, 0.2), (0.05, 0, 0))]),
    ("jaw_thrust", "jaw", (0, 1), [Term((0, -0.72), _s(0.35, 0.2), (0, 0, 0.05))]),
]

JAW = "jaw_drop"
JAW_RANGE_DEG = (0.0, 30.0)
_JAW_PIVOT = np.array([0.0, -0.2, -0.15])

#: Correctives are authored at this gain: big enough that the face is clearly non-linear (a rig
#: linearised at rest misses them), as correctives on a production face often are.
_COMBO_GAIN = 3.0

# Corrective combination shapes: (driver names, terms). Weights are normalised to [0, 1] by their
# bounds before multiplying (the jaw angle by its range). "_l" combos are mirrored into "_r".
_COMBOS: list[tuple[tuple[str, ...], list[Term]]] = [
    (("lip_corner_lift_l", "cheek_lift_l"), [Term((0.34, -0.05), _s(0.1, 0.06), (0, 0.02, 0.02))]),
    (("lid_shut_l", "lid_squint_l"), [Term((0.3, 0.14), _s(0.1, 0.04), (0, 0, -0.015))]),
    (("brow_arch_l", "brow_knit_l"), [Term((0.12, 0.42), _s(0.1, 0.06), (0, -0.01, 0.02))]),
    (("jaw_drop", "lip_stretch_l"), [Term((0.24, -0.48), _s(0.08, 0.06), (0, -0.02, -0.02))]),
    (
        ("nose_wrinkle_l", "upper_lip_raise_l"),
        [Term((0.08, -0.3), _s(0.06, 0.05), (0, 0.015, 0.01))],
    ),
    (("lip_pucker", "lip_funnel"), [Term((0, -0.42), _s(0.12, 0.06), (0, 0, -0.03))]),
    (("jaw_drop", "lip_pucker"), [Term((0, -0.45), _s(0.12, 0.06), (0, 0, 0.03))]),
    (
        ("lip_corner_lift_l", "cheek_lift_l", "lid_squint_l"),
        [Term((0.32, 0.02), _s(0.1, 0.05), (0, 0.015, 0.01))],
    ),
    (("jaw_drop", "lip_funnel", "lip_pucker"), [Term((0, -0.42), _s(0.1, 0.06), (0, -0.01, 0.02))]),
]


def _mirror_name(name: str) -> str:
    return name[:-2] + "_r" if name.endswith("_l") else name


def _expanded_shapes() -> list[tuple[str, str, tuple[float, float], list[Term]]]:
    out = []
    for name, group, rng, terms in _SHAPES:
        out.append((name, group, rng, terms))
        if name.endswith("_l"):
            out.append((_mirror_name(name), group, rng, [t.mirrored() for t in terms]))
    return out


def _expanded_combos() -> list[tuple[tuple[str, ...], list[Term]]]:
    out = []
    for names, terms in _COMBOS:
        out.append((names, terms))
        if any(n.endswith("_l") for n in names):
            out.append((tuple(_mirror_name(n) for n in names), [t.mirrored() for t in terms]))
    return out


def _face_schema() -> ControlSchema:
    controls = []
    for name, group, (lo, hi), _ in _expanded_shapes():
        pair = ""
        if name.endswith("_l"):
            pair = name[:-2] + "_r"
        elif name.endswith("_r"):
            pair = name[:-2] + "_l"
        controls.append(Control(name, float(lo), float(hi), 0.0, group, pair))
    controls.append(Control(JAW, JAW_RANGE_DEG[0], JAW_RANGE_DEG[1], 0.0, "jaw", ""))
    return ControlSchema(tuple(controls))


def _uv_sphere(n_lat: int, n_lon: int) -> tuple[np.ndarray, np.ndarray]:
    """Unit sphere directions (2 + n_lat * n_lon, 3), poles first and last, and faces (F, 3)."""
    theta = np.linspace(0, np.pi, n_lat + 2)[1:-1]
    phi = np.linspace(0, 2 * np.pi, n_lon, endpoint=False)
    th, ph = np.meshgrid(theta, phi, indexing="ij")
    ring = np.stack([np.sin(th) * np.sin(ph), np.cos(th), np.sin(th) * np.cos(ph)], -1)
    dirs = np.concatenate([[[0.0, 1.0, 0.0]], ring.reshape(-1, 3), [[0.0, -1.0, 0.0]]])
    faces = []
    idx = 1 + np.arange(n_lat * n_lon).reshape(n_lat, n_lon)
    nxt = np.roll(idx, -1, axis=1)
    faces.append(np.stack([np.zeros(n_lon, int), nxt[0], idx[0]], -1))
    a, b, c, d = idx[:-1], nxt[:-1], nxt[1:], idx[1:]
    faces.append(np.stack([a, b, c], -1).reshape(-1, 3))
    faces.append(np.stack([a, c, d], -1).reshape(-1, 3))
    last = len(dirs) - 1
    faces.append(np.stack([np.full(n_lon, last), idx[-1], nxt[-1]], -1))
    return dirs, np.concatenate(faces).astype(np.int32)


def _center_dir(center: tuple[float, ...]) -> np.ndarray:
    if len(center) == 3:
        c = np.array(center, dtype=np.float64)
    else:
        x, y = center
        c = np.array([x, y, np.sqrt(max(1.0 - x * x - y * y, 0.0))])
    return c / np.linalg.norm(c)


def _falloff(dirs: np.ndarray, center: tuple[float, ...], sigma: tuple[float, ...]) -> np.ndarray:
    """dirs: (V, 3) unit directions -> (V,) Gaussian falloff around ``center``."""
    d = (dirs - _center_dir(center)) / np.asarray(sigma)
    return np.exp(-0.5 * np.sum(d * d, axis=1))


def _field(dirs: np.ndarray, normals: np.ndarray, terms: list[Term]) -> np.ndarray:
    """(V, 3) displacement field: sum of the terms' falloff * (vec + normal * n)."""
    out = np.zeros_like(dirs)
    for t in terms:
        f = _falloff(dirs, t.center, t.sigma)[:, None]
        out += f * (np.asarray(t.vec) + t.normal * normals)
    return out


def _vertex_normals(verts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    fn = np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]])
    n = np.zeros_like(verts)
    for k in range(3):
        np.add.at(n, faces[:, k], fn)
    return n / np.linalg.norm(n, axis=1, keepdims=True)


def _head(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tamsin's round head: (dirs (V, 3), neutral (V, 3), faces (F, 3))."""
    dirs, faces = _uv_sphere(58, 64)
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
        radius += height * _falloff(dirs, center, sigma)
    rng = np.random.default_rng(seed)
    for _ in range(12):  # low-frequency individuality; tiny, deterministic
        c = rng.normal(size=3)
        radius += rng.normal(0.0, 0.006) * _falloff(dirs, tuple(c / np.linalg.norm(c)), (0.5,) * 3)
    neutral = dirs * radius[:, None] * np.array([0.95, 1.1, 0.92])
    return dirs, neutral, faces


def _jaw_weights(neutral: np.ndarray) -> np.ndarray:
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
    rel_y = points[..., 1] - _JAW_PIVOT[1]
    rel_z = points[..., 2] - _JAW_PIVOT[2]
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
    rest_y, rest_z = neutral[:, 1] - _JAW_PIVOT[1], neutral[:, 2] - _JAW_PIVOT[2]
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
        self.schema = _face_schema()
        dirs, neutral, faces = _head(seed)
        self.neutral = neutral.astype(np.float32)
        self.faces = faces
        normals = _vertex_normals(neutral, faces)
        v = len(neutral)
        names = self.schema.names
        deltas = np.zeros((len(names), v, 3))
        for name, _, _, terms in _expanded_shapes():
            deltas[names.index(name)] = _field(dirs, normals, terms)
        self.jaw_index = names.index(JAW)
        self.jaw_weights = _jaw_weights(neutral).astype(np.float32)
        self.combos: list[tuple[int, ...]] = []
        combo_deltas = []
        if linear:
            # Jaw as a linear shape: the skinned displacement at full opening, per degree.
            full = np.radians(np.array([JAW_RANGE_DEG[1]]))
            opened = _rotate_jaw(neutral[None], full, _jaw_weights(neutral))[0]
            deltas[self.jaw_index] = (opened - neutral) / JAW_RANGE_DEG[1]
        else:
            for combo_names, terms in _expanded_combos():
                self.combos.append(tuple(names.index(n) for n in combo_names))
                combo_deltas.append(_COMBO_GAIN * _field(dirs, normals, terms))
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
            self._matrix = _fold_jaw(shapes, neutral, _jaw_weights(neutral)).astype(np.float32)

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
            jaw[:3, 3] = _JAW_PIVOT - rot @ _JAW_PIVOT
            hom = np.concatenate([p, np.ones((v, 1))], axis=1)
            wj = self.jaw_weights.astype(np.float64)[:, None]
            out[b] = (1 - wj) * p + wj * (hom @ jaw.T)[:, :3]
        return out


def _rebuild_face(linear: bool, seed: int) -> TamsinHead:
    return TamsinHead(linear=linear, seed=seed)


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
    dirs, sphere_faces = _uv_sphere(14, 20)
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


def tamsin_face() -> TamsinHead:
    """The non-linear demo face: 46 controls, 15 corrective combos, a skinned jaw."""
    return TamsinHead(linear=False)


def tamsin_face_linear() -> TamsinHead:
    """The affine demo face: same schema and shapes, no correctives, jaw as a linear shape."""
    return TamsinHead(linear=True)


def tamsin_lantern_arm() -> TamsinLanternArm:
    """The skinning-only demo rig: a six-joint tentacle arm with a lantern, 12 controls."""
    return TamsinLanternArm()


DEMO_RIGS: dict[str, Callable[[], Rig]] = {
    "face": tamsin_face,
    "face-linear": tamsin_face_linear,
    "arm": tamsin_lantern_arm,
}
