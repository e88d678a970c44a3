"""The solve's array stages (runtime/solve/stages.py) against their naive twins."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.runtime.solve.align import RigidBatch, fit_rigid_batch
from rigcast.runtime.solve.stages import (
    GATHER_SLICE,
    clamp,
    clamp_naive,
    fit_error,
    fit_error_naive,
    gather_inputs,
    gather_inputs_naive,
)
from scipy.spatial.transform import Rotation

seeds = st.integers(min_value=0, max_value=2**32 - 1)


def _rigid(rng: np.random.Generator, b: int) -> RigidBatch:
    rot = Rotation.random(b, random_state=rng).as_matrix()
    return RigidBatch(rot, rng.normal(size=(b, 3)), rng.uniform(0.5, 2.0, b), np.zeros(b))


@settings(max_examples=30, deadline=None)
@given(seed=seeds, b=st.integers(1, 4), posed=st.booleans())
def test_gather_inputs_equals_its_naive_twin(seed: int, b: int, posed: bool) -> None:
    rng = np.random.default_rng(seed)
    frames = rng.normal(size=(b, 500, 3)).astype(np.float32)
    indices = rng.choice(500, size=64, replace=False)
    rigid = _rigid(rng, b) if posed else None
    out = np.full((b, 64, 3), np.nan, np.float32)
    got = gather_inputs(frames, indices, rigid, out)
    assert got is out and got.dtype == np.float32
    np.testing.assert_allclose(got, gather_inputs_naive(frames, indices, rigid), rtol=1e-5,
                               atol=1e-5)
    if not posed:
        np.testing.assert_array_equal(got, frames[:, indices])


def test_gather_inputs_in_slices_gives_the_whole_batch_bits() -> None:
    """A batch longer than GATHER_SLICE is gathered and moved slice by slice (for the cache):
    the same bits as moving it whole, and its naive twin's numbers."""
    rng = np.random.default_rng(5)
    b = 2 * GATHER_SLICE + 7
    frames = rng.normal(size=(b, 300, 3)).astype(np.float32)
    indices = rng.choice(300, size=90, replace=False)
    rigid = _rigid(rng, b)
    got = gather_inputs(frames, indices, rigid)
    np.testing.assert_array_equal(got, rigid.apply(np.take(frames, indices, axis=1)))
    np.testing.assert_allclose(got, gather_inputs_naive(frames, indices, rigid), rtol=1e-5,
                               atol=1e-5)


@settings(max_examples=30, deadline=None)
@given(seed=seeds, b=st.integers(1, 5))
def test_clamp_equals_its_naive_twin(seed: int, b: int) -> None:
    rng = np.random.default_rng(seed)
    lo = rng.uniform(-1, 0, 6).astype(np.float32)
    hi = (lo + rng.uniform(0.1, 2, 6)).astype(np.float32)
    values = rng.normal(size=(b, 6))
    values[0] = (lo + hi) / 2  # one frame inside: not clipped
    fast, clipped = clamp(values, lo, hi)
    slow, clipped_slow = clamp_naive(values, lo, hi)
    np.testing.assert_array_equal(fast, slow)
    np.testing.assert_array_equal(clipped, clipped_slow)
    assert not clipped[0] and fast.dtype == np.float32


@settings(max_examples=30, deadline=None)
@given(n=st.integers(3, 120), seed=seeds, posed=st.booleans(), weighted=st.booleans())
def test_fit_error_equals_its_naive_twin(n: int, seed: int, posed: bool, weighted: bool) -> None:
    rng = np.random.default_rng(seed)
    b = 3
    predicted = rng.normal(size=(b, n, 3)).astype(np.float32)
    observed = (predicted + rng.normal(scale=0.01, size=(b, n, 3))).astype(np.float32)
    rigid = _rigid(rng, b) if posed else None
    weights = rng.uniform(0.5, 3.0, n).astype(np.float32) if weighted else None
    fast = fit_error(predicted, observed, rigid, weights)
    slow = fit_error_naive(predicted, observed, rigid, weights)
    np.testing.assert_allclose(fast[0], slow[0], rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(fast[1], slow[1], rtol=1e-4, atol=1e-6)


def test_fit_error_of_a_mesh_on_itself_is_zero_after_its_own_fit() -> None:
    rng = np.random.default_rng(1)
    neutral = rng.normal(size=(50, 3))
    rot = Rotation.random(random_state=rng).as_matrix()
    frame = (neutral @ rot.T + 1.0).astype(np.float32)[None]
    rigid = fit_rigid_batch(frame, neutral)
    rms, worst = fit_error(neutral[None].astype(np.float32), frame, rigid)
    assert rms[0] == pytest.approx(0.0, abs=1e-5) and worst[0] == pytest.approx(0.0, abs=1e-5)
