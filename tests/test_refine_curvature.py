"""The refinement's curvature at the current point (export/training/refine.py ``RefineCore``,
runtime/solve/curved.py).

References: torch.autograd's Jacobian for the graph's forward-mode tangents (the Gauss-Newton
matrix J^T G J along the tangents); SciPy's ``least_squares`` (trust-region reflective, bounded)
for the optimum of a small non-linear problem, which Gauss-Newton at the current point must reach
in a few steps where the fixed matrix does not.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from rigcast.runtime.solve.active import gather_active, solve_gathered
from rigcast.runtime.solve.curved import CurvatureStore, one_hot
from rigcast.runtime.solve.refine import RefineError, Refiner, RefineSettings
from scipy.optimize import least_squares


def _forward(torch, chain: bool):  # type: ignore[no-untyped-def]
    from rigcast.export.training.kinematic import KinematicChain
    from rigcast.export.training.models import ForwardApproximator

    rng = np.random.default_rng(4)
    v, c, p = 40, 5, 6
    basis = np.linalg.qr(rng.standard_normal((3 * v, p)))[0].T
    kin = (KinematicChain(rng.standard_normal((c, 3)), np.zeros(c), p, seed=2) if chain
           else None)
    fwd = ForwardApproximator(rng.standard_normal((v, 3)), -np.ones(c), 2 * np.ones(c),
                              rng.standard_normal((c, 3 * v)), np.zeros(3 * v), basis, (12, 12),
                              chain=kin)
    with torch.no_grad():
        for prm in fwd.parameters():
            prm.copy_(torch.randn_like(prm) * 0.5)
    return fwd


@pytest.mark.parametrize("chain", [False, True])
def test_the_graphs_curvature_is_the_gauss_newton_matrix_along_the_tangents(chain) -> None:
    """ONNX ``curvature`` = V J_z^T G J_z V^T with J_z = dz/du from torch.autograd, z = [u;
    MLP(u) (+ chain(u))] the basis weights the graph also returns, G the projection's Gram."""
    torch = pytest.importorskip("torch")
    from rigcast.export.bundling.onnx_export import export_refine_core, session
    from rigcast.export.training.models import normalise_controls
    from rigcast.export.training.refine import RefineCore, projection_arrays
    from rigcast.runtime.bundle import REFINE_CONTROLS, REFINE_PROJECTION, REFINE_TANGENTS

    fwd = _forward(torch, chain)
    c = fwd.control_count
    _, _, gram = projection_arrays(fwd, np.arange(fwd.vertex_count))
    core = RefineCore(fwd, gram)
    rng = np.random.default_rng(5)
    data, parity = export_refine_core(core, fwd.lower.numpy(), fwd.upper.numpy(),
                                      rng.standard_normal((4, gram.shape[0])).astype(np.float32))
    assert parity <= 1e-4
    ctrl = rng.uniform(-1, 2, (3, c)).astype(np.float32)
    tangents = rng.standard_normal((3, 4, c)).astype(np.float32)
    proj = rng.standard_normal((3, gram.shape[0])).astype(np.float32)
    out = session(data).run(None, {REFINE_CONTROLS: ctrl, REFINE_PROJECTION: proj,
                                   REFINE_TANGENTS: tangents})
    assert out[3].shape == (3, 4, 4)
    lo, hi = fwd.lower, fwd.upper

    def z_of(u: torch.Tensor) -> torch.Tensor:
        m = fwd.correction(u[None])[0]
        if fwd.chain is not None:
            m = m + fwd.chain(u[None])[0]
        return torch.cat([u, m]).double()

    for i in range(3):
        u = normalise_controls(torch.from_numpy(ctrl[i : i + 1]), lo, hi)[0]
        jz = torch.autograd.functional.jacobian(z_of, u).numpy()  # (R, C)
        jv = jz @ tangents[i].astype(np.float64).T  # (R, T)
        want = jv.T @ gram @ jv
        np.testing.assert_allclose(out[3][i], want, rtol=2e-4, atol=1e-6 * np.abs(want).max())
    empty = session(data).run(None, {REFINE_CONTROLS: ctrl, REFINE_PROJECTION: proj,
                                     REFINE_TANGENTS: np.zeros((3, 0, c), np.float32)})
    assert empty[3].shape == (3, 0, 0)
    np.testing.assert_allclose(empty[0], out[0], rtol=1e-6, atol=1e-6)  # same gradient


