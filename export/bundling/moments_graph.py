"""The projected refinement's per-frame graph in moment form (``refine_project.onnx``).

points (N, S, 3) float32 -> ``moments`` (N, 3, 3R + 4) float32 = y^T [A' | oc | 1] per frame and
``norm_sq`` (N,) float32 = |y|^2, with y = points - offset, A' (S, 3R) the refinement's basis
A (R, 3S) laid out by vertex (A'[i, 3r + j] = A[r, 3i + j]) and oc the offset less its centroid;
plus two constant outputs the runtime reads once, float64: ``moment_constants`` (4, 3R + 4) =
[oc | 1]^T [A' | oc | 1] and ``moment_centre`` (3,), the centroid. What the runtime makes of them
is in runtime/solve/moments.py.

Built with onnx.helper rather than traced from torch: it is two products and a reduction, and
the synthetic bundles of the benches and tests use the very same builder. The product is float32
with the frames in its rows (3N rows, never one), which onnxruntime's CPU kernels compute
identically whatever the batch: a live frame and the same frame in an offline batch get the same
bits (checked in the tests).
"""

from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from rigcast.runtime.bundle import (
    PROJECT_CENTRE,
    PROJECT_CONSTANTS,
    PROJECT_MOMENTS,
    PROJECT_NORM,
    PROJECT_POINTS,
)

OPSET = 17


def moment_arrays(basis: np.ndarray, offset: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """basis (R, 3S), offset (3S,) -> (the per-vertex table [A' | oc | 1] (S, 3R + 4) float32,
    offset (S, 3) float32, the constants (4, 3R + 4) float64, the centroid (3,) float64)."""
    a = np.asarray(basis, np.float64)
    r, coords = a.shape
    s = coords // 3
    off = np.asarray(offset, np.float64).reshape(s, 3)
    centre = off.mean(axis=0)
    oc = off - centre
    by_vertex = a.reshape(r, s, 3).transpose(1, 0, 2).reshape(s, 3 * r)
    table = np.concatenate([by_vertex, oc, np.ones((s, 1))], axis=1)  # (S, 3R + 4)
    constants = np.concatenate([oc, np.ones((s, 1))], axis=1).T @ table  # (4, 3R + 4)
    return table.astype(np.float32), off.astype(np.float32), constants, centre


def moments_graph(basis: np.ndarray, offset: np.ndarray) -> bytes:
    """The ONNX graph of the module docstring for basis (R, 3S) and offset (3S,); checked with
    onnx.checker (full check)."""
    table, off, constants, centre = moment_arrays(basis, offset)
    s, width = table.shape
    inits = [
        numpy_helper.from_array(off, "offset"),
        numpy_helper.from_array(table, "table"),
        numpy_helper.from_array(constants, "constants"),
        numpy_helper.from_array(centre, "centre"),
    ]
    nodes = [
        helper.make_node("Sub", [PROJECT_POINTS, "offset"], ["y"]),
        helper.make_node("Transpose", ["y"], ["yt"], perm=[0, 2, 1]),
        helper.make_node("MatMul", ["yt", "table"], [PROJECT_MOMENTS]),
        helper.make_node("ReduceSumSquare", ["y"], [PROJECT_NORM], axes=[1, 2], keepdims=0),
        helper.make_node("Identity", ["constants"], [PROJECT_CONSTANTS]),
        helper.make_node("Identity", ["centre"], [PROJECT_CENTRE]),
    ]
    graph = helper.make_graph(
        nodes, "rigcast_refine_moments",
        [helper.make_tensor_value_info(PROJECT_POINTS, TensorProto.FLOAT, ["N", s, 3])],
        [helper.make_tensor_value_info(PROJECT_MOMENTS, TensorProto.FLOAT, ["N", 3, width]),
         helper.make_tensor_value_info(PROJECT_NORM, TensorProto.FLOAT, ["N"]),
         helper.make_tensor_value_info(PROJECT_CONSTANTS, TensorProto.DOUBLE, [4, width]),
         helper.make_tensor_value_info(PROJECT_CENTRE, TensorProto.DOUBLE, [3])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString()
