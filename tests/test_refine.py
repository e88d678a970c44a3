"""The refinement after the inverse network (runtime/solve/refine.py, export/training/refine.py).

References: the bounded least-squares optimum from SciPy's ``lsq_linear`` (BVLS, Stark & Parker
1995) on a linear rig, where the Gauss-Newton steps must land on it; torch.autograd for the
hand-written vector-Jacobian product of the refinement graph.
"""

from __future__ import annotations

from dataclasses import asdict

import numpy as np
import pytest
from rigcast.runtime.solve.active import active_set, gather_active, solve_gathered
from rigcast.runtime.solve.refine import Refiner, RefineSettings
from scipy.optimize import lsq_linear


def _linear_problem(seed: int, c: int = 12, coords: int = 300):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((coords, c)) * rng.uniform(0.05, 1.0, c)  # small and large shapes

    def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = mesh.reshape(mesh.shape[0], -1) - controls.astype(np.float64) @ a.T
        return (r @ a).astype(np.float32), (r * r).sum(axis=1).astype(np.float32)

    return a, gradient


def solve_active(hessian: np.ndarray, g: np.ndarray, free: np.ndarray, damping: float,
                 ridge: np.ndarray | None = None) -> np.ndarray:
    """The product's batched step (``gather_active``, then ``solve_gathered``) on a fixed
    matrix: hessian (C, C), g (N, C), free (N, C), ridge (N,) or (N, C) -> delta (N, C)."""
    n, c = g.shape
    r = np.zeros((n, c)) if ridge is None else np.asarray(ridge, np.float64)
    r = np.repeat(r[:, None], c, axis=1) if r.ndim == 1 else r
    idx, valid = gather_active(free)
    delta = np.zeros((n, c))
    if idx.shape[1]:
        np.put_along_axis(delta, idx, solve_gathered(
            hessian[idx[:, :, None], idx[:, None, :]], np.take_along_axis(g, idx, axis=1), valid,
            damping, np.take_along_axis(r, idx, axis=1)), axis=1)
    return delta


def solve_active_naive(hessian: np.ndarray, g: np.ndarray, free: np.ndarray, damping: float,
                       ridge: np.ndarray | None = None) -> np.ndarray:
    """Per-frame twin of the batched step: index lists and one small solve per frame."""
    delta = np.zeros(g.shape, np.float64)
    for i in range(g.shape[0]):
        a = [j for j in range(g.shape[1]) if free[i, j]]
        if not a:
            continue
        h = np.array([[hessian[p, q] for q in a] for p in a], np.float64)
        for j in range(len(a)):
            extra = 0.0 if ridge is None else (float(ridge[i]) if np.ndim(ridge) == 1
                                               else float(ridge[i][a[j]]))
            h[j, j] = h[j, j] * (1.0 + damping) + extra
        delta[i, a] = np.linalg.solve(h, g[i, a])
    return delta


