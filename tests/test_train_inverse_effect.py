"""Sparsity by mesh effect (issue 12, "whole expressions are lost"): the inverse's L1 term is set
per control from how much it moves the mesh, so a small, local shape beside a large one is not
shrunk to rest by a penalty whose scale the large one sets."""

from __future__ import annotations

import numpy as np
import pytest
from rigcast.export.training import train
from rigcast.export.training.sparsity import HIDDEN_SNR, hidden_by_noise, l1_coefficients
from rigcast.export.training.train_common import TrainError
from rigcast.export.training.train_inverse import input_scale
from rigcast.runtime.schema import Control, ControlSchema

SMALL = 4  # controls 1..4: small local bumps; control 0: a large shape moving every vertex


def _rig() -> tuple[np.ndarray, np.ndarray, ControlSchema]:
    """A 12 x 12 grid: shape 0 lifts the whole grid by 0.15-0.45; shapes 1-4 are bumps of 0.03
    on about 6 % of the vertices each (about 40x less mesh motion in RMS, like a nostril beside
    a jaw, and about 14x the training's input noise at their peak)."""
    n = 12
    xs, ys = np.meshgrid(np.linspace(0, 1, n), np.linspace(0, 1, n))
    neutral = np.stack([xs.ravel(), ys.ravel(), np.zeros(n * n)], 1).astype(np.float32)
    shapes = np.zeros((1 + SMALL, n * n, 3), np.float32)
    shapes[0, :, 2] = 0.3 * (0.5 + xs.ravel())
    for i, (cx, cy) in enumerate([(0.2, 0.2), (0.8, 0.2), (0.2, 0.8), (0.8, 0.8)]):
        d2 = (neutral[:, 0] - cx) ** 2 + (neutral[:, 1] - cy) ** 2
        shapes[1 + i, :, 1] = 0.03 * np.exp(-d2 / 0.004)
    schema = ControlSchema(tuple(Control(f"shape{i}", 0.0, 1.0, 0.0) for i in range(1 + SMALL)))
    return neutral, shapes, schema


def _poses(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.where(rng.random((n, 1 + SMALL)) < 0.4, rng.random((n, 1 + SMALL)), 0.0).astype(
        np.float32
    )


def _forward() -> tuple:
    neutral, shapes, schema = _rig()
    c = _poses(600, 1)
    x = neutral[None] + np.einsum("bc,cvk->bvk", c, shapes)
    fwd, _ = train.train_forward(
        c, x, neutral, schema.lower, schema.upper,
        train.ForwardConfig(hidden=(16,), components=4, epochs=4, batch=64),
    )
    return fwd, neutral, shapes, input_scale(x, neutral, np.arange(neutral.shape[0]))


@pytest.fixture(scope="module")
def model() -> tuple:
    return _forward()


def _pulls(coef: np.ndarray, e: np.ndarray) -> np.ndarray:
    """The soft threshold of a loss E_c (u - u*)^2 + (coef_c / C) |u|: coef / (2 C E_c)."""
    return coef / (2.0 * len(e) * e)


def _curvatures(shapes: np.ndarray, scale: float) -> np.ndarray:
    """The naive twin of E_c, from the true shapes: mean_v |W_c,v|^2 / (3 scale^2)."""
    return (shapes.astype(np.float64) ** 2).sum(-1).mean(1) / (3.0 * scale * scale)


def test_shared_coefficient_pulls_small_shapes_past_their_range(model: tuple) -> None:
    fwd, neutral, shapes, scale = model
    everything = np.arange(neutral.shape[0])
    coef = l1_coefficients(fwd, everything, scale, 0.05, 0.0)
    assert np.array_equal(coef, np.full(1 + SMALL, 0.05, np.float32))
    pull = _pulls(coef.astype(np.float64), _curvatures(shapes, scale))
    # the failure the per-control coefficients exist for: the large shape sets the scale, and
    # the small ones are pulled to rest by more than their whole range
    assert pull[0] < 0.01 and pull[1:].min() > 1.0, pull


def test_no_control_is_pulled_further_than_the_cap(model: tuple) -> None:
    fwd, neutral, shapes, scale = model
    everything = np.arange(neutral.shape[0])
    coef = l1_coefficients(fwd, everything, scale, 0.05, 0.01).astype(np.float64)
    pull = _pulls(coef, _curvatures(shapes, scale))
    # the small shapes at the cap (the forward model's linear part is this linear rig's, to a
    # few %), the large one keeps the shared coefficient and its smaller pull
    np.testing.assert_allclose(pull[1:], 0.01, rtol=0.05)
    assert coef[0] == pytest.approx(0.05) and pull[0] < 0.01


def test_controls_hidden_by_the_noise_keep_the_shared_coefficient(model: tuple) -> None:
    fwd, neutral, shapes, scale = model
    everything = np.arange(neutral.shape[0])
    # naive twin of the signal-to-noise ratio: each shape's whole-range motion against white
    # noise of sigma per coordinate, sqrt(sum_v |W_c,v|^2) / sigma
    energy = np.sqrt((shapes.astype(np.float64) ** 2).sum(axis=(1, 2)))
    sigma = energy[1:].max() / HIDDEN_SNR * 1.2  # the small shapes under the 3-sigma line
    assert energy[0] / sigma > 10 * HIDDEN_SNR  # ... the large one far above it
    assert hidden_by_noise(fwd, everything, sigma).tolist() == [False] + [True] * SMALL
    coef = l1_coefficients(fwd, everything, scale, 0.05, 0.01, noise=sigma)
    np.testing.assert_allclose(coef[1:], 0.05)
    quiet = l1_coefficients(fwd, everything, scale, 0.05, 0.01, noise=sigma / 100.0)
    assert not hidden_by_noise(fwd, everything, sigma / 100.0).any()
    assert quiet[1:].max() < 0.05 / 10.0


def test_vertex_weights_enter_the_curvature(model: tuple) -> None:
    fwd, neutral, shapes, scale = model
    everything = np.arange(neutral.shape[0])
    # the loss weighs vertices (a region mask): the pull along a control is set by its weighted
    # curvature, so doubling the weight of shape 1's vertices halves its coefficient's need
    weights = np.ones(neutral.shape[0])
    weights[np.abs(shapes[1]).sum(-1) > 1e-6] = 2.0
    plain = l1_coefficients(fwd, everything, scale, 0.05, 0.01).astype(np.float64)
    heavy = l1_coefficients(fwd, everything, scale, 0.05, 0.01, weights=weights)
    assert heavy[1] == pytest.approx(2.0 * plain[1], rel=1e-3)
    np.testing.assert_allclose(heavy[2:], plain[2:], rtol=0.02)


@pytest.mark.parametrize("shrink", [-0.01, 1.5, float("nan")])
def test_a_bad_shrink_is_named(model: tuple, shrink: float) -> None:
    fwd, neutral, shapes, _ = model
    c = _poses(40, 2)
    x = neutral[None] + np.einsum("bc,cvk->bvk", c, shapes)
    _, _, schema = _rig()
    with pytest.raises(TrainError, match="shrink"):
        train.train_inverse(fwd, x, np.arange(8), schema.defaults,
                            train.InverseConfig(steps=2, shrink=shrink), controls=c)
