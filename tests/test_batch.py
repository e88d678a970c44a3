"""Batch solve: batched Kabsch against the single-frame fit, equality with the per-frame live
pipeline, the chunked One Euro and the fit error against their naive twins, subset fit error
against the full one, zero-phase smoothing without lag, off-manifold flags, bad input."""

from __future__ import annotations

import numpy as np
import pytest
from rigcast.export.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.align import fit_rigid, stabilise
from rigcast.runtime.batch import (
    BatchError,
    BatchSolver,
    SolveOptions,
    fit_error_batch,
    fit_error_batch_naive,
    fit_rigid_batch,
    fit_rigid_batch_naive,
    fit_subset,
    one_euro_series,
    solve_take,
)
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.inference import ForwardModel, InverseModel, open_session
from rigcast.runtime.one_euro import OneEuroFilter, OneEuroParams

from rigcast.forward_subset import slice_forward_graph

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
    batch = solve_take(bundle, meshes, times,
                       SolveOptions(filter="causal", params=params, batch_size=64))
    ref = _per_frame(bundle, meshes, times, params)
    np.testing.assert_allclose(batch.controls, ref, atol=1e-5)
    assert batch.controls.shape == (300, bundle.control_count)
    assert batch.frames_per_second > 0 and batch.seconds > 0


def test_batch_recovers_controls_under_head_motion(bundle: Bundle) -> None:
    meshes, times, truth = _take(200)
    result = solve_take(bundle, meshes, times, SolveOptions(filter="none"))
    assert np.abs(result.controls - truth).max() < 0.02
    assert float(np.nanmax(result.fit_rms)) < 1e-3
    assert not result.off_manifold.any()
    # without stabilisation the head motion ruins the solve: the stage does real work
    loose = solve_take(bundle, meshes, times, SolveOptions(filter="none", stabilise=False))
    assert np.abs(loose.controls - truth).max() > 0.1


def test_off_manifold_frames_are_flagged(bundle: Bundle) -> None:
    meshes, times, _ = _take(50, head=False)
    rng = np.random.default_rng(7)
    moving = np.setdiff1d(np.arange(bundle.vertex_count), bundle.stable_indices)
    meshes[20, moving] += rng.normal(scale=0.05, size=(moving.size, 3)).astype(np.float32)
    result = solve_take(bundle, meshes, times,
                        SolveOptions(filter="none", off_manifold_threshold=0.01))
    assert list(np.flatnonzero(result.off_manifold)) == [20]
    assert result.fit_max[20] > result.fit_rms[20] > 0.01
    assert np.all(result.thresholds == 0.01)
    quick = solve_take(bundle, meshes, times, SolveOptions(filter="none", fit_error="off"))
    assert np.isnan(quick.fit_rms).all() and not quick.off_manifold.any()
    assert quick.fit_error == "off" and quick.fit_vertices == 0


def test_zero_phase_has_no_lag_on_a_symmetric_bump(bundle: Bundle) -> None:
    rig = make_synthetic_rig(RIG["vertices"], RIG["controls"], inputs=RIG["inputs"],
                             stable=RIG["stable"], seed=RIG["seed"])
    t = 241
    times = np.arange(t) / 60.0
    truth = np.full((t, RIG["controls"]), 0.1)
    truth[:, 2] += 0.7 * np.exp(-0.5 * ((times - times[120]) / 0.15) ** 2)  # peak at frame 120
    meshes = rig.evaluate(truth)
    solver = BatchSolver(bundle, threads=1)
    smooth = solver.solve(meshes, times,
                          SolveOptions(filter="zero_phase", smooth_hz=2.0, fit_error="off"))
    causal = solver.solve(meshes, times, SolveOptions(
        filter="causal", fit_error="off",
        params=OneEuroParams.uniform(RIG["controls"], min_cutoff=2.0)))
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
    late = meshes.copy()
    late[9, 0, 0] = np.inf  # in the second chunk
    with pytest.raises(BatchError, match="frame 9"):
        solve_take(bundle, late, times, SolveOptions(batch_size=4))


@pytest.mark.parametrize(("field", "value", "match"), [
    ("filter", "median", "filter must be one of"),
    ("fit_error", "some", "fit_error must be one of"),
    ("batch_size", 0, "batch_size"),
    ("fit_sample", -1, "fit_sample"),
    ("gap_s", 0.0, "gap_s"),
    ("smooth_hz", float("nan"), "smooth_hz"),
    ("off_manifold_threshold", -1.0, "off_manifold_threshold"),
])
def test_bad_options_are_refused_by_name(field: str, value: object, match: str) -> None:
    with pytest.raises(BatchError, match=match):
        SolveOptions(**{field: value})  # type: ignore[arg-type]


def test_chunked_one_euro_equals_the_live_filter_frame_by_frame() -> None:
    """one_euro_series over chunks, state carried, against OneEuroFilter one frame at a time,
    across a stream gap and with per-control parameters."""
    rng = np.random.default_rng(5)
    t, c = 400, 6
    times = np.cumsum(rng.uniform(1 / 90, 1 / 45, t))  # irregular spacing
    times[250:] += 0.4  # a gap longer than gap_ns: both restart there
    t_ns = np.round(times * 1e9).astype(np.int64)
    x = np.cumsum(rng.normal(scale=0.05, size=(t, c)), axis=0)
    params = OneEuroParams(rng.uniform(0.5, 3.0, c), rng.uniform(0.0, 2.0, c),
                           rng.uniform(0.5, 2.0, c))
    live = OneEuroFilter(params, gap_ns=250_000_000)
    ref = np.array([live(x[i], int(t_ns[i]), i) for i in range(t)])
    state = None
    parts = []
    for i0 in range(0, t, 37):
        y, state = one_euro_series(x[i0 : i0 + 37], t_ns[i0 : i0 + 37], params,
                                   gap_ns=250_000_000, state=state)
        parts.append(y)
    np.testing.assert_allclose(np.concatenate(parts), ref, rtol=0, atol=1e-12)
    assert live.resets == 1
    np.testing.assert_array_equal(np.concatenate(parts)[250], x[250])  # restarted: passes through