def test_solve_active_matches_its_naive_twin() -> None:
    rng = np.random.default_rng(3)
    m = rng.standard_normal((9, 9))
    h = m @ m.T + np.eye(9)
    g = rng.standard_normal((40, 9))
    free = rng.random((40, 9)) < 0.35
    free[0] = False  # a frame with nothing to do
    free[1] = True  # and one with everything
    ridge = rng.uniform(0.0, 2.0, 40)  # the adaptive prior's per-frame pull
    for extra in (None, ridge):
        got = solve_active(h, g, free, 0.1, extra)
        want = solve_active_naive(h, g, free, 0.1, extra)
        np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
        assert np.all(got[~free] == 0.0)
        for i in range(3):  # the one-frame path
            one = None if extra is None else extra[i : i + 1]
            np.testing.assert_allclose(solve_active(h, g[i : i + 1], free[i : i + 1], 0.1, one),
                                       want[i : i + 1], rtol=1e-10, atol=1e-12)
    assert not np.allclose(solve_active(h, g, free, 0.1, ridge), solve_active(h, g, free, 0.1))
    per_control = ridge[:, None] * (rng.random((40, 9)) < 0.7)  # the pull on some controls only
    np.testing.assert_allclose(solve_active(h, g, free, 0.1, per_control),
                               solve_active_naive(h, g, free, 0.1, per_control),
                               rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(solve_active(h, g[:1], free[:1], 0.1, per_control[:1]),
                               solve_active_naive(h, g[:1], free[:1], 0.1, per_control[:1]),
                               rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("wake", ["given", "alone"])
@pytest.mark.parametrize("prior_sd", [0.02, 0.0])
def test_one_frame_takes_the_steps_a_batch_takes(prior_sd: float, wake: str) -> None:
    """The live path (a batch of one: ``curved_steps_one``) against the batch path on the same
    frames, noisy and clean, with a network answer that is off and misses controls: the same
    controls to rounding."""
    c = 12
    a, gradient = _linear_problem(9, c, coords=600)
    rng = np.random.default_rng(10)
    truth = _sparse_truth(rng, 24, c)
    clean = truth @ a.T
    noisy = clean + 0.02 * rng.standard_normal(clean.shape) * (np.arange(24) % 2)[:, None]
    mesh = noisy.reshape(24, -1, 3).astype(np.float32)
    guess = np.clip(truth + 0.1 * rng.standard_normal(truth.shape), 0, 1).astype(np.float32)
    guess[::3, 0] = 0.0
    refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                      RefineSettings(prior_sd=prior_sd, wake=wake))
    batch = refiner.refine(guess, mesh)
    alone = np.concatenate([refiner.refine(guess[i : i + 1], mesh[i : i + 1])
                            for i in range(24)])
    np.testing.assert_allclose(alone, batch, rtol=0, atol=1e-6)
    assert np.abs(batch - guess).max() > 0.05  # the steps moved the controls


@pytest.mark.parametrize("batch", [1, 16])
def test_a_control_the_network_left_at_rest_comes_back_on_a_noisy_mesh(batch: int) -> None:
    """Bundles built with ``pull`` "moved": the prior pulls only the controls the network moved,
    so one it left at rest while the mesh shows it (a missed expression) has no pull back to rest
    once woken, and it returns even under noise, where the pull of the Gaussian prior held it
    near 0. Controls the network moved are still tempered."""
    c = 12
    a, _ = _linear_problem(13, c, coords=900)
    a[:, 5] *= np.sqrt(0.5) / np.linalg.norm(a[:, 5])  # a small expression: |a_5|^2 = 0.5

    def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = mesh.reshape(mesh.shape[0], -1) - controls.astype(np.float64) @ a.T
        return (r @ a).astype(np.float32), (r * r).sum(axis=1).astype(np.float32)

    rng = np.random.default_rng(14)
    truth = np.zeros((batch, c))
    truth[:, [2, 5, 7]] = rng.uniform(0.5, 0.9, (batch, 3))
    clean = truth @ a.T
    noisy = (clean + 0.01 * rng.standard_normal(clean.shape)).reshape(batch, -1, 3)
    guess = truth.copy()
    guess[:, 5] = 0.0  # missed
    guess[:, [2, 7]] += 0.03  # a little off
    refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                      RefineSettings(pull="moved", prior_sd=0.02))
    got = refiner.refine(guess.astype(np.float32), noisy.astype(np.float32))
    assert np.abs(got[:, 5] - truth[:, 5]).max() < 0.05
    others = np.setdiff1d(np.arange(c), [2, 5, 7])
    assert np.abs(got[:, others]).max() < 0.01  # at-rest controls stay at rest


