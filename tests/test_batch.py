"""Batch solve: batched Kabsch against the single-frame fit, equality with the per-frame live
pipeline, zero-phase smoothing without lag, fit error and off-manifold flags, bad input."""

from __future__ import annotations

import numpy as np
import pytest
from rigcast.export.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.align import fit_rigid, stabilise
from rigcast.runtime.batch import (
    BatchError,
    BatchSolver,
    fit_rigid_batch,
    fit_rigid_batch_naive,
    solve_take,
)
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.inference import InverseModel
from rigcast.runtime.one_euro import OneEuroFilter, OneEuroParams

RIG = dict(vertices=300, controls=8, inputs=40, stable=16, seed=0)


@pytest.fixture(scope="module")
def bundle(tmp_path_factory: pytest.TempPathFactory) -> Bundle:
    path = tmp_path_factory.mktemp("b") / "synthetic.rcb"
    build_synthetic_bundle(path, inverse="lstsq", **RIG)
    return load_bundle(path)


def _rotations(n: int, rng: np.random.Generator, max_angle: float = 0.4) -> np.ndarray:
    """(n, 3, 3) rotations from random axis-angle (Rodrigues' formula)."""
    axis = rng.normal(size=(n, 3))
    axis /= np.linalg.norm(axis, axis=1, keepdims=True)
    ang = rng.uniform(-max_angle, max_angle, n)
    k = np.zeros((n, 3, 3))
    k[:, 0, 1], k[:, 0, 2], k[:, 1, 2] = -axis[:, 2], axis[:, 1], -axis[:, 0]
    k = k - k.transpose(0, 2, 1)
    s, c = np.sin(ang)[:, None, None], np.cos(ang)[:, None, None]
    return np.eye(3)[None] + s * k + (1 - c) * (k @ k)


