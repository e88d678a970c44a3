"""onnxruntime sessions: explicit options, shape checks against the bundle, parity with a plain
session, and the per-frame pure functions of the pipeline."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest
from conftest import OTHER, TINY, tiny_rig
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.export.synthetic_bundle import forward_graph, inverse_graph
from rigcast.runtime.align import RigidTransform
from rigcast.runtime.bundle import BundleError, load_bundle, write_bundle
from rigcast.runtime.inference import ForwardModel, InverseModel, open_session
from rigcast.runtime.manifold import floor_for_bundle, training_fit_error
from rigcast.runtime.pipeline import (
    clamp,
    fit_error,
    fit_error_naive,
    fit_error_posed,
    load_stream_model,
    rotation_to_quaternion,
)
from scipy.spatial.transform import Rotation


def test_session_options_are_explicit(tiny_bundle: Path) -> None:
    sess = open_session(load_bundle(tiny_bundle).inverse_onnx, threads=1)
    opts = sess.get_session_options()
    assert opts.intra_op_num_threads == 1
    assert opts.inter_op_num_threads == 1
    assert opts.execution_mode == ort.ExecutionMode.ORT_SEQUENTIAL
    assert opts.graph_optimization_level == ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    assert sess.get_providers() == ["CPUExecutionProvider"]


def test_models_match_a_plain_session_and_the_rig(tiny_bundle: Path) -> None:
    bundle = load_bundle(tiny_bundle)
    rig = tiny_rig(TINY)
    inv, fwd = InverseModel(bundle), ForwardModel(bundle)
    w = np.random.default_rng(0).uniform(0, 1, (4, TINY["controls"])).astype(np.float32)
    meshes = rig.evaluate(w)
    subset = np.ascontiguousarray(meshes[:, bundle.input_indices])
    plain = ort.InferenceSession(bundle.inverse_onnx, providers=["CPUExecutionProvider"])
    np.testing.assert_array_equal(inv.solve(subset), plain.run(None, {"mesh": subset})[0])
    # The synthetic inverse is an exact least-squares solve and the forward the rig itself.
    np.testing.assert_allclose(inv.solve(subset), w, atol=1e-4)
    np.testing.assert_allclose(fwd.evaluate(w), meshes, atol=1e-5)


def _mismatched(tmp_path: Path, which: str) -> Path:
    rig, other = tiny_rig(TINY), tiny_rig(OTHER)
    graphs = {"inverse_onnx": inverse_graph(rig), "forward_onnx": forward_graph(rig)}
    graphs[f"{which}_onnx"] = (inverse_graph(other) if which == "inverse"
                               else forward_graph(other))
    return write_bundle(tmp_path / f"bad_{which}.rcb", name="bad", schema=rig.schema,
                        neutral=rig.neutral, faces=rig.faces, stable_indices=rig.stable_indices,
                        input_indices=rig.input_indices, **graphs)


@pytest.mark.parametrize(("which", "words"), [("inverse", r"inverse graph input 'mesh' has shape"),
                                              ("forward", r"forward graph input 'controls'")])
def test_a_graph_that_does_not_fit_the_bundle_is_a_bundle_error(
        tmp_path: Path, which: str, words: str) -> None:
    path = _mismatched(tmp_path, which)
    with pytest.raises(BundleError, match=words):
        load_stream_model(path, threads=1, threshold=None, factor=3.0)


def test_garbage_graph_is_a_bundle_error(tiny_bundle: Path) -> None:
    with pytest.raises(BundleError, match="onnxruntime cannot load"):
        open_session(b"not an onnx graph", threads=1)


def test_threshold_comes_from_training_figures_or_the_diagonal(tiny_bundle: Path,
                                                               tmp_path: Path) -> None:
    model = load_stream_model(tiny_bundle, threads=1, threshold=None, factor=3.0)
    assert training_fit_error(model.bundle.manifest) == pytest.approx(0.002)
    assert model.floor == pytest.approx(0.006) and model.fixed_threshold is None
    explicit = load_stream_model(tiny_bundle, threads=1, threshold=0.5, factor=3.0)
    assert explicit.fixed_threshold == 0.5
    # No training figure: the floor is 0.1% of the neutral's bounding-box diagonal.
    diag = float(np.linalg.norm(np.ptp(model.bundle.neutral, axis=0)))
    assert floor_for_bundle({}, model.bundle.neutral) == pytest.approx(0.001 * diag)
    assert training_fit_error({"training": {"inverse_fit_rms": float("nan")}}) is None


def test_clamp_reports_clipping() -> None:
    lo, hi = np.zeros(3, np.float32), np.ones(3, np.float32)
    out = np.empty(3, np.float32)
    values, clipped = clamp(np.array([0.5, 0.2, 0.9]), lo, hi, out)
    assert not clipped and np.allclose(values, [0.5, 0.2, 0.9])
    values, clipped = clamp(np.array([-0.1, 0.2, 1.5]), lo, hi, out)
    assert clipped and np.allclose(values, [0.0, 0.2, 1.0])


@settings(max_examples=40, deadline=None)
@given(st.integers(3, 50), st.integers(0, 2**32 - 1))
def test_fit_error_agrees_with_its_naive_twin(n: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, 3)).astype(np.float32)
    b = rng.normal(size=(n, 3)).astype(np.float32)
    fast, naive = fit_error(a, b), fit_error_naive(a, b)
    assert fast == pytest.approx(naive, rel=1e-5)
    assert fit_error(a, a) == (0.0, 0.0)


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_quaternion_matches_scipy(seed: int) -> None:
    # Outside reference: scipy.spatial.transform.Rotation.as_quat (scalar-last x, y, z, w).
    rot = Rotation.random(random_state=seed)
    x, y, z, w = rot.as_quat()
    want = np.array([w, x, y, z]) * (1 if w >= 0 else -1)
    np.testing.assert_allclose(rotation_to_quaternion(rot.as_matrix()), want, atol=1e-9)
    assert math.isclose(float(np.linalg.norm(rotation_to_quaternion(rot.as_matrix()))), 1.0)


def test_quaternion_of_half_turns() -> None:
    for axis in np.eye(3):
        rot = Rotation.from_rotvec(np.pi * axis)
        q = rotation_to_quaternion(rot.as_matrix())
        assert abs(q[0]) < 1e-12 and np.allclose(np.abs(q[1:]), axis)


@settings(max_examples=30, deadline=None)
@given(st.integers(3, 200), st.integers(0, 2**32 - 1), st.booleans())
def test_posed_fit_error_agrees_with_fit_error_of_the_moved_mesh(n: int, seed: int,
                                                                 posed: bool) -> None:
    rng = np.random.default_rng(seed)
    vertices = rng.normal(size=(n, 3)).astype(np.float32)
    predicted = rng.normal(size=(n, 3)).astype(np.float32)
    pose = RigidTransform(Rotation.random(random_state=seed).as_matrix(), rng.normal(size=3),
                          float(rng.uniform(0.5, 2))) if posed else None
    observed = vertices if pose is None else pose.apply(vertices.astype(np.float64))
    want = fit_error_naive(predicted, observed)
    got = fit_error_posed(predicted, vertices, pose, np.empty((n, 3), np.float32),
                          np.empty(n, np.float32))
    assert got == pytest.approx(want, rel=1e-4, abs=1e-5)