@pytest.mark.parametrize("batch", [1, 64])
def test_the_prior_holds_a_control_the_capture_drift_woke(batch: int) -> None:
    """``pull`` "all" (the default): a control the network left at rest, woken on a noisy frame
    by a smooth drift that looks like its shape, is held towards rest by the prior; with "moved"
    it followed the drift (the jitter of woken controls on the chain rigs). On a clean mesh the
    pull vanishes, so a missed expression still comes back whole."""
    c = 12
    a, _ = _linear_problem(21, c, coords=900)
    a[:, 7] /= np.linalg.norm(a[:, 7])  # a small shape: |a_7|^2 = 1, against noise 0.01 x 900

    def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = mesh.reshape(mesh.shape[0], -1) - controls.astype(np.float64) @ a.T
        return (r @ a).astype(np.float32), (r * r).sum(axis=1).astype(np.float32)

    rng = np.random.default_rng(22)
    truth = np.zeros((batch, c))
    truth[:, 2] = rng.uniform(0.4, 0.8, batch)
    drift = 0.6 * a[:, 7] + 0.8 * rng.standard_normal(900) / 30.0  # partly its shape
    amp = rng.uniform(0.2, 0.3, batch)
    noisy = truth @ a.T + 0.01 * rng.standard_normal((batch, 900)) + amp[:, None] * drift
    guess = truth.astype(np.float32)
    frames = noisy.reshape(batch, -1, 3).astype(np.float32)

    def woken(pull: str) -> float:
        refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                          RefineSettings(pull=pull))
        return float(np.abs(refiner.refine(guess, frames)[:, 7]).mean())

    held, followed = woken("all"), woken("moved")
    assert followed > 0.03, followed  # the drift did wake it
    assert held < 0.5 * followed, (held, followed)
    missed = truth.copy()
    missed[:, 7] = 0.5
    clean = (missed @ a.T).reshape(batch, -1, 3).astype(np.float32)
    refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0])
    assert np.abs(refiner.refine(guess, clean)[:, 7] - 0.5).max() < 0.01


@pytest.mark.parametrize("batch", [1, 8])
def test_the_forward_models_own_error_is_not_taken_for_noise(batch: int) -> None:
    """``model_floor``: a clean frame whose residual is the forward model's own error (here a
    fixed field the model cannot make, of the size the build measured) must not raise the
    pull, so an expression the network shrank comes back; without the floor the pull reads
    that error as sensor noise and holds the network's answer."""
    c = 12
    a, gradient = _linear_problem(31, c, coords=900)
    rng = np.random.default_rng(32)
    truth = np.zeros((batch, c))
    truth[:, 4] = 0.8
    misfit = rng.standard_normal(900)
    misfit -= a @ np.linalg.lstsq(a, misfit, rcond=None)[0]  # no control makes it
    misfit *= 0.1 / np.sqrt(np.mean(misfit**2))  # per coordinate
    frames = (truth @ a.T + misfit).reshape(batch, -1, 3).astype(np.float32)
    guess = (truth * 0.7).astype(np.float32)  # the network shrank it

    def got(floor: bool) -> float:
        refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                          RefineSettings(model_floor=floor))
        refiner.model_error = 0.1**2
        return float(np.abs(refiner.refine(guess, frames)[:, 4] - 0.8).max())

    assert got(True) < 0.01
    assert got(False) > 0.05


def test_settings_changed_after_construction_reach_the_one_frame_path() -> None:
    """The one-frame path reads constants made per setting: settings set on a live refiner
    (as bench/quality.py does) must give what a refiner built with them gives."""
    c = 12
    a, gradient = _linear_problem(11, c)
    truth = _sparse_truth(np.random.default_rng(12), 1, c)
    mesh = (truth @ a.T).reshape(1, -1, 3).astype(np.float32)
    guess = np.clip(truth * 0.5, 0, 1).astype(np.float32)
    chosen = RefineSettings(damping=2.0, steps=1)
    built = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0], chosen)
    later = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0])
    before = later.refine(guess, mesh)
    later.settings = chosen
    np.testing.assert_allclose(later.refine(guess, mesh), built.refine(guess, mesh), atol=1e-7)
    assert np.abs(before - built.refine(guess, mesh)).max() > 1e-3


def test_refine_reaches_the_bounded_least_squares_optimum_on_a_linear_rig() -> None:
    """Noise-free sparse poses, a network answer that is off and misses a control: the steps
    must land on SciPy's bounded optimum (here the true pose) and keep at-rest controls at rest."""
    c = 12
    a, gradient = _linear_problem(0, c)
    rng = np.random.default_rng(1)
    truth = np.zeros((30, c))
    for row in truth:
        on = rng.choice(c, size=3, replace=False)
        row[on] = rng.uniform(0.2, 1.0, 3)
    mesh = (truth @ a.T).reshape(30, -1, 3).astype(np.float32)
    guess = np.clip(truth + 0.08 * rng.standard_normal(truth.shape) * (truth > 0), 0, 1)
    guess[:, 0] = 0.0  # a lost expression: the network left control 0 at rest
    refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                      RefineSettings(steps=8, prior=0.0, damping=0.05, tol=1e-6))
    got = refiner.refine(guess.astype(np.float32), mesh)
    ref = np.stack([lsq_linear(a, m.reshape(-1), bounds=(0, 1), method="bvls").x for m in mesh])
    np.testing.assert_allclose(got, ref, atol=2e-4)
    at_rest = truth == 0
    assert np.all(got[at_rest] == 0.0), "an at-rest control left its default"


