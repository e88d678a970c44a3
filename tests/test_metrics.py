"""Quality metrics against their loop twins and hand-computed values."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from rigcast.export.quality.metrics import (
    MetricError,
    active_controls,
    active_controls_naive,
    bbox_diagonal,
    control_error,
    jitter,
    jitter_naive,
    vertex_distances,
    vertex_distances_naive,
    vertex_error,
)

finite = st.floats(-10, 10, allow_nan=False, width=32)


@settings(max_examples=30, deadline=None)
@given(
    arrays(np.float32, (3, 5, 3), elements=finite), arrays(np.float32, (3, 5, 3), elements=finite)
)
def test_vertex_distances_match_twin(a: np.ndarray, b: np.ndarray) -> None:
    np.testing.assert_allclose(
        vertex_distances(a, b), vertex_distances_naive(a, b), rtol=1e-9, atol=1e-9
    )


def test_vertex_error_hand_computed() -> None:
    ref = np.zeros((2, 2, 3))
    pred = ref.copy()
    pred[0, 0] = [3.0, 4.0, 0.0]  # distance 5
    pred[1, 1] = [0.0, 0.0, 1.0]  # distance 1
    e = vertex_error(pred, ref)
    assert e.mean == pytest.approx(6.0 / 4)
    assert e.max == 5.0
    np.testing.assert_allclose(e.per_frame_mean, [2.5, 0.5])
    np.testing.assert_allclose(e.per_frame_max, [5.0, 1.0])
    with pytest.raises(MetricError, match="shapes differ"):
        vertex_error(pred[:1], ref)


@settings(max_examples=30, deadline=None)
@given(arrays(np.float64, (6, 4), elements=st.floats(-2, 2, allow_nan=False)))
def test_jitter_and_active_match_twins(w: np.ndarray) -> None:
    lo, hi = np.array([-2.0, -1.0, 0.0, -3.0]), np.array([2.0, 3.0, 0.5, 1.0])
    d = np.array([0.0, 0.0, 0.0, -1.0])
    assert jitter(w, lo, hi) == pytest.approx(jitter_naive(w, lo, hi), rel=1e-9, abs=1e-12)
    np.testing.assert_array_equal(
        active_controls(w, d, lo, hi), active_controls_naive(w, d, lo, hi)
    )


def test_jitter_hand_computed() -> None:
    t = np.arange(10, dtype=np.float64)
    lo, hi = np.array([0.0, 0.0]), np.array([1.0, 4.0])
    ramp = np.stack([0.1 * t, 0.2 * t], axis=1)
    assert jitter(ramp, lo, hi) == pytest.approx(0.0, abs=1e-12)
    # w = t^2 has second difference 2 everywhere: 2/1 and 2/4 -> RMS sqrt((4 + 0.25) / 2).
    quad = np.stack([t**2, t**2], axis=1)
    assert jitter(quad, lo, hi) == pytest.approx(np.sqrt((4.0 + 0.25) / 2))
    with pytest.raises(MetricError, match="T >= 3"):
        jitter(quad[:2], lo, hi)


def test_active_controls_threshold_and_control_error() -> None:
    lo, hi, d = np.zeros(3), np.array([1.0, 10.0, 1.0]), np.zeros(3)
    w = np.array([[0.005, 0.2, 1.0], [0.02, 0.05, 0.0]])
    # 1% of range: 0.01, 0.1, 0.01
    np.testing.assert_array_equal(active_controls(w, d, lo, hi), [2, 1])
    e = control_error(w, np.zeros_like(w), lo, hi)
    assert e.mean_abs == pytest.approx(w.sum() / 6)
    assert e.mean_abs_norm == pytest.approx((0.005 + 0.02 + 1.0 + 0.02 + 0.005) / 6)
    assert e.max_abs_norm == pytest.approx(1.0)
    with pytest.raises(MetricError, match="positive"):
        control_error(w, w, hi, lo)


def test_bbox_diagonal_of_unit_cube() -> None:
    corners = np.array(np.meshgrid([0, 1], [0, 1], [0, 1])).reshape(3, -1).T
    assert bbox_diagonal(corners) == pytest.approx(np.sqrt(3.0))
