"""ONNX export of the inverse and forward models, with checks.

We use torch's TorchScript-based exporter (``dynamo=False``): on torch 2.13 it exports these plain
MLP graphs in under a second with a dynamic batch axis, and it prints nothing to stdout, whereas the
dynamo exporter takes several seconds and writes its own progress lines. Its deprecation warnings
are captured and sent to this module's logger, so users' terminals stay quiet.

Every export is checked:
- ``onnx.checker.check_model(full_check=True)`` (ONNX's own validator, with shape inference);
- the opset is the pinned ``OPSET``;
- onnxruntime (CPU) output equals torch within ``PARITY_TOL`` (max abs) on random inputs at
  several batch sizes, including 1 and 7.
"""

from __future__ import annotations

import io
import logging
import warnings
from collections.abc import Sequence

import numpy as np
import onnx
import onnxruntime as ort
import torch
from rigcast.export.training.models import ForwardApproximator, InverseNetwork
from rigcast.runtime.bundle import FORWARD_INPUT, FORWARD_OUTPUT, INVERSE_INPUT, INVERSE_OUTPUT
from rigcast.runtime.errors import RigcastError
from torch import nn

log = logging.getLogger(__name__)

#: The ONNX opset every rigcast graph is exported with.
OPSET = 17
#: Largest allowed |onnxruntime - torch| on the parity check, as a share of each control's range
#: (an absolute tolerance refused float32 rounding on a joint bounded at +-126 degrees).
PARITY_TOL = 1e-5
PARITY_BATCHES = (1, 7, 32)


class ExportError(RigcastError, RuntimeError):
    """An exported graph failed the checker, the opset pin, or the parity check."""

    advice = "the build's ONNX export failed its own checks; rebuild, and report it if it stays"


def _export(module: nn.Module, example: torch.Tensor | tuple[torch.Tensor, ...],
            input_name: str | list[str], output_name: str | list[str],
            axes: dict[str, dict[int, str]] | None = None) -> bytes:
    buf = io.BytesIO()
    module.eval()
    inputs = [input_name] if isinstance(input_name, str) else input_name
    outputs = [output_name] if isinstance(output_name, str) else output_name
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        torch.onnx.export(
            module,
            example if isinstance(example, tuple) else (example,),
            buf,  # type: ignore[arg-type]  # file-like objects are accepted at runtime
            input_names=inputs,
            output_names=outputs,
            dynamic_axes={name: {0: "N"} for name in inputs + outputs} | (axes or {}),
            opset_version=OPSET,
            do_constant_folding=True,
            dynamo=False,
        )
    for w in caught:
        log.debug("torch.onnx: %s", w.message)
    return buf.getvalue()


def check_graph(data: bytes, what: str) -> onnx.ModelProto:
    """Run onnx.checker (full check) and the opset pin on serialised model bytes."""
    model = onnx.load_from_string(data)
    try:
        onnx.checker.check_model(model, full_check=True)
    except onnx.checker.ValidationError as exc:
        raise ExportError(f"{what} graph fails onnx.checker: {exc}") from None
    opsets = {o.domain or "ai.onnx": o.version for o in model.opset_import}
    if opsets.get("ai.onnx") != OPSET:
        raise ExportError(f"{what} graph has opset {opsets.get('ai.onnx')}, expected {OPSET}")
    return model