def test_refine_under_noise_leaves_at_rest_controls_alone() -> None:
    """With white noise on the mesh, the correlation test must not wake controls at rest."""
    c = 12
    a, gradient = _linear_problem(2, c, coords=900)
    rng = np.random.default_rng(5)
    truth = np.zeros((200, c))
    truth[:, 3] = rng.uniform(0.3, 0.9, 200)
    clean = truth @ a.T
    noisy = (clean + 0.01 * rng.standard_normal(clean.shape)).reshape(200, -1, 3)
    refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0])
    got = refiner.refine(truth.astype(np.float32), noisy.astype(np.float32))
    woken = (np.abs(got[:, np.arange(c) != 3]) > 0.01).sum(axis=1).mean()
    assert woken < 0.05
    assert np.abs(got[:, 3] - truth[:, 3]).max() < 0.05


def _sparse_truth(rng: np.random.Generator, n: int, c: int) -> np.ndarray:
    truth = np.zeros((n, c))
    for row in truth:
        on = rng.choice(c, size=2, replace=False)
        row[on] = rng.uniform(0.3, 1.0, 2)
    return truth


def test_default_refine_brings_back_what_the_network_shrank_on_clean_meshes() -> None:
    """Issue 12's lost expressions: a network that returns every expression at 70 % of its value
    on noise-free meshes. At the default settings the steps must bring each back within 1 % of
    the range (the adaptive prior fades when the residual is tiny); the fixed pull it replaces
    (prior 0.5, damping 1, three steps) stopped about a quarter short."""
    c = 12
    a, gradient = _linear_problem(4, c)
    truth = _sparse_truth(np.random.default_rng(6), 40, c)
    mesh = (truth @ a.T).reshape(40, -1, 3).astype(np.float32)
    shrunk = (0.7 * truth).astype(np.float32)

    def run(settings: RefineSettings) -> np.ndarray:
        refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                          settings)
        return refiner.refine(shrunk, mesh)

    assert np.abs(run(RefineSettings()) - truth).max() < 0.01
    old = RefineSettings(steps=3, prior=0.5, damping=1.0, prior_sd=0.0, backtrack=0)
    assert np.abs(run(old) - truth).max() > 0.05


def test_adaptive_prior_tempers_noise_around_a_good_network_answer() -> None:
    """With noise on the mesh and a network answer near the truth, the adaptive prior must keep
    the controls nearer the truth than the plain fit does (the fit alone chases the noise)."""
    c = 12
    a, gradient = _linear_problem(7, c, coords=150)
    rng = np.random.default_rng(8)
    truth = _sparse_truth(rng, 300, c)
    noisy = (truth @ a.T + 0.2 * rng.standard_normal((300, a.shape[0]))).reshape(300, -1, 3)
    guess = np.clip(truth + 0.01 * rng.standard_normal(truth.shape) * (truth > 0), 0, 1)

    def err(settings: RefineSettings) -> float:
        refiner = Refiner(gradient, a.T @ a, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                          settings)
        got = refiner.refine(guess.astype(np.float32), noisy.astype(np.float32))
        return float(np.abs(got - truth).mean())

    with_prior, plain = err(RefineSettings()), err(RefineSettings(prior_sd=0.0))
    assert with_prior < 0.8 * plain, (with_prior, plain)


def test_settings_from_a_manifest_keep_what_a_bundle_was_built_with() -> None:
    old = RefineSettings.from_manifest({"steps": 3, "kappa": 4.0, "wake_share": 0.5,
                                        "prior": 0.5, "damping": 1.0, "snap": 0.002})
    assert (old.prior_sd, old.backtrack, old.prior, old.steps) == (0.0, 0, 0.5, 3)
    assert old.pull == "moved" and not old.model_floor  # built before either
    assert RefineSettings.from_manifest(asdict(RefineSettings())) == RefineSettings()
    with pytest.raises(ValueError, match="pull"):
        RefineSettings(pull="some")
    with pytest.raises(ValueError, match="unknown refine setting"):
        RefineSettings.from_manifest({"steps": 3, "gain": 2.0})
    with pytest.raises(ValueError, match="prior_sd"):
        RefineSettings(prior_sd=-1.0)


