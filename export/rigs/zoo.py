"""A seeded zoo of diverse rigs for measuring solvers on rigs no one tuned them to.

``make_zoo_rig(seed)`` draws a kind and its parameters from the seed, then builds the rig; the
same seed always gives the same rig (neutral, schema and evaluation). Kinds (``KINDS``):

- ``blendshapes``: linear blendshapes on a head-like sphere or a curved sheet (affine rig);
- ``correctives``: the same plus corrective shapes driven by products of 2 to 4 normalised
  weights with varied gains (the combination shapes of the blendshape literature, Lewis et al.,
  "Practice and Theory of Blendshape Facial Models", Eurographics 2014 STAR);
- ``chain``: 1 to 4 tapered tubes, each a joint chain with 1 to 3 Euler angles per joint and
  linear blend skinning (hat weights), optionally on a fixed hub;
- ``jaw_face``: a head with blendshapes, correctives and a jaw skinned by two-bone LBS, shapes
  applied before the jaw.

Each blendshape rig mixes small local shapes (a few % of the vertices, like eyelids or nostrils)
with large ones. A rig with a rigid region (``rig.rigid_region``; vertices ``rig.rigid_mask``)
leaves it exactly unmoved under every control: the back of a head, the border of a sheet, a
chain's hub. A rig without one has whole-mesh shapes (or a chain with no fixed bone), so every
vertex moves. Sizes: 1,000 to ``max_vertices`` (20,000) vertices, most of them 1,000 to 5,000;
10 to ``max_controls`` (150) controls, most of them 10 to 60. Geometry is in export/rigs/zoo_mesh.py.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from rigcast.export.rigs import zoo_mesh as zm
from rigcast.export.rigs.gltf_eval import skin_points
from rigcast.export.rigs.rig import Rig, RigError, evaluate_in_chunks
from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)

KINDS = ("blendshapes", "correctives", "chain", "jaw_face")
MIN_VERTICES, MAX_VERTICES = 1000, 20000
MIN_CONTROLS, MAX_CONTROLS = 10, 150
_CHUNK = 128  # poses per evaluation chunk: (128, 20000, 3) float64 is 61 MB


@dataclass(frozen=True)
class ZooSpec:
    """What a zoo rig is: drawn from ``seed`` (and the size caps), then measured on the build.

    ``surface``: "sphere", "sheet" or "tubes"; ``local_shapes`` / ``large_shapes`` /
    ``global_shapes``: blendshape counts by extent; ``corrective_orders``: the number of
    correctives of order 2, 3 and 4; ``chains`` / ``joints`` / ``axes``: chain layout (joints in
    all, Euler angles per joint); ``jaw_controls``: 0, 1 (open) or 2 (open, side).
    """

    seed: int
    kind: str
    surface: str
    vertices: int
    controls: int
    rigid_region: bool
    local_shapes: int = 0
    large_shapes: int = 0
    global_shapes: int = 0
    corrective_orders: tuple[int, int, int] = (0, 0, 0)
    chains: int = 0
    joints: int = 0
    axes: int = 0
    jaw_controls: int = 0


def _log_uniform(rng: np.random.Generator, lo: float, hi: float) -> float:
    return float(np.exp(rng.uniform(np.log(lo), np.log(hi))))


def draw_sizes(rng: np.random.Generator, max_vertices: int, max_controls: int) -> tuple[int, int]:
    """(target vertices, target controls): 75 % of rigs 1k-5k vertices, the rest 5k-20k; 70 % of
    rigs 10-60 controls, the rest 60-150; both capped."""
    v = _log_uniform(rng, 1000, 5000) if rng.random() < 0.75 else _log_uniform(rng, 5000, 20000)
    c = _log_uniform(rng, 10, 60) if rng.random() < 0.7 else _log_uniform(rng, 60, 150)
    return min(round(v), max_vertices), min(round(c), max_controls)


def _check_caps(seed: int, max_vertices: int, max_controls: int) -> None:
    if not isinstance(seed, int | np.integer) or seed < 0:
        raise RigError(f"zoo seed must be a non-negative integer, got {seed!r}")
    if not MIN_VERTICES + 100 <= max_vertices <= MAX_VERTICES:
        raise RigError(f"zoo max_vertices must be in [{MIN_VERTICES + 100}, {MAX_VERTICES}], "
                       f"got {max_vertices}")
    if not MIN_CONTROLS <= max_controls <= MAX_CONTROLS:
        raise RigError(f"zoo max_controls must be in [{MIN_CONTROLS}, {MAX_CONTROLS}], "
                       f"got {max_controls}")


def _range(rng: np.random.Generator) -> tuple[float, float]:
    """A blendshape control's bounds: mostly [0, 1], some bipolar, a few in other units."""
    u = rng.random()
    if u < 0.8:
        return 0.0, 1.0
    if u < 0.95:
        return -1.0, 1.0
    return 0.0, float(rng.choice([2.0, 5.0, 10.0]))


