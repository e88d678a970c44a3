"""Waking an at-rest control on what it adds to the moved ones (runtime/solve/active.py
``given_moved_set``, ``RefineSettings.wake``).

References: the Schur complement of a least-squares system (the extra decrease of adding one
regressor, the partial F-test of forward stepwise regression, Hastie, Tibshirani & Friedman,
"The Elements of Statistical Learning", 2nd ed. 2009, 3.3.2), checked against a naive twin that
solves the two least-squares problems, with and without the control, with numpy's lstsq; and a
zoo chain rig evaluated for real (export/rigs/zoo.py), its Jacobian by forward differences
through the rig (export/quality/baselines.py ``fd_jacobian``).
"""

from __future__ import annotations

import numpy as np
import pytest
from rigcast.export.quality.baselines import fd_jacobian
from rigcast.export.rigs.zoo import make_zoo_rig
from rigcast.runtime.solve.active import active_set, given_moved_set, wake_factor
from rigcast.runtime.solve.refine import RefineError, Refiner, RefineSettings


def given_moved_naive(u: np.ndarray, d: np.ndarray, a: np.ndarray, r: np.ndarray,
                      factor: float) -> np.ndarray:
    """Twin of ``given_moved_set`` on a linear model: u (N, C), a (M, C) the Jacobian, r (N, M)
    the residuals. An at-rest control wakes when the least-squares fit of r on the moved
    columns and it removes more than factor^2 |r_M|^2 beyond the fit on the moved columns
    alone (each found with lstsq), and a step on it would not leave the bounds."""
    def left(res: np.ndarray, cols: list[int]) -> tuple[float, np.ndarray]:
        """What the least-squares fit of res on the columns leaves, and the fit."""
        if not cols:
            return float(res @ res), np.zeros(0)
        x = np.linalg.lstsq(a[:, cols], res, rcond=None)[0]
        rest = res - a[:, cols] @ x
        return float(rest @ rest), x

    out = np.zeros(u.shape, bool)
    for i in range(u.shape[0]):
        moved = np.flatnonzero(np.abs(u[i] - d) > 1e-6)
        base, _ = left(r[i], list(moved))
        g = a.T @ r[i]
        for c in range(u.shape[1]):
            if c in moved:
                out[i, c] = not ((g[c] > 0 and u[i, c] >= 1) or (g[c] < 0 and u[i, c] <= 0))
                continue
            after, x = left(r[i], [*moved, c])
            if base - after > factor**2 * base:
                out[i, c] = not ((x[-1] > 0 and u[i, c] >= 1) or (x[-1] < 0 and u[i, c] <= 0))
    return out


def test_given_moved_set_matches_its_naive_twin() -> None:
    rng = np.random.default_rng(3)
    m, c, n = 60, 7, 40
    a = rng.standard_normal((m, c))
    a[:, 3] = 0.7 * a[:, 2] + 0.6 * a[:, 4] + 0.05 * rng.standard_normal(m)  # nearly in span
    d = np.full(c, 0.3)
    u = np.where(rng.random((n, c)) < 0.4, rng.uniform(0, 1, (n, c)), d)
    u[::5, 1] = 0.0  # some at a bound (moved there)
    u[::7] = d  # some with nothing moved
    r = rng.standard_normal((n, m)) + (rng.standard_normal((n, c)) * (rng.random((n, c)) < 0.3)) @ a.T
    g = r @ a
    rss = (r * r).sum(axis=1)
    for factor in (0.1, 0.3, 0.6):
        want = given_moved_naive(u, d, a, r, factor)
        got = given_moved_set(u, d, g, rss, a.T @ a, factor)
        np.testing.assert_array_equal(got, want)
    # nothing moved: the test is the marginal one of ``active_set``
    rest = np.repeat(d[None], n, axis=0)
    np.testing.assert_array_equal(
        given_moved_set(rest, d, g, rss, a.T @ a, wake_factor(4.0, m, 0.1)),
        active_set(rest, d, g, rss, np.diag(a.T @ a), 4.0, m, 0.1))