def test_active_set_blocks_moves_past_a_bound() -> None:
    u = np.array([[0.0, 1.0, 0.5, 0.0]])
    g = np.array([[-5.0, 5.0, 0.1, 5.0]])
    free = active_set(u, np.zeros(4), g, np.array([1.0]), np.ones(4), 4.0, 3)
    # 0: at rest on its lower bound, pushed down; 1: on its upper bound, pushed up: both out.
    # 2: active; 3: at rest, strongly pulled inwards: woken.
    assert free.tolist() == [[False, False, True, True]]
    # A control that explains little of the residual on its own stays at rest.
    g_small = np.array([[0.0, 0.0, 0.1, 5.0]])
    assert not active_set(u, np.zeros(4), g_small, np.array([100.0]), np.ones(4), 4.0, 3000,
                          wake_share=0.5)[0, 3]  # explains 25 of 100
    assert active_set(u, np.zeros(4), g_small, np.array([30.0]), np.ones(4), 4.0, 3000,
                      wake_share=0.5)[0, 3]  # explains 25 of 30


def test_settings_are_validated() -> None:
    with pytest.raises(ValueError, match="steps"):
        RefineSettings(steps=-1)
    with pytest.raises(ValueError, match="kappa"):
        RefineSettings(kappa=float("nan"))