def session(data: bytes, threads: int = 1) -> ort.InferenceSession:
    """A CPU onnxruntime session with explicit thread settings."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.log_severity_level = 3
    return ort.InferenceSession(data, sess_options=opts, providers=["CPUExecutionProvider"])


def check_parity(module: nn.Module, data: bytes, inputs: Sequence[np.ndarray], what: str,
                 scale: np.ndarray | float = 1.0) -> float:
    """Max |onnxruntime - torch| / scale over input batches; raises ExportError above PARITY_TOL.

    scale: (C,) each output's range (controls), or one number (vertices: the mesh's size)."""
    sess = session(data)
    name = sess.get_inputs()[0].name
    worst = 0.0
    with torch.no_grad():
        for x in inputs:
            x = np.ascontiguousarray(x, dtype=np.float32)
            ref = module(torch.from_numpy(x)).numpy()
            got = sess.run(None, {name: x})[0]
            if got.shape != ref.shape:
                raise ExportError(f"{what} graph returned shape {got.shape}, torch {ref.shape}")
            worst = max(worst, float(np.max(np.abs(got - ref) / scale)))
    if not worst <= PARITY_TOL:
        raise ExportError(f"{what} graph differs from torch by {worst:.3g} (> {PARITY_TOL})")
    return worst


def export_inverse(
    model: InverseNetwork, example_meshes: np.ndarray | None = None, seed: int = 0
) -> tuple[bytes, float]:
    """Export the inverse: input ``mesh`` (N, K, 3) -> output ``controls`` (N, C).

    example_meshes: (M, K, 3) realistic inputs for the parity check (random poses around the
    neutral are added). returns: (model bytes, worst parity error).
    """
    k = model.input_count
    rng = np.random.default_rng(seed)
    base = model.neutral_inputs.numpy().reshape(k, 3)
    scale = 1.0 / float(model.inv_scale)
    batches = [
        (base + scale * rng.standard_normal((b, k, 3))).astype(np.float32) for b in PARITY_BATCHES
    ]
    if example_meshes is not None and len(example_meshes):
        batches.append(np.asarray(example_meshes, np.float32))
    data = _export(model, torch.from_numpy(batches[1]), INVERSE_INPUT, INVERSE_OUTPUT)
    check_graph(data, "inverse")
    span = (model.upper - model.lower).numpy()
    worst = check_parity(model, data, batches, "inverse", span)
    log.info("exported inverse: %d bytes, parity %.2g", len(data), worst)
    return data, worst


def export_forward(model: ForwardApproximator, seed: int = 0) -> tuple[bytes, float]:
    """Export the forward model: input ``controls`` (N, C) -> output ``vertices`` (N, V, 3).

    Parity inputs are uniform in the bounds. returns: (model bytes, worst parity error).
    """
    rng = np.random.default_rng(seed)
    lo, hi = model.lower.numpy(), model.upper.numpy()
    batches = [
        (lo + (hi - lo) * rng.random((b, lo.shape[0]))).astype(np.float32) for b in PARITY_BATCHES
    ]
    data = _export(model, torch.from_numpy(batches[1]), FORWARD_INPUT, FORWARD_OUTPUT)
    check_graph(data, "forward")
    neutral = model.neutral.numpy().reshape(-1, 3)
    size = float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0))) or 1.0
    worst = check_parity(model, data, batches, "forward", size)
    log.info("exported forward: %d bytes, parity %.2g", len(data), worst)
    return data, worst


def export_refine(graph: nn.Module, lower: np.ndarray, upper: np.ndarray,
                  example_meshes: np.ndarray, seed: int = 0) -> tuple[bytes, float]:
    """Export the input-vertex refinement graph (``export.training.refine.RefineGraph``): inputs
    ``controls`` (N, C) and ``mesh`` (N, K, 3) -> outputs ``gradient`` (N, C) and
    ``residual_sq`` (N,). lower, upper: (C,) control bounds; example_meshes: (M, K, 3) realistic
    inputs for the parity check. returns: (model bytes, worst relative parity error)."""
    from rigcast.runtime.bundle import (
        REFINE_CONTROLS,
        REFINE_GRADIENT,
        REFINE_MESH,
        REFINE_RESIDUAL,
    )

    return _export_refine_pair(graph, lower, upper, example_meshes, seed,
                               (REFINE_CONTROLS, REFINE_MESH), (REFINE_GRADIENT, REFINE_RESIDUAL))


def export_refine_core(graph: nn.Module, lower: np.ndarray, upper: np.ndarray,
                       example_projections: np.ndarray, seed: int = 0) -> tuple[bytes, float]:
    """Export the projected refinement graph (``export.training.refine.RefineCore``): inputs
    ``controls`` (N, C), ``projection`` (N, R) and ``tangents`` (N, T, C) -> outputs
    ``gradient`` (N, C) float32, ``quad`` (N,) float64, ``basis_weights`` (N, R) float64 and
    ``curvature`` (N, T, T) float64. example_projections (M, R): realistic projections for the
    parity check (with three random tangents a frame). returns: (model bytes, worst relative
    parity error)."""
    from rigcast.runtime.bundle import (
        REFINE_CONTROLS,
        REFINE_CURVATURE,
        REFINE_GRADIENT,
        REFINE_PROJECTION,
        REFINE_QUAD,
        REFINE_TANGENTS,
        REFINE_WEIGHTS,
    )

    return _export_refine_pair(graph, lower, upper, example_projections, seed,
                               (REFINE_CONTROLS, REFINE_PROJECTION, REFINE_TANGENTS),
                               (REFINE_GRADIENT, REFINE_QUAD, REFINE_WEIGHTS, REFINE_CURVATURE),
                               tangents=3)


def _export_refine_pair(graph: nn.Module, lower: np.ndarray, upper: np.ndarray,
                        example: np.ndarray, seed: int, inputs: tuple[str, ...],
                        outputs: tuple[str, ...], tangents: int = 0) -> tuple[bytes, float]:
    """Export a refinement graph of (controls, ``example``-shaped input[, tangents]) -> its
    outputs, and check it: the example inputs, paired with random controls within the bounds
    (and ``tangents`` random directions a frame, when the graph takes them, its second axis
    dynamic), through onnxruntime against torch, relative to the largest magnitude of each
    output (<= 1e-4)."""
    graph = graph.eval()
    rng = np.random.default_rng(seed)
    lo, hi = np.asarray(lower, np.float32), np.asarray(upper, np.float32)
    second = np.asarray(example, np.float32)
    ctrl = (lo + (hi - lo) * rng.random((second.shape[0], lo.shape[0]))).astype(np.float32)
    arrays = [ctrl, second]
    axes: dict[str, dict[int, str]] = {}
    if tangents:
        arrays.append(rng.standard_normal((second.shape[0], tangents, lo.shape[0]))
                      .astype(np.float32))
        axes = {inputs[2]: {0: "N", 1: "T"}, outputs[-1]: {0: "N", 1: "T", 2: "T"}}
    torch_in = tuple(torch.from_numpy(a) for a in arrays)
    data = _export(graph, torch_in, list(inputs), list(outputs), axes)
    check_graph(data, "refine")
    worst = 0.0
    with torch.no_grad():
        refs = graph(*torch_in)
    got = session(data).run(None, dict(zip(inputs, arrays, strict=True)))
    for g, r in zip(got, refs, strict=True):
        ref = r.numpy()
        worst = max(worst, float(np.max(np.abs(g - ref)) / max(float(np.max(np.abs(ref))), 1e-12)))
    if not worst <= 1e-4:
        raise ExportError(f"refine graph differs from torch by {worst:.3g} (relative, > 1e-4)")
    log.info("exported refine: %d bytes, parity %.2g", len(data), worst)
    return data, worst


def export_refine_project(data: bytes, example_points: np.ndarray, expected: np.ndarray
                          ) -> tuple[bytes, float]:
    """Check the projected refinement's projection graph in moment form
    (export/bundling/moments_graph.py): input ``points`` (N, S, 3) -> the moments, from which
    runtime/solve/moments.py derives the projection and |y|^2. example_points (M, S, 3) and
    expected (M, R + 1), the float64 values of ``runtime.solve.refine.project_naive``: the
    parity check, relative to the largest magnitude of each. returns: (model bytes, worst
    relative parity error)."""
    from rigcast.runtime.bundle import (
        PROJECT_CENTRE,
        PROJECT_CONSTANTS,
        PROJECT_MOMENTS,
        PROJECT_NORM,
        PROJECT_POINTS,
    )
    from rigcast.runtime.solve.moments import BasisConstants, FrameMoments, projection_state

    pts = np.ascontiguousarray(example_points, np.float32)
    check_graph(data, "refine projection")
    mo, norm, table, centre = session(data).run(
        [PROJECT_MOMENTS, PROJECT_NORM, PROJECT_CONSTANTS, PROJECT_CENTRE], {PROJECT_POINTS: pts})
    BasisConstants.from_outputs(table, centre)  # the constants read back as the runtime reads
    state = projection_state(FrameMoments.from_outputs(mo, norm))
    worst = 0.0
    for got, ref in ((state[:, :-1], expected[:, :-1]), (state[:, -1], expected[:, -1])):
        worst = max(worst, float(np.max(np.abs(got - ref)) / max(float(np.max(np.abs(ref))),
                                                                  1e-12)))
    if not worst <= 1e-4:
        raise ExportError(f"refine projection graph differs from float64 by {worst:.3g} "
                          "(relative, > 1e-4)")
    log.info("checked refine projection: %d bytes, parity %.2g", len(data), worst)
    return data, worst
