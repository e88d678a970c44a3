"""The synthetic rig's trained inverse (export/bundling/synthetic_trained.py): its forward model is
the rig, its training meshes keep the rig's diagonal, and a short training beats the random
network the latency bench used alone before."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnxruntime as ort
import torch
from rigcast.export.bundling.synthetic_bundle import SyntheticRig, inverse_graph, make_synthetic_rig
from rigcast.export.bundling.synthetic_trained import (
    linear_forward,
    trained_inverse,
    training_vertices,
)
from rigcast.export.training.train_common import diagonal
from rigcast.export.training.train_inverse import InverseConfig


def test_the_forward_model_is_the_rig_on_the_kept_vertices() -> None:
    rig = make_synthetic_rig(900, 6, inputs=40, stable=16, seed=3)
    keep = training_vertices(rig, others=100)
    assert set(rig.input_indices) <= set(keep)
    # the bounding-box extremes are kept: the training's noise scale is the whole rig's
    assert diagonal(rig.neutral[keep]) == diagonal(rig.neutral)
    controls = np.random.default_rng(0).uniform(0, 1, (5, 6)).astype(np.float32)
    with torch.no_grad():
        ours = linear_forward(rig, keep)(torch.from_numpy(controls)).numpy()
    np.testing.assert_allclose(ours, rig.evaluate(controls)[:, keep], atol=1e-6)


def _mesh_error(graph: bytes, rig: SyntheticRig, controls: np.ndarray) -> float:
    session = ort.InferenceSession(graph, providers=["CPUExecutionProvider"])
    meshes = rig.evaluate(controls)
    solved = session.run(None, {session.get_inputs()[0].name:
                                np.ascontiguousarray(meshes[:, rig.input_indices])})[0]
    return float(np.mean(np.linalg.norm(rig.evaluate(solved) - meshes, axis=2)))


def test_a_short_training_beats_the_random_network_and_is_cached(tmp_path: Path) -> None:
    rig = make_synthetic_rig(600, 6, inputs=40, stable=16, seed=3)
    config = InverseConfig(hidden=(64, 64), steps=150, batch=64)
    made = trained_inverse(rig, tmp_path, config, samples=512, others=200)
    assert not made.cached and made.steps == 150
    controls = np.where(np.random.default_rng(1).random((64, 6)) < 0.5,
                        np.random.default_rng(2).random((64, 6)), 0.0).astype(np.float32)
    trained = _mesh_error(made.onnx, rig, controls)
    untrained = _mesh_error(inverse_graph(rig, "mlp", hidden=64, seed=3), rig, controls)
    assert trained < 0.5 * untrained, (trained, untrained)
    again = trained_inverse(rig, tmp_path, config, samples=512, others=200)
    assert again.cached and again.onnx == made.onnx and again.mean_err == made.mean_err
    # another setting is another key
    other = trained_inverse(rig, tmp_path, InverseConfig(hidden=(64, 64), steps=20, batch=64),
                            samples=512, others=200)
    assert not other.cached