def _rig_refiner(rig, settings: RefineSettings) -> Refiner:  # type: ignore[no-untyped-def]
    """A refiner through the real rig: gradient J(c)^T r in normalised controls by forward
    differences, the fixed matrix J^T J at rest."""
    s = rig.schema
    lo, span = s.lower.astype(np.float64), (s.upper - s.lower).astype(np.float64)

    def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        gs, rs = [], []
        for c, y in zip(np.asarray(controls, np.float64), mesh, strict=True):
            f, jac = fd_jacobian(rig, c, 1e-4)
            r = y.reshape(-1).astype(np.float64) - f
            gs.append((jac * span).T @ r)
            rs.append(r @ r)
        return np.array(gs, np.float32), np.array(rs, np.float32)

    _, jac = fd_jacobian(rig, s.defaults.astype(np.float64), 1e-4)
    j = jac * span
    return Refiner(gradient, j.T @ j, lo, s.upper, s.defaults, j.shape[0], settings)


@pytest.mark.parametrize("joint", ["c2_j01_x", "c3_j01_x", "c0_j03_x"])
def test_a_joint_whose_bend_the_network_put_on_its_neighbours_comes_back(joint: str) -> None:
    """Zoo chain rig 294487: one joint bent alone, the network's answer with the bend split on
    its two neighbours (what its inverse network gave for such probes). Their fields together
    nearly make the joint's (beyond the next joint the same rotation about the same point), so
    the joint's gradient alone explains a sliver of the residual and the marginal test ("alone")
    leaves it at rest; what it adds to the moved neighbours is nearly all of it ("given")."""
    rig = make_zoo_rig(294487)
    s = rig.schema
    i = s.names.index(joint)
    truth = s.defaults.astype(np.float64).copy()
    truth[i] = 0.9 * s.lower[i]
    mesh = rig.evaluate(truth[None]).astype(np.float32)
    guess = truth.copy()
    guess[i] = 0.0
    guess[[i - 1, i + 1]] = truth[i] / 2
    span = float(s.upper[i] - s.lower[i])
    got = {}
    for wake in ("alone", "given"):
        ref = _rig_refiner(rig, RefineSettings(wake=wake, curvature="fixed"))
        got[wake] = ref.refine(guess[None].astype(np.float32), mesh)[0]
    assert abs(got["alone"][i] - truth[i]) > 0.2 * span  # lost on the old rule
    assert abs(got["given"][i] - truth[i]) < 0.05 * span
    others = np.setdiff1d(np.arange(len(s)), [i])
    assert np.abs(got["given"][others] - truth[others]).max() < 0.05 * span


def test_given_wakes_no_more_often_on_noise() -> None:
    """White noise on a linear rig around a moved pose: the conditional test's statistic is a
    standard normal as the marginal one is, so at kappa = 4 (no share floor) neither wakes an
    at-rest control in 400 frames, though the columns are strongly correlated."""
    rng = np.random.default_rng(8)
    m, c, n = 900, 10, 400
    base = rng.standard_normal((m, 3))
    a = base @ rng.standard_normal((3, c)) + 0.2 * rng.standard_normal((m, c))
    d = np.zeros(c)
    u = np.zeros((n, c))
    u[:, :4] = rng.uniform(0.2, 0.8, (n, 4))
    r = rng.standard_normal((n, m))  # the moved controls at their optimum, up to the noise
    r -= (r @ a[:, :4]) @ np.linalg.solve(a[:, :4].T @ a[:, :4], a[:, :4].T)
    g, rss = r @ a, (r * r).sum(axis=1)
    factor = wake_factor(4.0, m, 0.0)
    woke = given_moved_set(u, d, g, rss, a.T @ a, factor)[:, 4:]
    assert woke.sum() <= 1


def test_wake_setting_is_checked() -> None:
    with pytest.raises(RefineError, match="wake"):
        RefineSettings(wake="maybe")
