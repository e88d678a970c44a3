"""Rigid alignment: Umeyama (1991) against SciPy, its naive twin, and properties."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.runtime.solve.align import (
    AlignError,
    RigidTransform,
    fit_rigid,
    fit_rigid_batch,
    fit_rigid_naive,
    fit_rigid_pairs,
    stable_target,
)
from scipy.spatial.transform import Rotation

seeds = st.integers(min_value=0, max_value=2**32 - 1)


def _random_transform(rng: np.random.Generator, with_scale: bool) -> RigidTransform:
    rotation = Rotation.random(random_state=rng).as_matrix()
    scale = float(rng.uniform(0.5, 2.0)) if with_scale else 1.0
    return RigidTransform(rotation, rng.normal(scale=3.0, size=3), scale)


def test_rotation_matches_scipy_align_vectors() -> None:
    # Reference: scipy.spatial.transform.Rotation.align_vectors(a, b) finds R minimising
    # Σ |a_i - R b_i|^2 over the given vectors (Kabsch); on centred points this is the rotation
    # of our fit with source b and target a.
    rng = np.random.default_rng(0)
    source = rng.normal(size=(40, 3))
    target = source @ Rotation.random(random_state=rng).as_matrix().T + rng.normal(
        scale=0.05, size=(40, 3)
    )
    ours = fit_rigid(source, target)
    a = target - target.mean(axis=0)
    b = source - source.mean(axis=0)
    ref, _ = Rotation.align_vectors(a, b)
    np.testing.assert_allclose(ours.rotation, ref.as_matrix(), atol=1e-10)


def test_weighted_rotation_matches_scipy() -> None:
    # Same reference with weights: align_vectors(a, b, weights) minimises Σ w_i |a_i - R b_i|^2;
    # the centring must use the weighted means.
    rng = np.random.default_rng(1)
    source = rng.normal(size=(30, 3))
    target = source @ Rotation.random(random_state=rng).as_matrix().T + rng.normal(
        scale=0.1, size=(30, 3)
    )
    w = rng.uniform(0.1, 3.0, size=30)
    ours = fit_rigid_naive(source, target, weights=w)  # the product fits unweighted; the twin
    # carries the weighted form, checked here against SciPy
    mu_s = (w[:, None] * source).sum(0) / w.sum()
    mu_t = (w[:, None] * target).sum(0) / w.sum()
    ref, _ = Rotation.align_vectors(target - mu_t, source - mu_s, weights=w)
    np.testing.assert_allclose(ours.rotation, ref.as_matrix(), atol=1e-10)


@settings(max_examples=60, deadline=None)
@given(seed=seeds, with_scale=st.booleans(), n=st.integers(min_value=3, max_value=60))
def test_recovers_known_transform_exactly(seed: int, with_scale: bool, n: int) -> None:
    rng = np.random.default_rng(seed)
    source = rng.normal(size=(n, 3))
    truth = _random_transform(rng, with_scale)
    fitted = fit_rigid(source, truth.apply(source), scale=with_scale)
    np.testing.assert_allclose(fitted.rotation, truth.rotation, atol=1e-8)
    np.testing.assert_allclose(fitted.translation, truth.translation, atol=1e-7)
    assert fitted.scale == pytest.approx(truth.scale, rel=1e-9)
    assert np.linalg.det(fitted.rotation) == pytest.approx(1.0)


@settings(max_examples=40, deadline=None)
@given(seed=seeds, with_scale=st.booleans())
def test_fast_and_naive_agree(seed: int, with_scale: bool) -> None:
    rng = np.random.default_rng(seed)
    source = rng.normal(size=(25, 3))
    target = rng.normal(size=(25, 3))  # unrelated points: the hardest case for agreement
    fast = fit_rigid(source, target, scale=with_scale)
    slow = fit_rigid_naive(source, target, scale=with_scale)
    np.testing.assert_allclose(fast.rotation, slow.rotation, atol=1e-9)
    np.testing.assert_allclose(fast.translation, slow.translation, atol=1e-9)
    assert fast.scale == pytest.approx(slow.scale, rel=1e-9)


@settings(max_examples=40, deadline=None)
@given(seed=seeds, with_scale=st.booleans())
def test_apply_inverse_round_trip(seed: int, with_scale: bool) -> None:
    rng = np.random.default_rng(seed)
    t = _random_transform(rng, with_scale)
    points = rng.normal(size=(4, 5, 3))
    np.testing.assert_allclose(t.inverse().apply(t.apply(points)), points, atol=1e-10)
    ident = t.compose(t.inverse())
    np.testing.assert_allclose(ident.rotation, np.eye(3), atol=1e-12)
    np.testing.assert_allclose(ident.translation, 0.0, atol=1e-12)


def test_float32_inputs() -> None:
    rng = np.random.default_rng(3)
    source = rng.normal(size=(200, 3)).astype(np.float32)
    truth = _random_transform(rng, True)
    target = truth.apply(source.astype(np.float64)).astype(np.float32)
    fitted = fit_rigid(source, target, scale=True)
    assert fitted.rotation.dtype == np.float64
    np.testing.assert_allclose(fitted.rotation, truth.rotation, atol=1e-5)
    assert fitted.scale == pytest.approx(truth.scale, rel=1e-5)
    assert fitted.apply(source).dtype == np.float32


def test_reflection_is_corrected() -> None:
    # A mirrored target: the best *proper* rotation must come back, never a reflection.
    rng = np.random.default_rng(4)
    source = rng.normal(size=(50, 3))
    target = source * np.array([1.0, 1.0, -1.0])
    fitted = fit_rigid(source, target)
    assert np.linalg.det(fitted.rotation) == pytest.approx(1.0)
    np.testing.assert_allclose(fitted.rotation @ fitted.rotation.T, np.eye(3), atol=1e-12)


def test_stabilising_fit_maps_frame_onto_neutral_and_reports_residual() -> None:
    rng = np.random.default_rng(5)
    neutral = rng.normal(size=(500, 3)).astype(np.float32)
    stable = rng.choice(500, size=120, replace=False)
    head = _random_transform(rng, False)
    frame = head.apply(neutral.astype(np.float64)).astype(np.float32)
    fit = fit_rigid_batch(frame[None, stable], stable_target(neutral[stable]))
    np.testing.assert_allclose(fit.pose(0).apply(frame), neutral, atol=1e-4)
    assert fit.rms[0] < 1e-4
    # Moving the stable vertices raises the residual by the amount of the move (RMS).
    noisy = frame.copy()
    noisy[stable] += rng.normal(scale=0.01, size=(120, 3)).astype(np.float32)
    rms_noisy = fit_rigid_batch(noisy[None, stable], neutral[stable]).rms[0]
    aligned = fit_rigid(noisy[stable], neutral[stable]).apply(noisy[stable].astype(np.float64))
    direct = float(np.sqrt(((aligned - neutral[stable]) ** 2).sum(axis=1).mean()))
    assert rms_noisy == pytest.approx(direct, rel=1e-6)


@settings(max_examples=40, deadline=None)
@given(seed=seeds, with_scale=st.booleans(), noise=st.sampled_from([0.0, 0.01, 1.0]))
def test_batched_fit_agrees_with_the_naive_fit_frame_by_frame(seed: int, with_scale: bool,
                                                              noise: float) -> None:
    # The product's fit (precomputed neutral statistics, all frames at once) against the
    # loop-based twin per frame; noise=1.0 makes the point sets nearly unrelated.
    rng = np.random.default_rng(seed)
    neutral = rng.normal(size=(40, 3)).astype(np.float32)
    frames = []
    for _ in range(4):
        frame = _random_transform(rng, with_scale).apply(neutral.astype(np.float64))
        frames.append(frame + rng.normal(scale=noise, size=(40, 3)))
    src = np.asarray(frames, np.float32)
    fast = fit_rigid_batch(src, stable_target(neutral), scale=with_scale)
    for b in range(src.shape[0]):
        naive = fit_rigid_naive(src[b], neutral, scale=with_scale)
        np.testing.assert_allclose(fast.rotation[b], naive.rotation, atol=1e-8)
        np.testing.assert_allclose(fast.translation[b], naive.translation, atol=1e-6)
        assert fast.scale[b] == pytest.approx(naive.scale, rel=1e-8)
        moved = naive.apply(src[b].astype(np.float64))
        direct = float(np.sqrt(((moved - neutral) ** 2).sum(axis=1).mean()))
        # abs: the RMS comes from moments (float32 frame), so near 0 it can round to 0.
        assert fast.rms[b] == pytest.approx(direct, rel=1e-5, abs=1e-6)
    assert np.allclose(np.linalg.det(fast.rotation), 1.0)
    moved32 = fast.apply(src)
    assert moved32.dtype == np.float32
    np.testing.assert_allclose(moved32[1], fast.pose(1).apply(src[1].astype(np.float64)),
                               atol=1e-4)


@settings(max_examples=30, deadline=None)
@given(seed=seeds, with_scale=st.booleans(), noise=st.sampled_from([0.0, 0.01, 1.0]))
def test_per_frame_target_fit_agrees_with_the_naive_fit(seed: int, with_scale: bool,
                                                        noise: float) -> None:
    """fit_rigid_pairs (each frame its own target: the realignment's fit) against the
    loop-based twin frame by frame, residual included; float32 frames are fitted in float32
    products, so to float32's precision."""
    rng = np.random.default_rng(seed)
    targets = rng.normal(size=(3, 50, 3))
    src = np.stack([_random_transform(rng, with_scale).inverse().apply(t)
                    + rng.normal(scale=noise, size=t.shape) for t in targets]).astype(np.float32)
    fast = fit_rigid_pairs(src, targets, scale=with_scale)
    for b in range(3):
        naive = fit_rigid_naive(src[b], targets[b], scale=with_scale)
        np.testing.assert_allclose(fast.rotation[b], naive.rotation, atol=1e-5)
        np.testing.assert_allclose(fast.translation[b], naive.translation, atol=1e-4)
        assert fast.scale[b] == pytest.approx(naive.scale, rel=1e-5)
        moved = naive.apply(src[b].astype(np.float64))
        direct = float(np.sqrt(((moved - targets[b]) ** 2).sum(axis=1).mean()))
        # the closed-form residual of float32 moments (the realignment keeps the stable fit's):
        # mse = var_t + var_s - 2 tr(DS) cancels, leaving about sqrt(eps32 (var_s + var_t)),
        # a few 1e-3 on these points (~3 units from the origin); seed 891481179 gave 1.003e-3
        # where 0 was exact
        second = float((src[b].astype(np.float64) ** 2).sum(axis=1).mean()
                       + (targets[b] ** 2).sum(axis=1).mean())
        spread = float(np.sqrt(np.finfo(np.float32).eps * 4 * second))
        assert fast.rms[b] == pytest.approx(direct, rel=1e-4, abs=max(1e-3, spread))
    with pytest.raises(AlignError, match="both be"):
        fit_rigid_pairs(src, targets[:2])


def test_batched_fit_corrects_a_reflection_per_frame() -> None:
    """A mirrored frame beside a plain one: each gets a proper rotation (Umeyama 1991,
    eq. 39-40), and the plain one is not disturbed by its neighbour's correction."""
    rng = np.random.default_rng(4)
    target = rng.normal(size=(10, 3))
    src = np.stack([target * np.array([1.0, 1.0, -1.0]), target])
    fast = fit_rigid_batch(src, target)
    np.testing.assert_allclose(np.linalg.det(fast.rotation), 1.0)
    np.testing.assert_allclose(fast.rotation[0], fit_rigid_naive(src[0], target).rotation,
                               atol=1e-9)
    np.testing.assert_allclose(fast.rotation[1], np.eye(3), atol=1e-12)


def test_batched_fit_checks_shapes() -> None:
    target = stable_target(np.eye(3, dtype=np.float32) + 1.0)
    with pytest.raises(AlignError, match=r"\(B, 3, 3\)"):
        fit_rigid_batch(np.zeros((1, 4, 3), np.float32), target)
    with pytest.raises(AlignError, match="S >= 3"):
        stable_target(np.zeros((2, 3)))


def test_bad_inputs_are_named() -> None:
    with pytest.raises(AlignError, match="at least 3"):
        fit_rigid(np.zeros((2, 3)), np.zeros((2, 3)))
    with pytest.raises(AlignError, match=r"\(N, 3\)"):
        fit_rigid(np.zeros((5, 2)), np.zeros((5, 2)))
    with pytest.raises(AlignError, match="coincide"):
        fit_rigid(np.ones((5, 3)), np.zeros((5, 3)) + np.arange(5)[:, None], scale=True)