def _take(t: int, seed: int = 1, head: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A take of the synthetic rig: smooth controls, head motion, little noise."""
    rig = make_synthetic_rig(RIG["vertices"], RIG["controls"], inputs=RIG["inputs"],
                             stable=RIG["stable"], seed=RIG["seed"])
    rng = np.random.default_rng(seed)
    times = np.arange(t) / 60.0
    phase = rng.uniform(0, 2 * np.pi, RIG["controls"])
    truth = 0.5 + 0.4 * np.sin(2 * np.pi * 0.7 * times[:, None] + phase[None])
    meshes = rig.evaluate(truth).astype(np.float64)
    if head:
        rot = _rotations(t, rng)
        trans = rng.normal(scale=0.1, size=(t, 1, 3))
        meshes = np.einsum("tij,tvj->tvi", rot, meshes) + trans
    meshes += rng.normal(scale=1e-4, size=meshes.shape)
    return meshes.astype(np.float32), times, truth


@pytest.mark.parametrize("scale", [False, True])
def test_batched_kabsch_agrees_with_single_frame_fit(scale: bool) -> None:
    rng = np.random.default_rng(3)
    target = rng.normal(size=(20, 3))
    rot = _rotations(12, rng, max_angle=3.0)
    s = rng.uniform(0.5, 2.0, 12) if scale else np.ones(12)
    src = np.einsum("tij,nj->tni", rot, target) * s[:, None, None] + rng.normal(size=(12, 1, 3))
    src += rng.normal(scale=0.01, size=src.shape)
    fast = fit_rigid_batch(src, target, scale=scale)
    slow = fit_rigid_batch_naive(src, target, scale=scale)
    np.testing.assert_allclose(fast.rotation, slow.rotation, atol=1e-9)
    np.testing.assert_allclose(fast.translation, slow.translation, atol=1e-9)
    np.testing.assert_allclose(fast.scale, slow.scale, atol=1e-9)
    np.testing.assert_allclose(fast.mse, slow.mse, atol=1e-9)
    assert np.allclose(np.linalg.det(fast.rotation), 1.0)
    # and the fit undoes the motion it was given
    single = fit_rigid(src[0], target, scale=scale)
    np.testing.assert_allclose(fast.apply(src)[0], single.apply(src[0]), atol=1e-5)


def test_batched_kabsch_handles_reflection() -> None:
    """A mirrored point set must still give a proper rotation (Umeyama 1991, eq. 39-40)."""
    rng = np.random.default_rng(4)
    target = rng.normal(size=(10, 3))
    mirrored = target * np.array([1.0, 1.0, -1.0])
    fast = fit_rigid_batch(mirrored[None], target)
    assert np.linalg.det(fast.rotation[0]) == pytest.approx(1.0)
    np.testing.assert_allclose(fast.rotation[0], fit_rigid(mirrored, target).rotation, atol=1e-9)


def _per_frame(bundle: Bundle, meshes: np.ndarray, times: np.ndarray,
               params: OneEuroParams) -> np.ndarray:
    """The live pipeline, one frame at a time: stabilise, infer, One Euro, clamp."""
    model = InverseModel(bundle, threads=1)
    filt = OneEuroFilter(params, gap_ns=250_000_000)
    neutral_stable = bundle.neutral[bundle.stable_indices]
    out = []
    for i, frame in enumerate(meshes):
        transform, _ = stabilise(frame, bundle.stable_indices, neutral_stable)
        inputs = transform.apply(frame[bundle.input_indices]).astype(np.float32)
        raw = model.solve(inputs[None])[0]
        y = filt(raw, round(times[i] * 1e9), i)
        out.append(np.clip(y, bundle.schema.lower, bundle.schema.upper))
    return np.array(out)


def test_batch_equals_per_frame_pipeline(bundle: Bundle) -> None:
    meshes, times, _ = _take(300)
    times[150:] += 0.5  # a stream gap: both must reset the filter there
    params = OneEuroParams.uniform(bundle.control_count, min_cutoff=1.5, beta=0.3)
    batch = solve_take(bundle, meshes, times, filter="causal", params=params, batch_size=64)
    ref = _per_frame(bundle, meshes, times, params)
    np.testing.assert_allclose(batch.controls, ref, atol=1e-5)
    assert batch.controls.shape == (300, bundle.control_count)
    assert batch.frames_per_second > 0 and batch.seconds > 0


def test_batch_recovers_controls_under_head_motion(bundle: Bundle) -> None:
    meshes, times, truth = _take(200)
    result = solve_take(bundle, meshes, times, filter="none")
    assert np.abs(result.controls - truth).max() < 0.02
    assert float(np.nanmax(result.fit_rms)) < 1e-3
    assert not result.off_manifold.any()
    # without stabilisation the head motion ruins the solve: the stage does real work
    loose = solve_take(bundle, meshes, times, filter="none", stabilise=False)
    assert np.abs(loose.controls - truth).max() > 0.1


def test_off_manifold_frames_are_flagged(bundle: Bundle) -> None:
    meshes, times, _ = _take(50, head=False)
    rng = np.random.default_rng(7)
    moving = np.setdiff1d(np.arange(bundle.vertex_count), bundle.stable_indices)
    meshes[20, moving] += rng.normal(scale=0.05, size=(moving.size, 3)).astype(np.float32)
    result = solve_take(bundle, meshes, times, filter="none", off_manifold_threshold=0.01)
    assert list(np.flatnonzero(result.off_manifold)) == [20]
    assert result.fit_max[20] > result.fit_rms[20] > 0.01
    quick = solve_take(bundle, meshes, times, filter="none", fit_error=False)
    assert np.isnan(quick.fit_rms).all() and not quick.off_manifold.any()


def test_zero_phase_has_no_lag_on_a_symmetric_bump(bundle: Bundle) -> None:
    rig = make_synthetic_rig(RIG["vertices"], RIG["controls"], inputs=RIG["inputs"],
                             stable=RIG["stable"], seed=RIG["seed"])
    t = 241
    times = np.arange(t) / 60.0
    truth = np.full((t, RIG["controls"]), 0.1)
    truth[:, 2] += 0.7 * np.exp(-0.5 * ((times - times[120]) / 0.15) ** 2)  # peak at frame 120
    meshes = rig.evaluate(truth)
    solver = BatchSolver(bundle, threads=1)
    smooth = solver.solve(meshes, times, filter="zero_phase", smooth_hz=2.0, fit_error=False)
    causal = solver.solve(meshes, times, filter="causal", fit_error=False,
                          params=OneEuroParams.uniform(RIG["controls"], min_cutoff=2.0))
    assert int(np.argmax(smooth.controls[:, 2])) == 120
    assert int(np.argmax(causal.controls[:, 2])) > 123  # a causal low pass lags
    # symmetric input, symmetric output
    np.testing.assert_allclose(smooth.controls[:120, 2], smooth.controls[:120:-1, 2][:120],
                               atol=5e-3)


def test_bad_takes_are_refused(bundle: Bundle) -> None:
    meshes, times, _ = _take(10, head=False)
    with pytest.raises(BatchError, match=r"\(T, 300, 3\)"):
        solve_take(bundle, meshes[:, :299], times)
    bad = meshes.copy()
    bad[4, 7, 1] = np.nan
    with pytest.raises(BatchError, match="frame 4"):
        solve_take(bundle, bad, times)
    with pytest.raises(BatchError, match="increasing"):
        solve_take(bundle, meshes, times[::-1])
    with pytest.raises(BatchError, match="filter"):
        solve_take(bundle, meshes, times, filter="median")

