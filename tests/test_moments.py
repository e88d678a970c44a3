"""The moment form of the projected refinement (runtime/solve/moments.py, export/bundling/moments_graph.py):
each function against a naive twin that builds the vertices explicitly, the graph in a real
onnxruntime session, and the realigned solve on a synthetic bundle against the earlier path."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest
from rigcast.export.bundling.moments_graph import moments_graph
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.bundle import (
    PROJECT_CENTRE,
    PROJECT_CONSTANTS,
    PROJECT_MOMENTS,
    PROJECT_NORM,
    PROJECT_POINTS,
    load_bundle,
)
from rigcast.runtime.solve.align import RigidBatch, fit_rigid_pairs
from rigcast.runtime.solve.moments import (
    BasisConstants,
    FrameMoments,
    compose,
    moved_state,
    projection_state,
    realign_fit,
    uncentre,
)
from rigcast.runtime.solve.refine import project_naive
from rigcast.runtime.solve.solve_core import open_model, realign, solve_points, stabilise_frames
from scipy.spatial.transform import Rotation

R_, S_ = 7, 60


def _basis(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    basis = rng.normal(0.0, 0.05, (R_, 3 * S_)).astype(np.float32)
    # offsets far from the origin, as stage meshes are: the moments must stay centred
    offset = (rng.normal(0.0, 0.1, (S_, 3)) + np.array([40.0, 150.0, -20.0])).astype(np.float32)
    return basis, offset.reshape(-1)


def _session(data: bytes) -> ort.InferenceSession:
    return ort.InferenceSession(data, providers=["CPUExecutionProvider"])


def _run(sess: ort.InferenceSession, points: np.ndarray) -> tuple[FrameMoments, BasisConstants]:
    mo, norm, table, centre = sess.run([PROJECT_MOMENTS, PROJECT_NORM, PROJECT_CONSTANTS,
                                        PROJECT_CENTRE], {PROJECT_POINTS: points})
    return FrameMoments.from_outputs(mo, norm), BasisConstants.from_outputs(table, centre)


def _random_move(n: int, seed: int, scale: bool = False) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    rot = Rotation.from_rotvec(rng.normal(0, 0.02, (n, 3))).as_matrix()
    s = rng.uniform(0.98, 1.02, n) if scale else np.ones(n)
    return s[:, None, None] * rot, rng.normal(0, 0.01, (n, 3))


def test_graph_moments_equal_their_naive_twin_and_the_plain_projection() -> None:
    basis, offset = _basis()
    rng = np.random.default_rng(1)
    points = (offset.reshape(S_, 3) + rng.normal(0, 0.02, (5, S_, 3))).astype(np.float32)
    fm, const = _run(_session(moments_graph(basis, offset)), points)
    off = offset.reshape(S_, 3).astype(np.float64)
    a = basis.astype(np.float64).reshape(R_, S_, 3)
    y = points.astype(np.float64) - off
    oc = off - off.mean(axis=0)
    # naive: m[n, r, k, j] = sum_i y_ik a_rij, by loops over the frames and rows
    for n in range(5):
        for r in range(R_):
            np.testing.assert_allclose(fm.m[n, r], y[n].T @ a[r], rtol=1e-4, atol=1e-6)
        np.testing.assert_allclose(fm.q[n], y[n].T @ oc, rtol=1e-4, atol=1e-6)
        np.testing.assert_allclose(fm.s[n], y[n].sum(axis=0), rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(const.cross, np.einsum("ik,rij->rkj", oc, a), rtol=1e-9)
    np.testing.assert_allclose(const.colsum, a.sum(axis=1), rtol=1e-9)
    np.testing.assert_allclose(const.scatter, oc.T @ oc, rtol=1e-9)
    assert const.count == S_
    # p_r = trace(m_r) is the plain projection of the earlier form (its own naive twin)
    np.testing.assert_allclose(projection_state(fm), project_naive(points, basis, offset),
                               rtol=1e-4, atol=1e-6)


def test_graph_gives_the_same_bits_for_a_frame_alone_and_in_a_batch() -> None:
    """Live (a batch of one) and offline (batches of many) must agree to 1e-6 on the controls
    (issue 16), so the per-frame product may not depend on the batch."""
    basis, offset = _basis(2)
    sess = _session(moments_graph(basis, offset))
    rng = np.random.default_rng(3)
    points = (offset.reshape(S_, 3) + rng.normal(0, 0.02, (33, S_, 3))).astype(np.float32)
    whole = sess.run([PROJECT_MOMENTS, PROJECT_NORM], {PROJECT_POINTS: points})
    for i in (0, 17, 32):
        one = sess.run([PROJECT_MOMENTS, PROJECT_NORM], {PROJECT_POINTS: points[i : i + 1]})
        assert np.array_equal(one[0][0], whole[0][i]) and np.array_equal(one[1][0], whole[1][i])


@pytest.mark.parametrize("scale", [False, True])
def test_moved_state_equals_projecting_the_moved_points(scale: bool) -> None:
    basis, offset = _basis(4)
    sess = _session(moments_graph(basis, offset))
    rng = np.random.default_rng(5)
    points = (offset.reshape(S_, 3) + rng.normal(0, 0.02, (4, S_, 3))).astype(np.float32)
    fm, const = _run(sess, points)
    lin, shift = _random_move(4, 6, scale)
    got = moved_state(fm, const, lin, shift)
    centre = const.centre
    moved = np.einsum("njk,nik->nij", lin, points - centre) + shift[:, None] + centre
    want = project_naive(moved, basis, offset)
    np.testing.assert_allclose(got[:, :-1], want[:, :-1], rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(got[:, -1], want[:, -1], rtol=1e-3, atol=1e-5)
    # no move at all is the plain state
    none = moved_state(fm, const, np.repeat(np.eye(3)[None], 4, 0), np.zeros((4, 3)))
    np.testing.assert_allclose(none, projection_state(fm), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("scale", [False, True])
def test_realign_fit_equals_umeyama_on_the_explicit_vertices(scale: bool) -> None:
    basis, offset = _basis(7)
    sess = _session(moments_graph(basis, offset))
    rng = np.random.default_rng(8)
    z = rng.normal(0, 0.3, (3, R_))
    target = offset.reshape(S_, 3) + np.einsum("nr,ri->ni", z, basis.astype(np.float64)
                                               ).reshape(3, S_, 3)
    lin, shift = _random_move(3, 9, scale)
    # a realignment corrects a stabilised frame, so the move is small and about the mesh itself
    # (|y| stays small: |y|^2 comes from float32, and the variance cancels it against n |mean|^2)
    c = offset.reshape(S_, 3).mean(axis=0)
    points = (np.einsum("njk,nik->nij", lin, target - c) + c + shift[:, None]
              + rng.normal(0, 1e-3, target.shape)).astype(np.float32)
    stable_home = (rng.normal(0, 0.1, (10, 3)) + np.array([40.0, 150.0, -20.0]))
    stable = np.einsum("njk,ik->nij", lin, stable_home - c) + c + shift[:, None]
    fm, const = _run(sess, points)
    fit = realign_fit(fm, const, z, extra_source=stable, extra_target=stable_home, scale=scale)
    got_lin, got_t = uncentre(fit, const.centre)
    ref = fit_rigid_pairs(np.concatenate([points, stable], 1),
                          np.concatenate([target, np.broadcast_to(stable_home, stable.shape)], 1),
                          scale=scale)  # Umeyama 1991 on every pair, explicitly
    np.testing.assert_allclose(got_lin, ref.scale[:, None, None] * ref.rotation, atol=2e-5)
    np.testing.assert_allclose(got_t, ref.translation, atol=2e-3)


def test_compose_applies_the_realignment_after_the_first_fit() -> None:
    rng = np.random.default_rng(10)
    lin0, t0 = _random_move(2, 11, True)
    s0 = np.cbrt(np.linalg.det(lin0))
    first = RigidBatch(lin0 / s0[:, None, None], t0, s0, np.array([0.1, 0.2]))
    lin, t = _random_move(2, 12, True)
    pts = rng.normal(0, 1, (2, 9, 3)).astype(np.float32)
    both = compose(first, lin, t)
    want = np.einsum("njk,nik->nij", lin, first.apply(pts).astype(np.float64)) + t[:, None]
    np.testing.assert_allclose(both.apply(pts), want, atol=1e-5)
    np.testing.assert_array_equal(both.mse, first.mse)


def _frames(vertices: int, n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rig = make_synthetic_rig(vertices, 8, inputs=40, stable=16, seed=seed)
    rng = np.random.default_rng(seed)
    w = np.clip(rng.normal(0.3, 0.2, (n, 8)), 0, 1).astype(np.float32)
    clean = rig.evaluate(w).astype(np.float64)
    rot = Rotation.from_rotvec(rng.normal(0, 0.05, (n, 3))).as_matrix()
    moved = np.einsum("njk,nik->nij", rot, clean) + rng.normal(0, 0.01, (n, 1, 3))
    noisy = moved + rng.normal(0, 2e-3 * np.ptp(clean), moved.shape)
    return noisy.astype(np.float32), w


def test_realigned_solve_in_moment_form_matches_the_all_vertex_realignment(tmp_path: Path) -> None:
    """Same bundle, both forms: the moment form's realignment (S and stable vertices, from the
    first projection) gives the controls of the earlier one (every vertex, forward graph) to
    within a small share of their range, and both improve on no realignment."""
    frames, truth = _frames(300, 24, 13)
    out = {}
    for form in ("projected", "projected-plain"):
        path = build_synthetic_bundle(tmp_path / f"{form}.rcb", refine=form, seed=13)
        model = open_model(load_bundle(path), label=form, threads=1)
        assert (model.inverse.moment_form is not None) == (form == "projected")
        # the synthetic network's answer is rough (3 % of the range off): a looser prior than
        # the default 0.7 % lets the fit, and so the realignment's target, move away from it
        assert model.inverse.refiner is not None
        model.inverse.refiner.settings = dataclasses.replace(model.inverse.refiner.settings,
                                                             prior_sd=0.02)
        points, rigid = stabilise_frames(model, frames, stabilise=True, scale=False)
        for passes in (0, 1):
            solved, _ = solve_points(model, frames, points, rigid, passes=passes, scale=False)
            out[form, passes] = solved
    assert np.abs(out["projected", 1] - out["projected-plain", 1]).max() < 0.02
    err = {k: float(np.abs(v - truth).mean()) for k, v in out.items()}
    assert err["projected", 1] < err["projected", 0]
    # the older path is the one realign() keeps for bundles before the moment form
    path = build_synthetic_bundle(tmp_path / "plain.rcb", refine="projected-plain", seed=13)
    model = open_model(load_bundle(path), label="plain", threads=1)
    assert model.inverse.refiner is not None
    model.inverse.refiner.settings = dataclasses.replace(model.inverse.refiner.settings,
                                                         prior_sd=0.02)
    points, rigid = stabilise_frames(model, frames, stabilise=True, scale=False)
    assert rigid is not None
    first = model.inverse.solve(points)
    again, _ = realign(model, frames, first, rigid, passes=1, scale=False)
    np.testing.assert_array_equal(again, out["projected-plain", 1])


def test_realignment_with_the_rest_of_the_mesh_equals_the_all_vertex_fit(tmp_path: Path) -> None:
    """A moment-form bundle carries the rest of the mesh (vertices neither refined nor stable):
    the realignment then fits every vertex, against the forward model's mesh, as the all-vertex
    realignment does through the forward graph, so the two give the same controls to rounding.
    Without it the fit leaves those vertices out (what made the demo face's noisy take 0.84x
    instead of 0.76x that of per-frame non-linear least squares)."""
    frames, _ = _frames(300, 24, 13)
    bundle = load_bundle(build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=13))
    assert bundle.refine_projection is not None and bundle.refine_projection.rest is not None
    left_out = dataclasses.replace(bundle, refine_projection=dataclasses.replace(
        bundle.refine_projection, rest=None))
    diff = {}
    for label, b in (("rest", bundle), ("no rest", left_out)):
        model = open_model(b, label=label, threads=1)
        points, rigid = stabilise_frames(model, frames, stabilise=True, scale=False)
        assert rigid is not None
        moments, _ = solve_points(model, frames, points, rigid, passes=1, scale=False)
        every, _ = realign(model, frames, model.inverse.solve(points), rigid, passes=1,
                           scale=False)
        diff[label] = float(np.abs(moments - every).max())  # controls in [0, 1]
    assert diff["rest"] < 1e-4
    assert diff["no rest"] > 1e-3


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_weights_at_fills_only_the_missing_rows_and_leaves_the_refinements_alone(
        tmp_path: Path, dtype: type) -> None:
    """``MomentForm.weights_at`` takes the refinement's basis weights where it made them and
    makes the NaN rows (or all rows, given None) from the controls: the same numbers as
    ``weights`` on every row, and the caller's array is not written to."""
    path = build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=3)
    form = open_model(load_bundle(path), label="m", threads=1).inverse.moment_form
    assert form is not None
    rng = np.random.default_rng(3)
    controls = rng.uniform(0.0, 1.0, (6, 8)).astype(np.float32)
    whole = form.weights(controls)
    made = whole.astype(dtype)  # float64: the copy must not alias the caller's rows
    made[[1, 4]] = np.nan
    before = made.copy()
    got = form.weights_at(controls, made)
    np.testing.assert_array_equal(made, before)  # no NaN row filled in the caller's array
    assert np.isfinite(got).all() and got.dtype == np.float64
    np.testing.assert_array_equal(got[[1, 4]], whole[[1, 4]])
    np.testing.assert_allclose(got, whole, rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(form.weights_at(controls, None), whole)


def test_rest_targets_into_a_buffer_equal_the_naive_mesh(tmp_path: Path) -> None:
    """``MomentForm.rest_targets`` (the forward model on the rest of the mesh, less the centre)
    against its naive twin, offset + basis^T z - centre frame by frame in float64, and the same
    bits whether it makes its array, writes into the realignment's target rows (a strided view)
    or into an array whose rows no flat view reaches (a transposed one)."""
    path = build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=5)
    form = open_model(load_bundle(path), label="m", threads=1).inverse.moment_form
    assert form is not None and form.rest is not None
    rest = form.rest
    rng = np.random.default_rng(5)
    z = rng.normal(0.0, 1.0, (3, rest.basis.shape[0]))
    made = form.rest_targets(z)
    w = rest.indices.shape[0]
    centre = form.constants.centre
    for n in range(3):
        naive = (rest.offset.astype(np.float64) + z[n] @ rest.basis.astype(np.float64)
                 ).reshape(w, 3) - centre
        np.testing.assert_allclose(made[n], naive, rtol=1e-5, atol=1e-5)
    target = np.zeros((3, 4 + w, 3), np.float32)
    got = form.rest_targets(z, out=target[:, 4:])
    np.testing.assert_array_equal(target[:, 4:], made)
    assert np.shares_memory(got, target) and not target[:, :4].any()
    transposed = np.zeros((3, w, 3), np.float32, order="F")
    form.rest_targets(z, out=transposed)
    np.testing.assert_array_equal(transposed, made)