class ZooRig(Rig):
    """A rig drawn from a seed; see the module docstring. Build it with ``make_zoo_rig``."""

    def __init__(self, seed: int, *, max_vertices: int = MAX_VERTICES,
                 max_controls: int = MAX_CONTROLS) -> None:
        _check_caps(seed, max_vertices, max_controls)
        self._args = (int(seed), int(max_vertices), int(max_controls))
        rng = np.random.default_rng([int(seed), 0x200])
        kind = KINDS[int(rng.integers(len(KINDS)))]
        rigid = bool(rng.random() < 0.5)
        target_v, target_c = draw_sizes(rng, max_vertices, max_controls)
        self.name = f"zoo-{seed}"
        self._combos: list[tuple[int, ...]] = []
        self._matrix = np.zeros((0, 0), np.float32)
        self._jaw: tuple[int, int, np.ndarray, np.ndarray] | None = None
        self._chains: list[_Chain] = []
        if kind == "chain":
            spec = self._build_chains(rng, seed, rigid, target_v, target_c, max_vertices,
                                      max_controls)
        else:
            spec = self._build_shapes(rng, seed, kind, rigid, target_v, target_c, max_vertices)
        self.spec = spec
        self.rigid_region = rigid
        self.linear = kind == "blendshapes"
        lo, hi, d = (self.schema.lower.astype(np.float64), self.schema.upper.astype(np.float64),
                     self.schema.defaults.astype(np.float64))
        self._defaults = d
        self._room = np.maximum(hi - d, d - lo)
        log.info("zoo rig %d: %s", seed, spec)

    def __reduce__(self) -> tuple[Callable[..., ZooRig], tuple[int, int, int]]:
        return (_rebuild, self._args)

    # --- blendshape kinds -------------------------------------------------------------------

    def _build_shapes(self, rng: np.random.Generator, seed: int, kind: str, rigid: bool,
                      target_v: int, target_c: int, max_v: int) -> ZooSpec:
        surface = "sphere" if kind == "jaw_face" or rng.random() < 0.6 else "sheet"
        make = zm.head_surface if surface == "sphere" else zm.sheet_surface
        verts, faces = make(target_v, MIN_VERTICES, max_v, rng)
        self.neutral = verts.astype(np.float32)
        self.faces = faces
        p = self.neutral.astype(np.float64)
        nrm = zm.normals(p, faces)
        extent = float(np.linalg.norm(np.ptp(p, axis=0))) / 3.5
        # the rigid region: the back of a head, or one side of a sheet
        coord = p[:, 2] if surface == "sphere" else p[:, 0] * rng.choice([-1.0, 1.0])
        edge = float(np.quantile(coord, rng.uniform(0.2, 0.45))) if rigid else -np.inf
        mask = zm.region_mask(coord, edge, 0.3 * extent) if rigid else np.ones(len(p))
        self.rigid_mask = mask == 0.0
        jaw_n = int(rng.integers(1, 3)) if kind == "jaw_face" else 0
        n_shapes = max(target_c - jaw_n, MIN_CONTROLS - jaw_n)
        n_global = 0 if rigid else int(rng.integers(1, 3))
        p_local = rng.uniform(0.2, 0.6)
        movable = np.flatnonzero(mask > 0.5)
        controls, fields, centres = [], [], []
        n_local = 0
        for i in range(n_shapes):
            lo, hi = _range(rng)
            if i < n_global:
                field, centre, group = zm.global_field(p, rng), p.mean(axis=0), "global"
            else:
                local = bool(rng.random() < p_local)
                n_local += local
                centre = p[int(rng.choice(movable))]
                field = zm.shape_field(p, nrm, local, extent, rng, centre)
                group = "local" if local else "large"
            controls.append(Control(f"shape_{i:03d}", lo, hi, 0.0, group, ""))
            fields.append(field * mask[:, None])
            centres.append(centre)
        if jaw_n:
            limit = float(rng.uniform(20.0, 35.0))
            controls.append(Control("jaw_open", 0.0, limit, 0.0, "jaw", ""))
            if jaw_n == 2:
                side = float(rng.uniform(4.0, 10.0))
                controls.append(Control("jaw_side", -side, side, 0.0, "jaw", ""))
            mouth = float(np.quantile(p[:, 1], rng.uniform(0.25, 0.35)))
            weights = zm.jaw_weights(p, mouth, rng.uniform(0.03, 0.08)) * mask
            pivot = np.array([0.0, mouth + 0.2, -0.15])
            side_i = n_shapes + 1 if jaw_n == 2 else -1
            self._jaw = (n_shapes, side_i, pivot, weights)
            centres.append(np.array([0.0, mouth - 0.3, 0.6]))
        orders = [0, 0, 0]
        if kind != "blendshapes":
            cands = np.array(centres)
            for _ in range(round(n_shapes * rng.uniform(0.15, 0.5))):
                order = int(rng.choice([2, 3, 4], p=[0.5, 0.3, 0.2]))
                first = int(rng.integers(len(cands)))
                near = np.argsort(np.linalg.norm(cands - cands[first], axis=1), kind="stable")
                drivers = (first, *[int(j) for j in near if j != first][: order - 1])
                gain = _log_uniform(rng, 0.5, 4.0)
                centre = cands[list(drivers)].mean(axis=0)
                field = gain * zm.shape_field(p, nrm, True, extent, rng, centre)
                self._combos.append(drivers)
                fields.append(field * mask[:, None])
                orders[order - 2] += 1
        self.schema = ControlSchema(tuple(controls))
        if self._jaw is not None:
            # the jaw acts through skinning only; correctives it drives are rows of the matrix
            self._shape_count = n_shapes
        else:
            self._shape_count = len(controls)
        self._matrix = np.array(fields, np.float32).reshape(len(fields), -1)
        return ZooSpec(seed=seed, kind=kind, surface=surface, vertices=len(p),
                       controls=len(controls), rigid_region=rigid, local_shapes=n_local,
                       large_shapes=n_shapes - n_local - n_global, global_shapes=n_global,
                       corrective_orders=(orders[0], orders[1], orders[2]), jaw_controls=jaw_n)

    # --- chains -----------------------------------------------------------------------------

    def _build_chains(self, rng: np.random.Generator, seed: int, rigid: bool, target_v: int,
                      target_c: int, max_v: int, max_c: int) -> ZooSpec:
        axes = int(rng.integers(1, 4))
        joints = int(np.clip(round(target_c / axes), -(-MIN_CONTROLS // axes), max_c // axes))
        n_ch = min(int(rng.integers(1, 5)), max(1, joints // 3))
        split = np.full(n_ch, joints // n_ch)
        split[: joints % n_ch] += 1
        target_v = int(np.clip(target_v, MIN_VERTICES, max_v))
        parts_v, parts_f, offset = [], [], 0
        if rigid:  # a fixed hub the chains grow from
            hub_v, hub_f = zm.head_surface(int(target_v * rng.uniform(0.2, 0.35)), 60,
                                           target_v // 2, rng)
            hub_v = hub_v * rng.uniform(0.5, 0.7)
            parts_v.append(hub_v)
            parts_f.append(hub_f)
            offset = len(hub_v)
        budget = (target_v - offset) // n_ch
        axis_names = "xzy"[:axes]  # twist (y) last: it moves a tube least
        controls: list[Control] = []
        for k in range(n_ch):
            j_k = int(split[k])
            around = int(rng.integers(12, 33))
            rings = max(budget // around, 2 * j_k + 2)
            while offset + rings * around > max_v and around > 8:
                around -= 1
            if k == n_ch - 1:  # top up to the minimum size
                rings = max(rings, -(-(MIN_VERTICES - offset) // around))
            length = float(rng.uniform(1.2, 2.0))
            tube, tf = zm.tube_surface(rings, around, length, float(rng.uniform(0.08, 0.2)), rng)
            if rigid:
                d = rng.normal(size=3)
                d[1] = abs(d[1]) + 0.5
                d /= np.linalg.norm(d)
                base = 0.85 * np.abs(parts_v[0]).max() * d
            else:
                d = np.array([rng.uniform(-0.3, 0.3), 1.0, rng.uniform(-0.3, 0.3)])
                base = np.array([0.45 * (k - (n_ch - 1) / 2), 0.0, 0.0])
            rot = zm.rotation_to(d)
            segment = length / j_k
            weights = zm.chain_weights(tube[:, 1], j_k, segment, float(rng.uniform(0.75, 1.5)),
                                       root=rigid)
            index = np.full((j_k, 3), -1)
            for j in range(j_k):
                for name in axis_names:
                    hi = float(rng.uniform(15.0, 50.0)) * (0.4 if name == "y" else 1.0)
                    lo = -hi * (1.0 if rng.random() < 0.5 else rng.uniform(0.3, 1.0))
                    index[j, "xyz".index(name)] = len(controls)
                    controls.append(Control(f"c{k}_j{j:02d}_{name}", lo, hi, 0.0, f"chain{k}", ""))
            self._chains.append(_Chain(offset, tube, weights, index, segment, rot, base, rigid))
            parts_v.append(tube @ rot.T + base)
            parts_f.append(tf + offset)
            offset += len(tube)
        self.neutral = np.concatenate(parts_v).astype(np.float32)
        self.faces = np.concatenate(parts_f).astype(np.int32)
        self.rigid_mask = np.zeros(len(self.neutral), bool)
        if rigid:
            self.rigid_mask[: len(parts_v[0])] = True
        self.schema = ControlSchema(tuple(controls))
        self._shape_count = 0
        return ZooSpec(seed=seed, kind="chain", surface="tubes", vertices=len(self.neutral),
                       controls=len(controls), rigid_region=rigid, chains=n_ch, joints=joints,
                       axes=axes)

    # --- evaluation -------------------------------------------------------------------------

    def normalised(self, controls: np.ndarray) -> np.ndarray:
        """(B, C) -> (B, C) (w - default) / room, room the larger side of the range: in [-1, 1]."""
        return (controls - self._defaults) / self._room

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        return evaluate_in_chunks(self._evaluate_chunk, controls, self.vertex_count, _CHUNK)

    def _evaluate_chunk(self, controls: np.ndarray) -> np.ndarray:
        b = controls.shape[0]
        if self._chains:
            out = np.broadcast_to(self.neutral, (b, *self.neutral.shape)).astype(np.float64)
            for ch in self._chains:
                out[:, ch.start : ch.start + len(ch.local)] = ch.evaluate(controls)
            return out
        a = self.normalised(controls)
        # products[b, k] = prod over the k-th corrective's drivers of a[b, driver]
        prods = [np.prod(a[:, list(d)], axis=1) for d in self._combos]
        feats = np.concatenate([a[:, : self._shape_count], np.stack(prods, 1)], axis=1) if prods \
            else a[:, : self._shape_count]
        flat = feats.astype(np.float32) @ self._matrix + self.neutral.reshape(1, -1)
        points = flat.reshape(b, -1, 3)
        if self._jaw is None:
            return points
        open_i, side_i, pivot, weights = self._jaw
        angles = np.zeros((b, 3))
        angles[:, 0] = np.radians(controls[:, open_i])
        if side_i >= 0:
            angles[:, 1] = np.radians(controls[:, side_i])
        return zm.jaw_skin(points, angles, pivot, weights)


@dataclass(frozen=True)
class _Chain:
    """One skinned tube: vertices ``start:start + len(local)`` of the rig, ``local`` (V_k, 3) in
    the chain's frame (along +y), ``weights`` (V_k, J [+ 1 root]), ``index`` (J, 3) the control
    of each joint's X, Y, Z angle (-1: fixed), world = rot @ local + base."""

    start: int
    local: np.ndarray
    weights: np.ndarray
    index: np.ndarray
    segment: float
    rot: np.ndarray
    base: np.ndarray
    root: bool

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) degrees -> (B, V_k, 3) world positions."""
        picked = np.where(self.index >= 0, controls[:, np.maximum(self.index, 0)], 0.0)
        mats = zm.chain_matrices(np.radians(picked), self.segment)  # (B, J, 4, 4)
        if self.root:
            fixed = np.broadcast_to(np.eye(4), (mats.shape[0], 1, 4, 4))
            mats = np.concatenate([fixed, mats], axis=1)
        return skin_points(self.local, mats, self.weights) @ self.rot.T + self.base


def _rebuild(seed: int, max_vertices: int, max_controls: int) -> ZooRig:
    return ZooRig(seed, max_vertices=max_vertices, max_controls=max_controls)


def make_zoo_rig(seed: int, *, max_vertices: int = MAX_VERTICES,
                 max_controls: int = MAX_CONTROLS) -> ZooRig:
    """The zoo rig of ``seed`` (a non-negative integer); see the module docstring."""
    return ZooRig(seed, max_vertices=max_vertices, max_controls=max_controls)
