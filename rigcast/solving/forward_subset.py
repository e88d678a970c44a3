"""A bundle's forward graph cut down to a subset of its output vertices, for a cheap fit error.

The forward graph ends in dense layers whose output columns are the 3V vertex coordinates, so
the graph that returns only M vertices is the same graph with those columns kept: every
initializer whose last axis has 3V entries keeps the subset's columns, and the final reshape
constant ``[-1, V, 3]`` becomes ``[-1, M, 3]``. That is far less work than the full graph when
M << V (the output projection dominates the forward model's cost).

This needs the ``onnx`` package (the export extra), so it lives in the CLI layer and the runtime
only receives the finished graph (``BatchSolver(subset_graph=...)``). Whatever the graph looks
like, the cut graph is checked against the full one on random controls before it is used; a graph
this cannot cut, or a cut that does not match, gives ``None`` and the caller keeps the full graph.
"""

from __future__ import annotations

import logging

import numpy as np

log = logging.getLogger(__name__)

PARITY_TOL = 1e-4  # mesh units; float32 sums over the same terms in another order


def slice_forward_graph(onnx_bytes: bytes, vertex_count: int, indices: np.ndarray
                        ) -> bytes | None:
    """ONNX ``controls (N, C) -> vertices (N, M, 3)`` for the M = len(indices) vertices, or None
    when the graph cannot be cut (no onnx package, an unexpected graph, a failed check)."""
    try:
        import onnx
        from onnx import numpy_helper
    except ImportError:
        log.info("onnx is not installed; the fit error runs the full forward graph")
        return None
    idx = np.asarray(indices, dtype=np.int64)
    cols = (3 * idx[:, None] + np.arange(3)[None]).reshape(-1)  # (3M,) output columns kept
    width = 3 * vertex_count
    model = onnx.load_from_string(onnx_bytes)
    graph = model.graph
    sliced = reshaped = 0
    for init in graph.initializer:
        arr = numpy_helper.to_array(init)
        if arr.ndim >= 1 and arr.shape[-1] == width and arr.dtype.kind == "f":
            init.CopyFrom(numpy_helper.from_array(np.ascontiguousarray(arr[..., cols]), init.name))
            sliced += 1
        elif _is_out_shape(arr, vertex_count):
            init.CopyFrom(numpy_helper.from_array(_out_shape(idx.shape[0]), init.name))
            reshaped += 1
    for node in graph.node:
        if node.op_type != "Constant":
            continue
        for attr in node.attribute:
            if attr.name == "value" and _is_out_shape(numpy_helper.to_array(attr.t),
                                                      vertex_count):
                attr.t.CopyFrom(numpy_helper.from_array(_out_shape(idx.shape[0])))
                reshaped += 1
    if sliced == 0 or reshaped != 1:
        log.info("forward graph not cut (%d wide layers, %d output reshapes)", sliced, reshaped)
        return None
    for out in graph.output:  # the output's static shape, if it has one, follows
        dims = out.type.tensor_type.shape.dim
        if len(dims) == 3 and dims[1].HasField("dim_value"):
            dims[1].dim_value = int(idx.shape[0])
    cut = model.SerializeToString()
    return cut if _matches(onnx_bytes, cut, idx) else None


def _is_out_shape(arr: np.ndarray, vertex_count: int) -> bool:
    return (arr.dtype == np.int64 and arr.shape == (3,)
            and arr[1] == vertex_count and arr[2] == 3 and arr[0] in (-1, 0))


def _out_shape(m: int) -> np.ndarray:
    return np.array([-1, m, 3], dtype=np.int64)


def _matches(full: bytes, cut: bytes, idx: np.ndarray) -> bool:
    """The cut graph's output equals the full graph's at the subset, on random controls."""
    from rigcast.runtime.bundle import FORWARD_INPUT, FORWARD_OUTPUT, BundleError
    from rigcast.runtime.solve.inference import ORT_ERRORS, open_session

    try:
        a, b = open_session(full, threads=1), open_session(cut, threads=1)
        c = int(a.get_inputs()[0].shape[1])
        x = np.random.default_rng(0).uniform(0.0, 1.0, (4, c)).astype(np.float32)
        want = a.run([FORWARD_OUTPUT], {FORWARD_INPUT: x})[0][:, idx]
        got = b.run([FORWARD_OUTPUT], {FORWARD_INPUT: x})[0]
    except (BundleError, *ORT_ERRORS) as exc:
        log.info("cut forward graph does not run (%s); keeping the full graph", exc)
        return False
    ok = got.shape == want.shape and float(np.abs(got - want).max()) <= PARITY_TOL
    if not ok:
        log.info("cut forward graph disagrees with the full one; keeping the full graph")
    return ok
