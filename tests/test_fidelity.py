"""Fidelity checks through the real rig: recoverability (with a deliberately broken inverse),
false-active controls, jitter against the truth, mesh error and off-manifold scores."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from rigcast.export.quality import metrics
from rigcast.export.quality.baselines import linearise_rig, solve_lsq
from rigcast.export.quality.fidelity import (
    FidelityError,
    false_active,
    false_active_naive,
    jitter_vs_truth,
    mesh_error,
    off_manifold_score,
    recoverability,
    recoverability_probes,
    same_mesh_twins,
)
from rigcast.export.rigs.rig import Rig
from rigcast.export.rigs.zoo import ZooRig, make_zoo_rig
from rigcast.runtime.schema import Control, ControlSchema


def _linear_zoo_rig() -> ZooRig:
    for seed in range(80):
        rig = make_zoo_rig(seed, max_vertices=1200, max_controls=12)
        if rig.spec.kind == "blendshapes":
            return rig
    raise AssertionError("no linear zoo rig among 80 seeds")


@pytest.fixture(scope="module")
def rig() -> ZooRig:
    return _linear_zoo_rig()


def _lsq_solve(rig: Rig) -> Callable[[np.ndarray], np.ndarray]:
    lin = linearise_rig(rig)
    return lambda meshes: solve_lsq(lin, meshes, rig.schema.lower, rig.schema.upper).controls


class TwinRig(Rig):
    """Three blendshapes on 60 vertices; control ``b`` makes exactly the mesh of ``a`` (same
    field, half the gain over twice the range); ``weak`` barely moves anything."""

    def __init__(self) -> None:
        rng = np.random.default_rng(3)
        self.name = "twins"
        self.neutral = rng.normal(size=(60, 3)).astype(np.float32)
        self.faces = np.zeros((0, 3), np.int32)
        self.schema = ControlSchema((Control("a", 0, 1, 0), Control("b", 0, 2, 0),
                                     Control("c", -1, 1, 0), Control("weak", 0, 1, 0)))
        self.field = rng.normal(0, 0.1, size=(3, 60, 3))
        self.field[2] *= 1e-4
        self.linear = True

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        gains = controls * np.array([1.0, 0.5, 1.0, 1.0])
        fields = self.field[[0, 0, 1, 2]]
        return self.neutral[None] + np.einsum("bc,cvx->bvx", gains, fields)


def test_probes_cover_each_side_with_room() -> None:
    s = TwinRig().schema
    p = recoverability_probes(s)
    # a, b, weak: one side each (default on the lower bound); c: both sides; 4 fractions each
    assert len(p.control) == 4 * (1 + 1 + 2 + 1)
    c_rows = p.controls[p.control == 2, 2]
    np.testing.assert_allclose(sorted(c_rows), [-1, -0.75, -0.5, -0.25, 0.25, 0.5, 0.75, 1])
    off = p.controls.copy()
    off[np.arange(len(off)), p.control] = s.defaults[p.control]
    np.testing.assert_array_equal(off, np.broadcast_to(s.defaults, off.shape))


def test_an_exact_solve_recovers_every_control(rig: ZooRig) -> None:
    result = recoverability(rig, _lsq_solve(rig), forward_err=0.0)
    assert result.recovered.all(), result.unrecoverable
    assert result.recoverable == list(rig.schema.names) and result.lost == []
    assert all(c.effect > 0 for c in result.controls)


def test_a_broken_inverse_that_zeroes_one_control_is_reported(rig: ZooRig) -> None:
    exact = _lsq_solve(rig)
    k = 3

    def broken(meshes: np.ndarray) -> np.ndarray:
        out = np.array(exact(meshes))
        out[:, k] = rig.schema.defaults[k]
        return out

    result = recoverability(rig, broken, forward_err=0.0)
    name = rig.schema.names[k]
    assert result.lost == [name]
    (entry,) = result.unrecoverable
    assert entry["control"] == name and entry["reason"].startswith("not recovered (got 0 for")
    assert name not in result.recoverable and len(result.recoverable) == rig.control_count - 1


def test_reasons_same_mesh_and_below_the_forward_error() -> None:
    rig = TwinRig()
    lin = linearise_rig(rig)

    def solve(meshes: np.ndarray) -> np.ndarray:
        out = np.array(solve_lsq(lin, meshes, rig.schema.lower, rig.schema.upper).controls)
        out[:, 3] = 0.0  # loses the weak control
        out[:, 1] = 0.0  # and explains every a-or-b mesh with a alone
        return out

    weak_effect = float(np.linalg.norm(rig.field[2], axis=1).mean())
    result = recoverability(rig, solve, forward_err=10 * weak_effect)
    reasons = {e["control"]: e["reason"] for e in result.unrecoverable}
    assert reasons["b"] == "same mesh as control a"
    assert reasons["weak"].startswith("mesh effect below the forward model's error")
    assert set(result.recoverable) == {"a", "c"} and result.lost == []
    twins = same_mesh_twins(np.stack([rig.field[[0, 0, 1, 2]].reshape(4, -1),
                                      np.zeros((4, 180))], axis=1))
    assert twins == [[1], [0], [], []]


def test_false_active_counts_only_controls_at_rest_in_truth() -> None:
    s = TwinRig().schema
    truth = np.zeros((3, 4))
    truth[0, 0] = 0.5
    pred = truth.copy()
    pred[0, 0] = 0.9  # wrong, but active in truth: not a false active
    pred[1, 2] = 0.03  # 1.5 % of c's range 2: false active
    pred[2, 1] = 0.015  # 0.75 % of b's range 2: below the threshold
    pred[2, 3] = -0.02  # 2 % of range: false active
    assert false_active(pred, truth, s) == pytest.approx(2 / 3)
    rng = np.random.default_rng(0)
    t2 = np.where(rng.random((40, 4)) < 0.5, 0.0, rng.random((40, 4)))
    p2 = t2 + rng.normal(0, 0.02, size=t2.shape)
    assert false_active(p2, t2, s) == pytest.approx(false_active_naive(p2, t2, s))
    with pytest.raises(FidelityError, match="false_active"):
        false_active(p2[:, :3], t2[:, :3], s)


def test_jitter_vs_truth_ignores_the_performance_and_sees_the_noise() -> None:
    s = TwinRig().schema
    t = np.linspace(0, 2, 4000)[:, None]
    truth = 0.5 + 0.4 * np.sin(3 * t + np.arange(4))
    assert metrics.jitter(truth, s.lower, s.upper) > 0
    assert jitter_vs_truth(truth + 0.1, truth, s) == pytest.approx(0.0, abs=1e-12)
    noise = np.random.default_rng(1).normal(0, 0.01, truth.shape)
    j = jitter_vs_truth(truth + noise, truth, s)
    span = s.upper - s.lower
    # RMS of (n[t+1] - 2 n[t] + n[t-1]) / span for white noise: sigma * sqrt(6) / span
    expected = 0.01 * np.sqrt(6) * np.sqrt(np.mean(1 / span**2))
    assert j == pytest.approx(expected, rel=0.05)


def test_mesh_error_goes_through_the_real_rig() -> None:
    rig = TwinRig()
    w = np.zeros((3, 4))
    w[1, 0] = 1.0
    meshes = rig.evaluate(w)
    err = mesh_error(rig, np.zeros((3, 4)), meshes)
    moved = np.linalg.norm(rig.field[0], axis=1).mean()
    assert err.mean == pytest.approx(moved / 3, rel=1e-5)
    assert err.worst_frame == pytest.approx(moved, rel=1e-5)
    assert err.max_vertex == pytest.approx(np.linalg.norm(rig.field[0], axis=1).max(), rel=1e-5)
    assert mesh_error(rig, w, meshes).mean < 1e-6


def test_off_manifold_score() -> None:
    planted = np.zeros(100, bool)
    planted[[10, 30, 50, 70]] = True
    flags = planted.copy()
    flags[70] = False
    flags[[5, 6]] = True
    score = off_manifold_score(flags, planted)
    assert score.recall == 0.75 and score.false_rate == pytest.approx(2 / 96)
    assert score.planted == 4 and score.flagged == 5
    assert np.isnan(off_manifold_score(flags, np.zeros(100, bool)).recall)
    with pytest.raises(FidelityError):
        off_manifold_score(flags[:50], planted)
