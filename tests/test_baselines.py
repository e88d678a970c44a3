"""Baselines: bounded least squares on a linearised rig, and per-frame gradient optimisation."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from rigcast.export.quality.baselines import (
    BaselineError,
    fd_jacobian,
    linearise_rig,
    optimise_frames,
    solve_lsq,
    solve_lsq_naive,
    solve_nlls,
)
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.schema import Control, ControlSchema
from scipy.optimize import lsq_linear


class TinyRig(Rig):
    """8 blendshapes on 50 vertices; ``corrective`` adds w0 * w1 * shape 2 (non-linear)."""

    def __init__(self, corrective: bool) -> None:
        rng = np.random.default_rng(11)
        self.name = "tiny"
        self.neutral = rng.normal(size=(50, 3)).astype(np.float32)
        self.faces = np.zeros((0, 3), dtype=np.int32)
        ctrls = [Control(f"c{i}", 0.0, 1.0, 0.0) for i in range(6)]
        ctrls += [Control("side", -1.0, 1.0, 0.0), Control("top", -2.0, 0.5, 0.5)]
        self.schema = ControlSchema(tuple(ctrls))
        self.shapes = rng.normal(0, 0.2, size=(8, 50, 3))
        self.corrective = corrective
        self.linear = not corrective

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        out = self.neutral[None] + np.einsum("bc,cvx->bvx", controls, self.shapes)
        if self.corrective:
            out = out + 2.0 * (controls[:, 0] * controls[:, 1])[:, None, None] * self.shapes[2]
        return out

    def torch_forward(self, w: torch.Tensor) -> torch.Tensor:
        shapes = torch.as_tensor(self.shapes, dtype=torch.float32)
        out = torch.as_tensor(self.neutral)[None] + torch.einsum("bc,cvx->bvx", w, shapes)
        if self.corrective:
            out = out + 2.0 * (w[:, 0] * w[:, 1])[:, None, None] * shapes[2]
        return out


def _poses(rig: Rig, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo, hi = rig.schema.lower, rig.schema.upper
    w = lo + (hi - lo) * rng.random((n, rig.control_count))
    rest = rng.random(w.shape) < 0.5
    w = np.where(rest, rig.schema.defaults[None], w)
    return w.astype(np.float32)


def test_jacobian_of_linear_rig_is_its_shapes() -> None:
    rig = TinyRig(corrective=False)
    lin = linearise_rig(rig)
    np.testing.assert_allclose(lin.jacobian, rig.shapes.reshape(8, -1).T, atol=2e-4)
    np.testing.assert_allclose(
        lin.base, rig.neutral.reshape(-1) + 0.5 * rig.shapes[7].reshape(-1), atol=1e-5
    )


def test_lsq_recovers_controls_of_a_linear_rig_exactly() -> None:
    rig = TinyRig(corrective=False)
    w = _poses(rig, 20, seed=0)
    sol = solve_lsq(linearise_rig(rig), rig.evaluate(w), rig.schema.lower, rig.schema.upper)
    np.testing.assert_allclose(sol.controls, w, atol=1e-4)
    assert sol.per_frame_s == pytest.approx(sol.seconds / 20)


def test_lsq_qr_reduction_equals_scipy_on_the_full_system() -> None:
    # Outside reference: scipy.optimize.lsq_linear on the unreduced (V*3, C) system.
    rig = TinyRig(corrective=True)
    lin = linearise_rig(rig)
    rng = np.random.default_rng(1)
    y = rig.evaluate(_poses(rig, 5, seed=2)) + rng.normal(0, 0.3, size=(5, 50, 3)).astype(
        np.float32
    )
    lo, hi = rig.schema.lower, rig.schema.upper
    fast = solve_lsq(lin, y, lo, hi).controls
    np.testing.assert_allclose(fast, solve_lsq_naive(lin, y, lo, hi), atol=1e-5)
    b = y[0].reshape(-1).astype(np.float64) - lin.base + lin.jacobian @ lin.at
    ref = lsq_linear(lin.jacobian, b, bounds=(lo.astype(np.float64), hi.astype(np.float64))).x
    np.testing.assert_allclose(fast[0], ref, atol=1e-4)
    assert np.all(fast >= lo) and np.all(fast <= hi)
    with pytest.raises(BaselineError, match="vertices"):
        solve_lsq(lin, y[:, :10], lo, hi)


def test_optimiser_lowers_mesh_loss_and_stays_in_bounds() -> None:
    rig = TinyRig(corrective=True)
    w = _poses(rig, 12, seed=3)
    y = rig.evaluate(w)
    # Targets pushed outside the reachable set: the optimum sits on the bounds.
    y_far = y + 1.5 * rig.shapes[0].astype(np.float32)[None]
    lo, hi, d = rig.schema.lower, rig.schema.upper, rig.schema.defaults
    sol = optimise_frames(
        rig.torch_forward, np.concatenate([y, y_far]), lo, hi, d, steps=300, lr=0.05, chunk=7
    )
    hist = sol.loss_history
    assert len(hist) == 300 and hist[-1] < 0.2 * hist[0] and hist[-1] <= min(hist) + 1e-6
    assert np.all(sol.controls >= lo) and np.all(sol.controls <= hi)
    assert np.abs(sol.controls[12:, 0] - hi[0]).max() < 1e-6  # pinned on the upper bound
    fit = np.linalg.norm(rig.evaluate(sol.controls[:12]) - y, axis=-1).mean()
    start = np.linalg.norm(rig.evaluate(np.repeat(d[None], 12, 0)) - y, axis=-1).mean()
    assert fit < 0.1 * start
    with pytest.raises(BaselineError, match="steps"):
        optimise_frames(rig.torch_forward, y, lo, hi, d, steps=0)


class CountingRig(TinyRig):
    """TinyRig that records the batch size of every evaluation."""

    def __init__(self, corrective: bool) -> None:
        super().__init__(corrective)
        self.batches: list[int] = []

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        self.batches.append(int(controls.shape[0]))
        return super()._evaluate(controls)


def test_fd_jacobian_is_one_batched_call_and_matches_the_shapes() -> None:
    rig = CountingRig(corrective=False)
    x = rig.schema.upper.astype(np.float64)  # every step must turn inward
    f, jac = fd_jacobian(rig, x, 1e-3)
    assert rig.batches == [rig.control_count + 1]
    np.testing.assert_allclose(jac, rig.shapes.reshape(8, -1).T, atol=1e-3)
    np.testing.assert_allclose(f, rig.evaluate(x[None])[0].reshape(-1))


def test_nlls_equals_lsq_linear_on_a_linear_rig() -> None:
    # Outside reference: scipy.optimize.lsq_linear on the rig's exact linear system.
    rig = TinyRig(corrective=False)
    rng = np.random.default_rng(4)
    y = rig.evaluate(_poses(rig, 6, seed=7)) + rng.normal(0, 0.2, size=(6, 50, 3)).astype(
        np.float32)
    lo, hi = rig.schema.lower.astype(np.float64), rig.schema.upper.astype(np.float64)
    a = rig.shapes.reshape(8, -1).T
    tight = solve_nlls(rig, y, ftol=1e-12)
    sol = solve_nlls(rig, y)  # the default tolerance: the cost within 1e-4 of the optimum's

    def cost(w: np.ndarray, t: int) -> float:
        return float(np.sum((a @ w + rig.neutral.reshape(-1) - y[t].reshape(-1)) ** 2))

    for t in range(6):
        ref = lsq_linear(a, y[t].reshape(-1) - rig.neutral.reshape(-1), bounds=(lo, hi),
                         method="bvls").x
        np.testing.assert_allclose(tight.controls[t], ref, atol=1e-4)  # float32 rig, FD Jacobian
        assert cost(sol.controls[t].astype(np.float64), t) <= (1 + 1e-4) * cost(ref, t)
    assert np.all(sol.controls >= rig.schema.lower) and np.all(sol.controls <= rig.schema.upper)


def test_nlls_recovers_noise_free_poses_of_a_nonlinear_rig_and_warm_starts() -> None:
    rig = CountingRig(corrective=True)
    # A smooth trajectory, so each frame starts near its answer.
    t = np.linspace(0, 1, 20)[:, None]
    lo, hi = rig.schema.lower, rig.schema.upper
    w = (lo + (hi - lo) * (0.3 + 0.4 * np.sin(2.0 * t + np.arange(8)) ** 2)).astype(np.float32)
    w[:, 3] = 0.0  # a control on its bound all along
    y = rig.evaluate(w)
    rig.batches.clear()
    sol = solve_nlls(rig, y)
    np.testing.assert_allclose(sol.controls, w, atol=1e-5)
    warm_calls = len(rig.batches)
    rig.batches.clear()
    cold = solve_nlls(rig, y, warm_start=False)
    np.testing.assert_allclose(cold.controls, w, atol=1e-5)
    assert warm_calls < len(rig.batches)  # warm starts need fewer evaluations
    assert max(rig.batches) == rig.control_count + 1
    with pytest.raises(BaselineError, match="observed"):
        solve_nlls(rig, y[:, :10])