def test_gathered_solve_and_store_match_the_dense_systems() -> None:
    """``solve_gathered`` on matrices kept in a ``CurvatureStore`` (made along a superset of
    each frame's active controls) equals a dense solve on the frame's full matrix."""
    rng = np.random.default_rng(8)
    n, c = 30, 9
    full = rng.standard_normal((n, c, c))
    full = full @ full.transpose(0, 2, 1) + np.eye(c)  # one matrix per frame
    have = rng.random((n, c)) < 0.6
    have[0] = False
    idx_h, valid_h = gather_active(have)
    store = CurvatureStore(n, c)
    store.put(np.arange(n), idx_h, valid_h, np.take_along_axis(
        np.take_along_axis(full, idx_h[:, :, None], axis=1), idx_h[:, None, :], axis=2))
    free = have & (rng.random((n, c)) < 0.7)
    g = rng.standard_normal((n, c))
    idx, valid = gather_active(free)
    got = np.zeros((n, c))
    np.put_along_axis(got, idx, solve_gathered(store.gather(np.arange(n), idx),
                                               np.take_along_axis(g, idx, axis=1), valid, 0.1,
                                               np.full(valid.shape, 0.3)), axis=1)
    for i in range(n):
        a = np.flatnonzero(free[i])
        want = np.zeros(c)
        if a.size:
            sys_ = full[i][np.ix_(a, a)]
            sys_[np.diag_indices(a.size)] = sys_[np.diag_indices(a.size)] * 1.1 + 0.3
            want[a] = np.linalg.solve(sys_, g[i, a])
        np.testing.assert_allclose(got[i], want, rtol=1e-9, atol=1e-12)
    assert np.all(store.have == have)
    t = one_hot(idx, valid, c)
    assert t.shape == (n, idx.shape[1], c) and np.all(t.sum(axis=(1, 2)) == free.sum(axis=1))


