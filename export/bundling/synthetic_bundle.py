"""Synthetic bundles built by hand with onnx.helper: no sampling, no training, no torch.

The tests and ``bench/latency.py`` need bundles of a chosen size in a fraction of a second. The rig
here is a plain linear blendshape model over a wavy sheet; its forward graph is that model exactly,
and its inverse graph is either

- ``"lstsq"``: the least-squares solve of the blendshape basis restricted to the K input vertices,
  clipped into the bounds (exact on the rig's own meshes, so the fit error is ~0 there), or
- ``"mlp"``: a two-layer MLP with random weights and a scaled sigmoid into the bounds, the shape a
  trained inverse has (used by the latency bench, where only the cost matters).

The S stable vertices carry no blendshape motion, so a rigidly moved mesh of the rig can be
stabilised exactly onto the neutral.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from rigcast.export.bundling.moments_graph import moments_graph
from rigcast.runtime.bundle import (
    FORWARD_INPUT,
    FORWARD_OUTPUT,
    INVERSE_INPUT,
    INVERSE_OUTPUT,
    PROJECT_NORM,
    PROJECT_POINTS,
    REFINE_CONTROLS,
    REFINE_CURVATURE,
    REFINE_GRADIENT,
    REFINE_MESH,
    REFINE_PROJECTION,
    REFINE_QUAD,
    REFINE_RESIDUAL,
    REFINE_TANGENTS,
    REFINE_WEIGHTS,
    RefineProjection,
    RestOfMesh,
    write_bundle,
)
from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)

OPSET = 17
InverseKind = Literal["lstsq", "mlp"]


@dataclass(frozen=True)
class SyntheticRig:
    """A linear blendshape rig: ``mesh = neutral + sum_c w_c * deltas[c]``."""

    schema: ControlSchema
    neutral: np.ndarray  # (V, 3) float32
    deltas: np.ndarray  # (C, V, 3) float32
    faces: np.ndarray  # (F, 3) int32
    stable_indices: np.ndarray  # (S,) int64, vertices no control moves
    input_indices: np.ndarray  # (K,) int64, vertices the inverse reads

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls (B, C) -> meshes (B, V, 3) float32."""
        w = np.asarray(controls, dtype=np.float64)
        # out[b, v, x] = neutral[v, x] + sum_c w[b, c] * deltas[c, v, x]
        out = self.neutral[None] + np.einsum("bc,cvx->bvx", w, self.deltas)
        return out.astype(np.float32)