def test_refine_graph_gradient_matches_autograd() -> None:
    torch = pytest.importorskip("torch")
    from rigcast.export.bundling.onnx_export import export_refine, session
    from rigcast.export.training.models import ForwardApproximator
    from rigcast.export.training.refine import RefineGraph, refine_gradient_naive
    from rigcast.runtime.bundle import REFINE_CONTROLS, REFINE_MESH

    rng = np.random.default_rng(0)
    v, c, p = 40, 5, 6
    basis = np.linalg.qr(rng.standard_normal((3 * v, p)))[0].T
    fwd = ForwardApproximator(rng.standard_normal((v, 3)), -np.ones(c), 2 * np.ones(c),
                              rng.standard_normal((c, 3 * v)), np.zeros(3 * v), basis, (16, 16))
    with torch.no_grad():
        for prm in fwd.correction.parameters():
            prm.copy_(torch.randn_like(prm) * 0.5)
    idx = np.array([1, 4, 9, 20, 33])
    ctrl = rng.uniform(-1, 2, (7, c)).astype(np.float32)
    mesh = rng.standard_normal((7, idx.size, 3)).astype(np.float32)
    with torch.no_grad():
        g, rss = RefineGraph(fwd, idx)(torch.from_numpy(ctrl), torch.from_numpy(mesh))
    np.testing.assert_allclose(g.numpy(), refine_gradient_naive(fwd, idx, ctrl, mesh),
                               rtol=1e-4, atol=1e-4)
    data, parity = export_refine(RefineGraph(fwd, idx), fwd.lower.numpy(), fwd.upper.numpy(),
                                 mesh)
    got = session(data).run(None, {REFINE_CONTROLS: ctrl, REFINE_MESH: mesh})
    np.testing.assert_allclose(got[0], g.numpy(), rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(got[1], rss.numpy(), rtol=1e-4)
    assert parity <= 1e-4


def test_projected_refine_core_matches_the_direct_fit_on_its_vertices() -> None:
    """RefineCore's gradient and |r|^2 from one projection per frame equal autograd's gradient
    and the residual computed vertex by vertex on the same S vertices; the vertex choice keeps
    every control's information; ``project`` matches its float64 twin."""
    torch = pytest.importorskip("torch")
    from rigcast.export.bundling.onnx_export import session
    from rigcast.export.training.models import ForwardApproximator
    from rigcast.export.training.refine import (
        projected_refine_parts,
        projection_arrays,
        refine_gradient_naive,
        refine_vertices,
        vertex_information,
    )
    from rigcast.runtime.bundle import (
        PROJECT_MOMENTS,
        PROJECT_NORM,
        PROJECT_POINTS,
        REFINE_CONTROLS,
        REFINE_PROJECTION,
        REFINE_TANGENTS,
    )
    from rigcast.runtime.solve.moments import FrameMoments, projection_state
    from rigcast.runtime.solve.refine import project_naive

    rng = np.random.default_rng(1)
    v, c, p = 60, 5, 6
    basis = np.linalg.qr(rng.standard_normal((3 * v, p)))[0].T
    weight = rng.standard_normal((c, 3 * v))
    weight[:, 3 * 50 :] = 0.0  # vertices 50.. move only through the correction basis
    fwd = ForwardApproximator(rng.standard_normal((v, 3)), -np.ones(c), 2 * np.ones(c),
                              weight, rng.standard_normal(3 * v) * 0.1, basis, (16, 16))
    with torch.no_grad():
        for prm in fwd.correction.parameters():
            prm.copy_(torch.randn_like(prm) * 0.5)
    poses = rng.uniform(-1, 2, (40, c)).astype(np.float32)
    data, hessian, projection, parity = projected_refine_parts(fwd, poses, cap=10_000,
                                                               share=1.0)
    idx = projection.indices
    a, offset, _ = projection_arrays(fwd, idx)
    assert parity <= 1e-4 and hessian.shape == (c, c) and a.shape == (c + p, 3 * idx.size)
    info = vertex_information(fwd, poses)
    assert info.shape == (v, c)
    kept = refine_vertices(info, share=0.9, cap=10_000)
    assert (info[kept].sum(0) >= 0.9 * info.sum(0) - 1e-12).all()  # each control's share kept
    assert refine_vertices(info, share=0.9, cap=7).size == 7
    ctrl = rng.uniform(-1, 2, (7, c)).astype(np.float32)
    mesh = rng.standard_normal((7, v, 3)).astype(np.float32)
    pts = np.ascontiguousarray(mesh[:, idx])
    mo, norm = session(projection.project_onnx).run([PROJECT_MOMENTS, PROJECT_NORM],
                                                    {PROJECT_POINTS: pts})
    state = projection_state(FrameMoments.from_outputs(mo, norm))
    np.testing.assert_allclose(state, project_naive(pts, a, offset), rtol=1e-4, atol=1e-3)
    g, quad, z, _ = session(data).run(None, {
        REFINE_CONTROLS: ctrl, REFINE_PROJECTION: state[:, :-1].astype(np.float32),
        REFINE_TANGENTS: np.zeros((7, 0, c), np.float32)})
    np.testing.assert_allclose(g, refine_gradient_naive(fwd, idx, ctrl, pts), rtol=1e-3,
                               atol=1e-3)
    with torch.no_grad():
        on_s = fwd(torch.from_numpy(ctrl)).numpy()[:, idx]
    direct = ((pts - on_s) ** 2).sum(axis=(1, 2))
    np.testing.assert_allclose(state[:, -1] + quad, direct, rtol=1e-4)
    # the basis weights z rebuild the forward model's mesh on S: offset + A^T z
    np.testing.assert_allclose(offset + z @ a.astype(np.float64), on_s.reshape(7, -1),
                               rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("form", ["inputs", "projected", "projected-plain"])
def test_a_bundle_with_refinement_solves_through_it(tmp_path, form) -> None:
    """The synthetic bundle's refinement graph (ONNX built by hand, in each form) through
    InverseModel: a sparse pose whose network answer is off comes back to the pose."""
    from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
    from rigcast.runtime.bundle import load_bundle
    from rigcast.runtime.solve.inference import InverseModel

    spec = {"vertices": 400, "controls": 8, "inputs": 60, "stable": 16, "seed": 3}
    path = build_synthetic_bundle(tmp_path / "r.rcb", **spec, inverse="mlp", refine=form)
    bundle = load_bundle(path)
    assert bundle.refine_onnx is not None and bundle.refine_hessian is not None
    rig = make_synthetic_rig(spec["vertices"], spec["controls"], inputs=spec["inputs"],
                             stable=spec["stable"], seed=spec["seed"])
    truth = np.zeros((5, 8))
    truth[:, 2], truth[:, 5] = 0.7, 0.3
    assert (bundle.refine_projection is not None) == form.startswith("projected")
    model = InverseModel(bundle, refine=RefineSettings(steps=8, prior=0.0, damping=0.05))
    assert model.refiner is not None
    mesh = rig.evaluate(truth)[:, model.point_indices].astype(np.float32)
    inputs = np.ascontiguousarray(mesh[:, : bundle.input_indices.shape[0]])
    raw = model.session.run(None, {"mesh": inputs})[0]  # an untrained MLP: far off
    got = model.solve(mesh)
    assert np.abs(raw - truth).max() > 0.1
    np.testing.assert_allclose(got, truth, atol=1e-3)


def test_gauss_newton_matrix_matches_autograd() -> None:
    torch = pytest.importorskip("torch")
    from rigcast.export.training.models import ForwardApproximator
    from rigcast.export.training.refine import gauss_newton_matrix, gauss_newton_matrix_naive

    rng = np.random.default_rng(1)
    v, c, p = 30, 4, 5
    basis = np.linalg.qr(rng.standard_normal((3 * v, p)))[0].T
    fwd = ForwardApproximator(rng.standard_normal((v, 3)), np.zeros(c), 3 * np.ones(c),
                              rng.standard_normal((c, 3 * v)), np.zeros(3 * v), basis, (8, 8))
    with torch.no_grad():
        for prm in fwd.correction.parameters():
            prm.copy_(torch.randn_like(prm))
    idx = np.array([0, 3, 7, 12, 29])
    poses = rng.uniform(0, 3, (9, c))
    np.testing.assert_allclose(gauss_newton_matrix(fwd, idx, poses, chunk=4),
                               gauss_newton_matrix_naive(fwd, idx, poses), rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("prior_sd", [0.02, 0.0])
def test_the_fixed_matrix_gathered_is_the_matrix_sent_along_one_hot_tangents(
        prior_sd: float) -> None:
    """The chord steps gather the fixed matrix's entries on each frame's active pairs with no
    graph call; their naive twin sends the same matrix as a curvature function, V H V^T along
    one-hot tangents V, made once per frame and again when a control wakes (the "frame" mode,
    which with a matrix that never changes is the chord method). The same controls bit for bit,
    batched and for one frame, on noisy and clean frames where controls wake."""
    c = 12
    a, gradient = _linear_problem(21, c, coords=600)
    rng = np.random.default_rng(22)
    truth = _sparse_truth(rng, 32, c)
    noisy = truth @ a.T + 0.02 * rng.standard_normal((32, a.shape[0])) * (np.arange(32) % 2)[:, None]
    mesh = noisy.reshape(32, -1, 3).astype(np.float32)
    guess = np.clip(truth + 0.1 * rng.standard_normal(truth.shape), 0, 1).astype(np.float32)
    guess[::3, 0] = 0.0
    guess[::4, [3, 4]] = 0.0  # missed controls: they wake
    hessian = a.T @ a
    calls = [0]

    def along(controls: np.ndarray, state: np.ndarray, tangents: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        calls[0] += 1
        g, rss = gradient(controls, state)
        t = tangents.astype(np.float64)
        return g, rss, t @ hessian @ t.transpose(0, 2, 1)

    def bind_along(state: np.ndarray):
        return lambda controls, tangents: along(controls, state, tangents)

    settings = RefineSettings(prior_sd=prior_sd, curvature="fixed")
    chord = Refiner(gradient, hessian, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                    settings)
    twin = Refiner(gradient, hessian, np.zeros(c), np.ones(c), np.zeros(c), a.shape[0],
                   RefineSettings(prior_sd=prior_sd, curvature="frame"), curvature=along,
                   bind_curvature=bind_along)
    got = chord.refine(guess, mesh)
    want = twin.refine(guess, mesh)
    assert calls[0] > 1  # the twin made matrices for woken controls too
    np.testing.assert_array_equal(got, want)
    assert np.abs(got - guess).max() > 0.05  # the steps moved the controls
    # and the one-frame path's factored chord system against the batch, to rounding
    alone = np.concatenate([chord.refine(guess[i : i + 1], mesh[i : i + 1]) for i in range(32)])
    np.testing.assert_allclose(alone, got, rtol=0, atol=1e-6)