def _problem(seed: int):  # type: ignore[no-untyped-def]
    """A small rig with correctives: y(u) = a u + b (u_0 u_1, u_1 u_2, u_0 u_2 u_3), in
    normalised controls; the refiner's functions and its residual for SciPy."""
    rng = np.random.default_rng(seed)
    c, coords = 6, 240
    a = rng.standard_normal((coords, c)) * 0.3
    b = rng.standard_normal((coords, 3)) * 2.0

    def mesh_of(u: np.ndarray) -> np.ndarray:
        q = np.stack([u[:, 0] * u[:, 1], u[:, 1] * u[:, 2], u[:, 0] * u[:, 2] * u[:, 3]], 1)
        out: np.ndarray = u @ a.T + q @ b.T
        return out

    def jac(u: np.ndarray) -> np.ndarray:  # (N, coords, C)
        dq = np.zeros((u.shape[0], 3, c))
        dq[:, 0, 0], dq[:, 0, 1] = u[:, 1], u[:, 0]
        dq[:, 1, 1], dq[:, 1, 2] = u[:, 2], u[:, 1]
        dq[:, 2, 0], dq[:, 2, 2], dq[:, 2, 3] = (u[:, 2] * u[:, 3], u[:, 0] * u[:, 3],
                                                 u[:, 0] * u[:, 2])
        out: np.ndarray = a[None] + np.einsum("kq,nqc->nkc", b, dq)
        return out

    def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        u = controls.astype(np.float64)
        r = mesh - mesh_of(u)
        return np.einsum("nk,nkc->nc", r, jac(u)), (r * r).sum(axis=1)

    def curvature(controls: np.ndarray, mesh: np.ndarray, tangents: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        j = jac(controls.astype(np.float64)) @ tangents.astype(np.float64).transpose(0, 2, 1)
        g, rss = gradient(controls, mesh)
        return g, rss, j.transpose(0, 2, 1) @ j

    poses = rng.uniform(0, 1, (200, c))
    fixed = np.einsum("nkc,nkd->cd", jac(poses), jac(poses)) / len(poses)
    return c, mesh_of, jac, gradient, curvature, fixed


def test_gauss_newton_at_the_current_point_reaches_the_optimum_the_fixed_matrix_misses() -> None:
    """Bounded SciPy ``least_squares`` from the same start is the reference optimum; five
    steps at the current point reach it, five chord steps with the fixed matrix do not."""
    c, mesh_of, jac, gradient, curvature, fixed = _problem(11)
    rng = np.random.default_rng(12)
    truth = rng.uniform(0.2, 0.9, (12, c))
    truth[:, 4:] = 0.0  # at rest
    mesh = mesh_of(truth)
    start = np.clip(truth + rng.normal(0, 0.12, truth.shape), 0, 1)
    start[:, 4:] = 0.0
    ref = np.stack([least_squares(lambda u, y=y: mesh_of(u[None])[0] - y, s0,
                                  jac=lambda u, y=y: jac(u[None])[0], bounds=(0, 1),
                                  xtol=1e-12, ftol=1e-12).x
                    for s0, y in zip(start, mesh, strict=True)])
    zero, one = np.zeros(c), np.ones(c)
    settings = RefineSettings(steps=5, prior_sd=0.0, snap=0.0, tol=0.0)
    def bind(state: np.ndarray):  # type: ignore[no-untyped-def]
        return lambda controls, tangents: curvature(controls, state, tangents)

    cur = Refiner(gradient, fixed, zero, one, zero, mesh.shape[1],
                  dataclasses.replace(settings, curvature="step"), curvature=curvature,
                  bind_curvature=bind)
    chord = Refiner(gradient, fixed, zero, one, zero, mesh.shape[1],
                    dataclasses.replace(settings, curvature="fixed"), curvature=curvature)
    got = cur.refine(start, mesh)
    err_cur = np.abs(got - ref).max()
    err_chord = np.abs(chord.refine(start, mesh) - ref).max()
    assert err_cur < 1e-4, err_cur
    assert err_chord > 10 * err_cur, (err_chord, err_cur)
    for i in range(3):  # a live frame (a batch of one) takes the same steps
        np.testing.assert_allclose(cur.refine(start[i : i + 1], mesh[i : i + 1]), got[i : i + 1],
                                   rtol=1e-6, atol=1e-6)
    frame = Refiner(gradient, fixed, zero, one, zero, mesh.shape[1],
                    dataclasses.replace(settings, curvature="frame"), curvature=curvature,
                    bind_curvature=bind)
    got_frame = frame.refine(start, mesh)
    assert np.abs(got_frame - ref).max() < err_chord
    np.testing.assert_allclose(frame.refine(start[:1], mesh[:1]), got_frame[:1], rtol=1e-6,
                               atol=1e-6)
    with_prior = dataclasses.replace(settings, curvature="step", prior_sd=0.02)
    cur.settings = with_prior  # the adaptive pull and a noisy frame: batch and live agree
    noisy = mesh + np.random.default_rng(13).normal(0, 0.01, mesh.shape)
    both = cur.refine(start, noisy)
    for i in range(3):
        np.testing.assert_allclose(cur.refine(start[i : i + 1], noisy[i : i + 1]),
                                   both[i : i + 1], rtol=1e-6, atol=1e-6)


def test_curvature_settings_are_checked() -> None:
    with pytest.raises(RefineError, match="curvature"):
        RefineSettings(curvature="exact")


def test_factored_system_matches_the_solves() -> None:
    """The live path's factors of the fixed matrix (inverse, eigendecomposition with a ridge)
    against the plain solves of ``ActiveSystem``, with one ridge on every control and without."""
    from rigcast.runtime.solve.curved import ActiveSystem, FactoredSystem

    rng = np.random.default_rng(21)
    m = rng.standard_normal((7, 7))
    sub = m @ m.T + 0.1 * np.eye(7)
    plain, factored = ActiveSystem(sub, 1.01), FactoredSystem(sub, 1.01)
    for _ in range(20):
        rhs = rng.standard_normal(7)
        same = np.full(7, rng.uniform(0.0, 3.0))
        mixed = same * (rng.random(7) < 0.5)
        for ridge in (same, mixed):
            np.testing.assert_allclose(factored.step(rhs, ridge), plain.step(rhs, ridge),
                                       rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(factored.decrease(rhs), plain.decrease(rhs), rtol=1e-9)
    assert not np.allclose(plain.step(rhs, same), plain.step(rhs, mixed))