def make_synthetic_rig(
    vertices: int, controls: int, *, inputs: int, stable: int, seed: int = 0
) -> SyntheticRig:
    """A wavy sheet of ``vertices`` points with ``controls`` smooth, localised blendshapes."""
    if stable + inputs > vertices:
        raise ValueError(f"stable ({stable}) + inputs ({inputs}) exceed vertices ({vertices})")
    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(vertices)))
    u, v = np.divmod(np.arange(vertices), side)
    x = u / side - 0.5
    y = v / side - 0.5
    z = 0.05 * np.sin(6.0 * x) * np.cos(5.0 * y)
    neutral = np.stack([x, y, z], axis=1).astype(np.float32)
    centres = rng.uniform(-0.4, 0.4, size=(controls, 2))
    dirs = rng.normal(size=(controls, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    d2 = (x[None] - centres[:, :1]) ** 2 + (y[None] - centres[:, 1:]) ** 2  # (C, V)
    falloff = np.exp(-d2 / (2 * 0.15**2))
    deltas = 0.05 * falloff[:, :, None] * dirs[:, None, :]  # (C, V, 3)
    order = rng.permutation(vertices)
    stable_idx = np.sort(order[:stable])
    input_idx = np.sort(order[stable : stable + inputs])
    deltas[:, stable_idx, :] = 0.0
    schema = ControlSchema(
        tuple(
            Control(f"shape_{i:02d}", 0.0, 1.0, 0.0, group=("upper" if i % 2 else "lower"))
            for i in range(controls)
        )
    )
    faces = _grid_faces(side, vertices)
    return SyntheticRig(
        schema=schema,
        neutral=neutral,
        deltas=deltas.astype(np.float32),
        faces=faces,
        stable_indices=stable_idx.astype(np.int64),
        input_indices=input_idx.astype(np.int64),
    )


def _grid_faces(side: int, vertices: int) -> np.ndarray:
    rows = vertices // side
    faces = []
    for r in range(rows - 1):
        for c in range(side - 1):
            a = r * side + c
            faces.append((a, a + 1, a + side))
            faces.append((a + 1, a + side + 1, a + side))
    return np.array(faces, dtype=np.int32).reshape(-1, 3)


def forward_graph(rig: SyntheticRig) -> bytes:
    """ONNX ``controls (N, C) -> vertices (N, V, 3)``: one MatMul, one Add, one Reshape."""
    n_controls, n_vertices = rig.deltas.shape[0], rig.deltas.shape[1]
    inits = [
        numpy_helper.from_array(rig.deltas.reshape(n_controls, -1), "basis"),
        numpy_helper.from_array(rig.neutral.reshape(-1), "neutral"),
        numpy_helper.from_array(np.array([-1, n_vertices, 3], dtype=np.int64), "out_shape"),
    ]
    nodes = [
        helper.make_node("MatMul", [FORWARD_INPUT, "basis"], ["offsets"]),
        helper.make_node("Add", ["offsets", "neutral"], ["flat"]),
        helper.make_node("Reshape", ["flat", "out_shape"], [FORWARD_OUTPUT]),
    ]
    graph = helper.make_graph(
        nodes,
        "synthetic_forward",
        [helper.make_tensor_value_info(FORWARD_INPUT, TensorProto.FLOAT, ["N", n_controls])],
        [helper.make_tensor_value_info(FORWARD_OUTPUT, TensorProto.FLOAT, ["N", n_vertices, 3])],
        inits,
    )
    return _finish(graph)


def inverse_graph(
    rig: SyntheticRig, kind: InverseKind = "lstsq", *, hidden: int = 256, seed: int = 0
) -> bytes:
    """ONNX ``mesh (N, K, 3) -> controls (N, C)`` within the schema's bounds."""
    k = rig.input_indices.shape[0]
    n_controls = rig.deltas.shape[0]
    lo, hi = rig.schema.lower, rig.schema.upper
    base = rig.neutral[rig.input_indices].reshape(-1)  # (3K,)
    inits = [
        numpy_helper.from_array(np.array([-1, 3 * k], dtype=np.int64), "in_shape"),
        numpy_helper.from_array(base.astype(np.float32), "base"),
        numpy_helper.from_array(lo, "lo"),
        numpy_helper.from_array(hi, "hi"),
    ]
    nodes = [
        helper.make_node("Reshape", [INVERSE_INPUT, "in_shape"], ["flat"]),
        helper.make_node("Sub", ["flat", "base"], ["centred"]),
    ]
    if kind == "lstsq":
        basis = rig.deltas[:, rig.input_indices, :].reshape(n_controls, -1)  # (C, 3K)
        solve = np.linalg.pinv(basis.astype(np.float64)).astype(np.float32)  # (3K, C)
        inits.append(numpy_helper.from_array(solve, "solve"))
        nodes += [
            helper.make_node("MatMul", ["centred", "solve"], ["raw"]),
            helper.make_node("Max", ["raw", "lo"], ["above"]),
            helper.make_node("Min", ["above", "hi"], [INVERSE_OUTPUT]),
        ]
    elif kind == "mlp":
        rng = np.random.default_rng(seed)
        w1 = rng.normal(scale=1.0 / np.sqrt(3 * k), size=(3 * k, hidden)).astype(np.float32)
        w2 = rng.normal(scale=1.0 / np.sqrt(hidden), size=(hidden, n_controls)).astype(np.float32)
        inits += [
            numpy_helper.from_array(w1 * 20.0, "w1"),
            numpy_helper.from_array(np.zeros(hidden, np.float32), "b1"),
            numpy_helper.from_array(w2, "w2"),
            numpy_helper.from_array(np.full(n_controls, -2.0, np.float32), "b2"),
            numpy_helper.from_array(hi - lo, "span"),
        ]
        nodes += [
            helper.make_node("Gemm", ["centred", "w1", "b1"], ["h_pre"]),
            helper.make_node("Relu", ["h_pre"], ["h"]),
            helper.make_node("Gemm", ["h", "w2", "b2"], ["z"]),
            helper.make_node("Sigmoid", ["z"], ["s"]),
            helper.make_node("Mul", ["s", "span"], ["scaled"]),
            helper.make_node("Add", ["scaled", "lo"], [INVERSE_OUTPUT]),
        ]
    else:
        raise ValueError(f"inverse kind must be 'lstsq' or 'mlp', got {kind!r}")
    graph = helper.make_graph(
        nodes,
        f"synthetic_inverse_{kind}",
        [helper.make_tensor_value_info(INVERSE_INPUT, TensorProto.FLOAT, ["N", k, 3])],
        [helper.make_tensor_value_info(INVERSE_OUTPUT, TensorProto.FLOAT, ["N", n_controls])],
        inits,
    )
    return _finish(graph)


def refine_graph(rig: SyntheticRig) -> tuple[bytes, np.ndarray]:
    """The refinement graph of the linear rig (see export/training/refine.py) and its Gauss-Newton matrix:
    ``(controls (N, C), mesh (N, K, 3)) -> (gradient (N, C), residual_sq (N,))`` with
    u = (c - lo) / span, r = mesh - (base + u A), gradient = r A^T; A (C, 3K) the deltas of the
    input vertices per unit of normalised control. Returns (bytes, A A^T (C, C))."""
    k = rig.input_indices.shape[0]
    n_controls = rig.deltas.shape[0]
    lo, hi = rig.schema.lower, rig.schema.upper
    span = (hi - lo).astype(np.float32)
    a = (rig.deltas[:, rig.input_indices, :].reshape(n_controls, -1) * span[:, None]).astype(
        np.float32)
    inits = [
        numpy_helper.from_array(np.array([-1, 3 * k], dtype=np.int64), "in_shape"),
        numpy_helper.from_array(rig.neutral[rig.input_indices].reshape(-1).astype(np.float32),
                                "base"),
        numpy_helper.from_array(lo, "lo"),
        numpy_helper.from_array(span, "span"),
        numpy_helper.from_array(a, "a"),
        numpy_helper.from_array(np.ascontiguousarray(a.T), "a_t"),
        numpy_helper.from_array(np.array([1], dtype=np.int64), "axis"),
    ]
    nodes = [
        helper.make_node("Sub", [REFINE_CONTROLS, "lo"], ["shifted"]),
        helper.make_node("Div", ["shifted", "span"], ["u"]),
        helper.make_node("MatMul", ["u", "a"], ["offsets"]),
        helper.make_node("Reshape", [REFINE_MESH, "in_shape"], ["flat"]),
        helper.make_node("Sub", ["flat", "base"], ["centred"]),
        helper.make_node("Sub", ["centred", "offsets"], ["r"]),
        helper.make_node("MatMul", ["r", "a_t"], [REFINE_GRADIENT]),
        helper.make_node("Mul", ["r", "r"], ["r2"]),
        helper.make_node("ReduceSum", ["r2", "axis"], [REFINE_RESIDUAL], keepdims=0),
    ]
    graph = helper.make_graph(
        nodes,
        "synthetic_refine",
        [helper.make_tensor_value_info(REFINE_CONTROLS, TensorProto.FLOAT, ["N", n_controls]),
         helper.make_tensor_value_info(REFINE_MESH, TensorProto.FLOAT, ["N", k, 3])],
        [helper.make_tensor_value_info(REFINE_GRADIENT, TensorProto.FLOAT, ["N", n_controls]),
         helper.make_tensor_value_info(REFINE_RESIDUAL, TensorProto.FLOAT, ["N"])],
        inits,
    )
    return _finish(graph), a.astype(np.float64) @ a.T.astype(np.float64)


def projected_refine_graph(rig: SyntheticRig, cap: int = 4096, moments: bool = True
                           ) -> tuple[bytes, np.ndarray, RefineProjection]:
    """The projected refinement of the linear rig (see export/training/refine.py ``RefineCore``, with no
    correction MLP): ``(controls (N, C), projection (N, C)) -> (gradient (N, C), quad (N,))``,
    z = (c - lo) / span, e = p - G z, gradient = e, quad = z^T G z - 2 z^T p (float64), on the
    vertices ``export.training.refine.refine_vertices`` picks. ``moments``: the moment form
    (export/bundling/moments_graph.py, and z as ``basis_weights``), else the earlier float64
    projection. Returns (bytes, hessian, projection)."""
    from rigcast.export.training.refine import refine_vertices, rest_vertices

    n_controls = rig.deltas.shape[0]
    lo, hi = rig.schema.lower, rig.schema.upper
    span = (hi - lo).astype(np.float32)
    scaled = rig.deltas.astype(np.float64) * span[:, None, None]  # (C, V, 3) per unit of u
    idx = refine_vertices((scaled**2).sum(axis=2).T, cap=cap)
    a = scaled[:, idx].reshape(n_controls, -1)  # (C, 3S)
    gram = a @ a.T
    inits = [
        numpy_helper.from_array(lo, "lo"),
        numpy_helper.from_array(span, "span"),
        numpy_helper.from_array(gram, "gram"),
        numpy_helper.from_array(np.array([1], dtype=np.int64), "axis"),
        numpy_helper.from_array(np.array(2.0), "two"),
    ]
    nodes = [
        helper.make_node("Sub", [REFINE_CONTROLS, "lo"], ["shifted"]),
        helper.make_node("Div", ["shifted", "span"], ["u"]),
        helper.make_node("Cast", ["u"], ["z"], to=TensorProto.DOUBLE),
        helper.make_node("Cast", [REFINE_PROJECTION], ["p"], to=TensorProto.DOUBLE),
        helper.make_node("MatMul", ["z", "gram"], ["gz"]),
        helper.make_node("Sub", ["p", "gz"], ["e"]),
        helper.make_node("Cast", ["e"], [REFINE_GRADIENT], to=TensorProto.FLOAT),
        helper.make_node("Mul", ["p", "two"], ["p2"]),
        helper.make_node("Sub", ["gz", "p2"], ["w"]),
        helper.make_node("Mul", ["z", "w"], ["zw"]),
        helper.make_node("ReduceSum", ["zw", "axis"], [REFINE_QUAD], keepdims=0),
    ]
    outputs = [helper.make_tensor_value_info(REFINE_GRADIENT, TensorProto.FLOAT, ["N", n_controls]),
               helper.make_tensor_value_info(REFINE_QUAD, TensorProto.DOUBLE, ["N"])]
    inputs = [helper.make_tensor_value_info(REFINE_CONTROLS, TensorProto.FLOAT, ["N", n_controls]),
              helper.make_tensor_value_info(REFINE_PROJECTION, TensorProto.FLOAT,
                                            ["N", n_controls])]
    if moments:  # what builds write: z, and the curvature V G V^T along tangents V (J_z = I)
        nodes += [helper.make_node("Identity", ["z"], [REFINE_WEIGHTS]),
                  helper.make_node("Cast", [REFINE_TANGENTS], ["vt"], to=TensorProto.DOUBLE),
                  helper.make_node("MatMul", ["vt", "gram"], ["vg"]),
                  helper.make_node("Transpose", ["vt"], ["vtt"], perm=[0, 2, 1]),
                  helper.make_node("MatMul", ["vg", "vtt"], [REFINE_CURVATURE])]
        outputs += [helper.make_tensor_value_info(REFINE_WEIGHTS, TensorProto.DOUBLE,
                                                  ["N", n_controls]),
                    helper.make_tensor_value_info(REFINE_CURVATURE, TensorProto.DOUBLE,
                                                  ["N", "T", "T"])]
        inputs.append(helper.make_tensor_value_info(REFINE_TANGENTS, TensorProto.FLOAT,
                                                    ["N", "T", n_controls]))
    graph = helper.make_graph(nodes, "synthetic_refine_projected", inputs, outputs, inits)
    at_lo = rig.neutral[idx] + np.einsum("c,cvk->vk", lo.astype(np.float64), rig.deltas[:, idx])
    offset = at_lo.reshape(-1).astype(np.float32)  # the mesh at u = 0
    project = moments_graph(a, offset) if moments else project_graph(a, offset)
    rest = None
    others = rest_vertices(rig.neutral.shape[0], idx, rig.stable_indices)
    if moments and others.size:
        rest_lo = rig.neutral[others] + np.einsum("c,cvk->vk", lo.astype(np.float64),
                                                  rig.deltas[:, others])
        rest = RestOfMesh(others, scaled[:, others].reshape(n_controls, -1).astype(np.float32),
                          rest_lo.reshape(-1).astype(np.float32))
    return _finish(graph), gram, RefineProjection(idx, project, rest)


def project_graph(basis: np.ndarray, offset: np.ndarray) -> bytes:
    """ONNX ``points (N, S, 3) -> (projection (N, R), norm_sq (N,))`` float64: y = points - offset,
    projection = y basis^T, norm_sq = |y|^2: the projection graph of bundles before the moment
    form, kept so the runtime's support for them stays tested."""
    r, coords = basis.shape
    inits = [
        numpy_helper.from_array(np.array([-1, coords], dtype=np.int64), "flat_shape"),
        numpy_helper.from_array(np.asarray(offset, np.float64), "offset"),
        numpy_helper.from_array(np.ascontiguousarray(basis.T, np.float64), "basis_t"),
        numpy_helper.from_array(np.array([1], dtype=np.int64), "axis"),
    ]
    nodes = [
        helper.make_node("Reshape", [PROJECT_POINTS, "flat_shape"], ["flat32"]),
        helper.make_node("Cast", ["flat32"], ["flat"], to=TensorProto.DOUBLE),
        helper.make_node("Sub", ["flat", "offset"], ["y"]),
        helper.make_node("MatMul", ["y", "basis_t"], [REFINE_PROJECTION]),
        helper.make_node("Mul", ["y", "y"], ["y2"]),
        helper.make_node("ReduceSum", ["y2", "axis"], [PROJECT_NORM], keepdims=0),
    ]
    graph = helper.make_graph(
        nodes, "synthetic_refine_project",
        [helper.make_tensor_value_info(PROJECT_POINTS, TensorProto.FLOAT, ["N", coords // 3, 3])],
        [helper.make_tensor_value_info(REFINE_PROJECTION, TensorProto.DOUBLE, ["N", r]),
         helper.make_tensor_value_info(PROJECT_NORM, TensorProto.DOUBLE, ["N"])],
        inits,
    )
    return _finish(graph)


def _finish(graph: onnx.GraphProto) -> bytes:
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString()


def build_synthetic_bundle(
    path: str | Path,
    *,
    vertices: int = 300,
    controls: int = 8,
    inputs: int = 40,
    stable: int = 16,
    inverse: InverseKind = "lstsq",
    hidden: int = 256,
    seed: int = 0,
    fit_rms: float | None = None,
    name: str = "synthetic",
    rigid_region: bool = True,
    refine: bool | Literal["inputs", "projected", "projected-plain"] = False,
    inverse_onnx: bytes | None = None,
) -> Path:
    """Write a synthetic bundle to ``path`` and return the path.

    ``fit_rms`` goes into the manifest's ``training.inverse_fit_rms`` (mesh units), the figure the
    server derives its default off-manifold threshold from. ``refine`` adds a refinement graph,
    so the solve costs what a built bundle's does: True or "projected" the projected form
    (``projected_refine_graph`` in the moment form, what builds write), "projected-plain" the
    earlier float64 projection, "inputs" the older input-vertex form (``refine_graph``).
    ``inverse_onnx``: an inverse graph to use instead of ``inverse`` (a trained one,
    export/bundling/synthetic_trained.py); the manifest then records the inverse as "trained".
    """
    rig = make_synthetic_rig(vertices, controls, inputs=inputs, stable=stable, seed=seed)
    kind = inverse if inverse_onnx is None else "trained"
    extra: dict[str, object] = {"synthetic": {"inverse": kind, "seed": seed},
                                "stabilise": {"rigid_region": rigid_region}}
    if fit_rms is not None:
        extra["training"] = {"inverse_fit_rms": float(fit_rms)}
    refine_bytes, hessian, projection = None, None, None
    if refine == "inputs":
        refine_bytes, hessian = refine_graph(rig)
    elif refine:
        refine_bytes, hessian, projection = projected_refine_graph(
            rig, moments=refine != "projected-plain")
    return write_bundle(
        path,
        name=name,
        schema=rig.schema,
        neutral=rig.neutral,
        faces=rig.faces,
        stable_indices=rig.stable_indices,
        input_indices=rig.input_indices,
        inverse_onnx=(inverse_graph(rig, inverse, hidden=hidden, seed=seed)
                      if inverse_onnx is None else inverse_onnx),
        forward_onnx=forward_graph(rig),
        extra=extra,
        refine_onnx=refine_bytes,
        refine_hessian=hessian,
        refine_projection=projection,
    )
