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
from rigcast.export.bundling.synthetic_bundle import forward_graph, inverse_graph
from rigcast.runtime.bundle import BundleError, load_bundle, write_bundle
from rigcast.runtime.solve.inference import ForwardModel, InverseModel, open_session
from rigcast.runtime.solve.manifold import floor_for_bundle, training_fit_error
from rigcast.runtime.solve.pipeline import load_stream_model, rotation_to_quaternion
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