def test_fit_error_batch_agrees_with_its_naive_twin() -> None:
    rng = np.random.default_rng(6)
    b, v = 5, 40
    pred = rng.normal(size=(b, v, 3)).astype(np.float32)
    obs = pred + rng.normal(scale=0.01, size=(b, v, 3)).astype(np.float32)
    rigid = fit_rigid_batch(obs[:, :10], pred[0, :10].astype(np.float64))
    weights = rng.uniform(0.5, 3.0, v).astype(np.float32)
    for rig_, w in ((None, None), (rigid, None), (rigid, weights), (None, weights)):
        fast = fit_error_batch(pred, obs, rig_, w)
        slow = fit_error_batch_naive(pred, obs, rig_, w)
        np.testing.assert_allclose(fast[0], slow[0], rtol=1e-4)
        np.testing.assert_allclose(fast[1], slow[1], rtol=1e-4)


def test_fit_subset_reads_inputs_and_stable_plus_a_fixed_sample() -> None:
    always = np.array([5, 3, 3, 90])
    sub = fit_subset(100, always, sample=20, seed=0)
    assert list(sub.indices[: sub.exact]) == [3, 5, 90]
    assert sub.indices.shape == (23,) and np.unique(sub.indices).shape == (23,)
    # unbiased weights: they add up to the vertex count
    assert sub.weights.sum() == pytest.approx(100.0)
    np.testing.assert_array_equal(fit_subset(100, always, sample=20, seed=0).indices, sub.indices)
    everything = fit_subset(100, always, sample=500)
    assert sorted(everything.indices) == list(range(100)) and np.all(everything.weights == 1.0)


@pytest.mark.parametrize("cut", [False, True])
def test_subset_fit_error_tracks_the_full_one(bundle: Bundle, cut: bool) -> None:
    """On the same frames, the subset's RMS estimate is close to the full RMS and its max never
    exceeds the full max; a local bulge shows in both. With the cut forward graph
    (rigcast/forward_subset.py) the numbers are those of the full graph at the subset."""
    meshes, times, _ = _take(200, seed=3)
    rng = np.random.default_rng(8)
    meshes += rng.normal(scale=2e-3, size=meshes.shape).astype(np.float32)  # sensor-like noise
    moving = np.setdiff1d(np.arange(bundle.vertex_count), bundle.stable_indices)
    meshes[100, moving[:60]] += 0.05
    solver = BatchSolver(bundle, threads=2, subset_graph=slice_forward_graph if cut else None)
    assert solver.subset_forward(60) is cut
    full = solver.solve(meshes, times, SolveOptions(fit_error="full", filter="none",
                                                    fit_sample=60, batch_size=64))
    sub = solver.solve(meshes, times, SolveOptions(fit_error="subset", filter="none",
                                                   fit_sample=60, batch_size=64))
    assert full.fit_error == "full" and full.fit_vertices == bundle.vertex_count
    assert sub.fit_error == "subset" and sub.fit_vertices == 40 + 16 + 60
    np.testing.assert_allclose(sub.fit_rms, full.fit_rms, rtol=0.15)
    assert np.all(sub.fit_max <= full.fit_max + 1e-6)
    np.testing.assert_array_equal(sub.controls, full.controls)
    assert sub.fit_max[100] > 5 * np.median(sub.fit_max)
    # and the naive twin over the whole take, frame by frame, gives the same numbers
    subset = solver.fit_subset(60)
    forward = ForwardModel(bundle)
    fit = fit_rigid_batch(meshes[:, bundle.stable_indices], solver.neutral_stable)
    raw = solver.solve(meshes, times, SolveOptions(filter="none", fit_error="off")).controls
    rms, worst = fit_error_batch_naive(forward.evaluate(raw)[:, subset.indices],
                                       meshes[:, subset.indices], fit, subset.weights)
    np.testing.assert_allclose(sub.fit_rms, rms, rtol=1e-3)
    np.testing.assert_allclose(sub.fit_max, worst, rtol=1e-3)


def test_cut_forward_graph_equals_the_full_one_at_the_subset(bundle: Bundle) -> None:
    idx = np.array([0, 7, 299, 150])
    graph = slice_forward_graph(bundle.forward_onnx, bundle.vertex_count, idx)
    assert graph is not None and len(graph) < len(bundle.forward_onnx) / 10
    x = np.random.default_rng(2).uniform(0, 1, (6, bundle.control_count)).astype(np.float32)
    cut = open_session(graph, threads=1).run(None, {"controls": x})[0]
    np.testing.assert_allclose(cut, ForwardModel(bundle).evaluate(x)[:, idx], atol=1e-5)
    # a graph it does not understand is left alone
    assert slice_forward_graph(bundle.inverse_onnx, bundle.vertex_count, idx) is None


def test_chunk_size_does_not_change_the_result(bundle: Bundle) -> None:
    meshes, times, _ = _take(150, seed=4)
    solver = BatchSolver(bundle, threads=2)
    one = solver.solve(meshes, times, SolveOptions(batch_size=1000))
    many = solver.solve(meshes, times, SolveOptions(batch_size=7))
    np.testing.assert_allclose(one.controls, many.controls, atol=1e-6)
    np.testing.assert_allclose(one.fit_max, many.fit_max, rtol=1e-5)
    np.testing.assert_array_equal(one.off_manifold, many.off_manifold)

