"""The refinement's step loop (runtime/solve/refine.py describes each step), batched and for one
frame, with the curvature of each step either the bundle's fixed matrix (gathered on the active
pairs with no graph call in batch, factored once per active set live) or the frame's own matrix
at its current controls (bundles since it).

A bundle's refinement graph can return, beside the gradient, the Gauss-Newton matrix
J(u)^T G J(u) of the forward model's fit at the frame's current controls u, along the directions
it is given (export/training/refine.py ``RefineCore.curvature``); the runtime sends the frame's
active controls, so a step solves the frame's own Gauss-Newton system on them instead of the
bundle's fixed matrix averaged over poses (runtime/solve/refine.py, a chord method). On a rig
whose mesh is not linear in its controls (correctives, skinned joints) the fixed matrix can
point a full step the wrong way and converges slowly near the optimum; Gauss-Newton at the
current point converges in a few steps near it (Nocedal & Wright, "Numerical Optimization",
2nd ed. 2006, 10.3). The active set, the prior's pull, the damping, the bounds and the
halvings are the same whichever the curvature.

The mode sets when a frame's matrix is made: "step", after every step that moved the frame
(Gauss-Newton; the last step's trials go without one, as no step reads it); "frame", once for
the frame's first active set, then only when a control outside it wakes (a chord method with
the frame's own matrix); "fixed", the bundle's matrix, the same for every frame (the chord
method; the live path keeps its factors per active set).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
from rigcast.runtime.solve.active import (
    active_set,
    free_controls,
    gather_active,
    given_moved_one,
    given_moved_set,
    pull_mask,
    solve_gathered,
)

if TYPE_CHECKING:
    from rigcast.runtime.solve.refine import Refiner

#: (controls (N, C) float32, per-frame state (N, ...), tangents (N, T, C) float32) ->
#: (gradient (N, C), residual_sq (N,), the Gauss-Newton matrix along the tangents (N, T, T)),
#: and from a moment-form graph a fourth, the basis weights z (N, R) at the controls
CurvatureFn = Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, ...]]
#: one frame's state (1, ...) -> (controls (1, C), tangents (1, T, C)) -> the same, with what
#: depends on the frame alone made once (the live path)
BindCurvatureFn = Callable[[np.ndarray], Callable[[np.ndarray, np.ndarray],
                                                  tuple[np.ndarray, ...]]]
#: one frame's graph as the one-frame steps call it
RunFn = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, ...]]

#: active sets whose fixed-matrix factors, given-moved parts and tangents a refiner keeps (all
#: dropped when full)
SYSTEMS = 256


def weights_of(out: tuple[np.ndarray, ...], at: int) -> np.ndarray | None:
    """The basis weights an evaluation returned at place ``at`` (None when it gave none)."""
    return out[at] if len(out) > at else None


class ActiveSystem:
    """One frame's damped system on its active controls A, from sub (k, k) its curvature:
    (sub + (damp - 1) diag(sub) + diag(ridge)) delta = rhs, and g^T sub^-1 g."""

    def __init__(self, sub: np.ndarray, damp: float) -> None:
        self.sub, self.damp = sub, float(damp)

    def decrease(self, ga: np.ndarray) -> float:
        """ga (k,) -> ga^T sub^-1 ga, what a full undamped step on A removes from |r|^2."""
        return float(ga @ np.linalg.solve(self.sub, ga))

    def step(self, rhs: np.ndarray, ridge: np.ndarray) -> np.ndarray:
        """rhs, ridge (k,) -> delta (k,)."""
        system = self.sub.copy()
        diagonal = system.reshape(-1)[:: system.shape[0] + 1]  # a view of the diagonal
        np.multiply(diagonal, self.damp, out=diagonal)
        diagonal += ridge
        out: np.ndarray = np.linalg.solve(system, rhs)
        return out


class FactoredSystem(ActiveSystem):
    """:class:`ActiveSystem` on a matrix that recurs (the bundle's fixed one), factored once:
    sub^-1 and the eigendecomposition Q diag(e) Q^T of the damped matrix, so a step with the
    same ridge r on every control is Q diag(1 / (e + r)) Q^T rhs (a ridge adds to every
    eigenvalue and keeps the eigenvectors): matrix-vector products instead of solves."""

    def __init__(self, sub: np.ndarray, damp: float) -> None:
        super().__init__(sub, damp)
        damped = sub.copy()
        damped[np.diag_indices(sub.shape[0])] *= damp
        self.inv = np.linalg.inv(sub)
        self.eig, self.q = np.linalg.eigh(damped)

    def decrease(self, ga: np.ndarray) -> float:
        return float(ga @ (self.inv @ ga))

    def step(self, rhs: np.ndarray, ridge: np.ndarray) -> np.ndarray:
        if ridge.size and np.all(ridge == ridge[0]):
            out: np.ndarray = self.q @ ((rhs @ self.q) / (self.eig + ridge[0]))
            return out
        return super().step(rhs, ridge)


def one_hot(idx: np.ndarray, valid: np.ndarray, c: int) -> np.ndarray:
    """idx, valid (N, W) from ``gather_active`` -> (N, W, C) float32 tangents, one row per active
    control, zero rows on the padding."""
    out = np.zeros((*idx.shape, c), np.float32)
    r, w = np.nonzero(valid)
    out[r, w, idx[r, w]] = 1.0
    return out


class CurvatureStore:
    """Each frame's Gauss-Newton matrix on a set of its controls, made at its current point.

    h (N, W, W) the matrices, have (N, C) which controls each holds, pos (N, C) their place."""

    def __init__(self, n: int, c: int) -> None:
        self.h = np.zeros((n, 0, 0))
        self.have = np.zeros((n, c), bool)
        self.pos = np.zeros((n, c), np.int64)

    def put(self, rows: np.ndarray, idx: np.ndarray, valid: np.ndarray, h: np.ndarray) -> None:
        """rows (M,) frames, idx and valid (M, W), h (M, W, W): their new matrices."""
        w = idx.shape[1]
        if w > self.h.shape[1]:
            grown = np.zeros((self.h.shape[0], w, w))
            grown[:, : self.h.shape[1], : self.h.shape[1]] = self.h
            self.h = grown
        self.h[rows] = 0.0
        self.h[rows, :w, :w] = h
        self.have[rows] = False
        r, k = np.nonzero(valid)
        self.have[rows[r], idx[r, k]] = True
        self.pos[rows[r], idx[r, k]] = k

    def gather(self, rows: np.ndarray, idx: np.ndarray) -> np.ndarray:
        """rows (M,), idx (M, W) controls each frame holds -> (M, W, W) their matrices."""
        p = np.take_along_axis(self.pos[rows], idx, axis=1)
        out: np.ndarray = self.h[rows[:, None, None], p[:, :, None], p[:, None, :]]
        return out


def curved_steps(ref: Refiner, curvature: CurvatureFn | None, u: np.ndarray, mesh: np.ndarray,
                 mode: str) -> tuple[np.ndarray, np.ndarray | None]:
    """The bounded, damped, safeguarded steps on a batch, each frame's curvature from
    ``curvature`` as ``mode`` says ("fixed": the bundle's matrix ``ref.hessian``, gathered on
    each frame's active controls, with no graph call; ``curvature`` may then be None).
    u (N, C) the network's answer in normalised controls, mesh (N, ...) the frames' state ->
    ((N, C) before the snap, the basis weights (N, R) the graph made at them, or None)."""
    s = ref.settings
    n, c = u.shape
    u0 = u.copy()
    pulled = pull_mask(u0, ref.d, s.pull)
    fixed = s.prior * ref.diag
    floor = 1e-6 * ref.diag  # a control whose effect vanishes here keeps a solvable system
    chord = mode == "fixed"
    store = CurvatureStore(n, c)
    if chord:
        g, rss, z = ref._evaluate(u, mesh)
    else:  # the first matrices along the controls the network moved: most frames' first set
        assert curvature is not None
        idx0, valid0 = gather_active(np.abs(u0 - ref.d) > 1e-6)  # the moved controls
        out = curvature(ref.controls(u), mesh, one_hot(idx0, valid0, c))
        g, rss, z = np.asarray(out[0], np.float64), np.asarray(out[1], np.float64), \
            weights_of(out, 3)
        store.put(np.arange(n), idx0, valid0, np.asarray(out[2], np.float64))
    z = None if z is None else np.array(z)  # its own: rows follow the frames that move
    live = np.arange(n)
    for number in range(s.steps):
        # the trial's matrix is read by the next step only: the last step's trials go without
        # (the graph then skips the curvature, and the other outputs are the same)
        curved = mode == "step" and number < s.steps - 1
        ul, gl, rl, dl = u[live], g[live], rss[live], u[live] - u0[live]
        # from the network's answer: at-rest controls tested on what they add to the moved ones
        free = (given_moved_set(ul, ref.d, gl, rl, ref.hessian, ref.wake)
                if s.wake == "given" and number == 0
                else active_set(ul, ref.d, gl, rl, ref.diag, s.kappa, ref.coords, s.wake_share))
        need = (free & ~store.have[live]).any(axis=1) if not chord else None
        if need is not None and need.any():  # a control woke: its frame's matrix along the set
            assert curvature is not None
            rows = live[need]
            idx_n, valid_n = gather_active(free[need])
            h_n = curvature(ref.controls(u[rows]), np.take(mesh, rows, axis=0),
                            one_hot(idx_n, valid_n, c))[2]
            store.put(rows, idx_n, valid_n, np.asarray(h_n, np.float64))
        idx, valid = gather_active(free)
        if idx.shape[1] == 0:
            break
        # the fixed matrix's entries on the active pairs, as V H V^T with one-hot V gives them
        sub = (ref.hessian[idx[:, :, None], idx[:, None, :]] if chord
               else store.gather(live, idx))
        w = idx.shape[1]
        diag = sub[:, np.arange(w), np.arange(w)]
        sub[:, np.arange(w), np.arange(w)] = np.maximum(diag, floor[idx])
        g_w = np.take_along_axis(gl, idx, axis=1)
        lam = np.zeros(live.size)
        if s.prior_sd > 0.0:
            left = np.maximum(rl - (g_w * solve_gathered(sub, g_w, valid, 0.0,
                                                         np.zeros(valid.shape))).sum(axis=1), 0.0)
            lam = np.maximum(left / np.maximum(ref.coords - free.sum(axis=1), 1)
                             - ref.model_var, 0.0) / s.prior_sd**2
        ridge = lam[:, None] * pulled[live]  # (n, C)
        pull = gl - (ridge + fixed) * dl
        step = np.zeros((live.size, c))
        np.put_along_axis(step, idx, solve_gathered(
            sub, np.take_along_axis(pull, idx, axis=1), valid, s.damping + s.prior,
            np.take_along_axis(ridge, idx, axis=1)), axis=1)
        moving = np.abs(step).max(axis=1, initial=0.0) >= s.tol
        live, ul, step, ridge, dl = live[moving], ul[moving], step[moving], ridge[moving], \
            dl[moving]
        if live.size == 0:
            break
        cost = rl[moving] + ((ridge + fixed) * dl**2).sum(axis=1)
        pending = np.ones(live.size, dtype=bool)
        share = 1.0
        idx, valid = idx[moving], valid[moving]
        for _halving in range(s.backtrack + 1):
            rows = live[pending]
            trial = np.clip(ul[pending] + share * step[pending], 0.0, 1.0)
            state = np.take(mesh, rows, axis=0)
            if curved and curvature is not None:  # the trial's matrix comes with it
                out = curvature(ref.controls(trial), state,
                                one_hot(idx[pending], valid[pending], c))
                g_new, rss_new, h_new, z_new = out[0], out[1], out[2], weights_of(out, 3)
            else:
                g_new, rss_new, z_new = ref._evaluate(trial, state)
            cost_new = rss_new + ((ridge[pending] + fixed) * (trial - u0[rows]) ** 2).sum(axis=1)
            better = (cost_new <= cost[pending]) & np.isfinite(rss_new)
            took = rows[better]
            u[took], g[took], rss[took] = trial[better], g_new[better], rss_new[better]
            if z is not None and z_new is not None:
                z[took] = z_new[better]
            if curved:  # moved: its matrix is the one made at the new point
                store.put(took, idx[pending][better], valid[pending][better],
                          np.asarray(h_new, np.float64)[better])
            pending[np.flatnonzero(pending)[better]] = False
            if not pending.any():
                break
            share *= 0.5
        live = live[~pending]
    return u, z


def tangents_along(ref: Refiner, a: np.ndarray) -> np.ndarray:
    """a (k,) controls -> (1, k, C) float32 one-hot tangents along them, read-only, made once
    per set (``ref.tangent_cache``, emptied when it holds ``SYSTEMS`` sets)."""
    key = a.tobytes()
    hit = ref.tangent_cache.get(key)
    if hit is None:
        if len(ref.tangent_cache) >= SYSTEMS:
            ref.tangent_cache.clear()
        hit = ref.eye[a][None]
        hit.setflags(write=False)
        ref.tangent_cache[key] = hit
    return hit


def curved_steps_one(ref: Refiner, run: RunFn, u: np.ndarray, mode: str
                     ) -> tuple[np.ndarray, np.ndarray | None]:
    """:func:`curved_steps` for a batch of one frame (the live path), on vectors, with the
    frame's graph bound once (``run``: controls (1, C), tangents (1, T, C) -> gradient, |r|^2,
    the matrix along them[, the basis weights]); tested against :func:`curved_steps`.
    u (1, C) -> ((1, C), the basis weights (1, R) at them or None).

    The same arithmetic as the batch, with as few numpy calls as a step allows (each costs
    about a microsecond whatever its size, and a live frame takes up to a dozen steps): the
    frame's matrix is held with the controls it is along (``held``), so a step on the same
    set takes it whole; the tangents are made once per active set (``tangents_along``); the
    first step, from the network's answer, has no pull yet to add to its gradient or cost;
    the frame's own matrix is damped in place after the noise estimate's solve has read it."""
    s, d = ref.settings, ref.d
    lower, span = ref.lower, ref.span
    root_diag, factor, floor = ref.root_diag, ref.wake, ref.floor
    damp = 1.0 + s.damping + s.prior
    eye = ref.eye
    chord = mode == "fixed"
    given = s.wake == "given"
    no_tangents = eye[:0][None]

    controls = np.empty((1, lower.shape[0]), np.float32)  # what each evaluation sends
    scaled = np.empty(lower.shape[0])

    def evaluate(x: np.ndarray, tangents: np.ndarray
                 ) -> tuple[np.ndarray, float, np.ndarray, np.ndarray | None]:
        np.add(lower, np.multiply(span, x, out=scaled), out=controls[0])  # float64, then cast
        out = run(controls, tangents)
        return out[0][0].astype(np.float64), float(out[1][0]), out[2][0], weights_of(out, 3)

    u0 = u[0].copy()
    x = u0  # never written in place: each accepted trial is a new array
    every = s.pull == "all"  # the pull's mask all ones: lam * 1 is lam, so a scalar does
    pulled = ref.pulled_all if every else pull_mask(u0, d, s.pull)
    fixed = s.prior * ref.diag
    held = np.flatnonzero(np.abs(u0 - d) > 1e-6)  # the controls the frame's matrix h is along
    g, rss, h, z = evaluate(x, no_tangents if chord else tangents_along(ref, held))
    for number in range(s.steps):
        if given and number == 0 and held.size:  # x is u0: the moved controls are held's
            a = np.flatnonzero(given_moved_one(x, d, g, rss, held, ref.given_parts(held),
                                               factor))
        else:
            tau = root_diag * (factor * math.sqrt(max(rss, 0.0)))
            a = np.flatnonzero(free_controls(x, d, g, tau))
        if a.size == 0:
            break
        ga = g[a]
        system: ActiveSystem | None = None
        if chord:  # the same matrix for every frame: its factors kept per active set
            system = ref.fixed_system(a)
        else:
            if a.size == held.size and (a == held).all():
                sub = h.copy()
            else:
                pos = np.full(u0.shape[0], -1, np.int64)
                pos[held] = np.arange(held.size)
                p = pos[a]
                if p.min() < 0:  # a control woke: its matrix along the new set
                    g, rss, h, _ = evaluate(x, tangents_along(ref, a))
                    ga = g[a]
                    held = a
                    sub = h.copy()
                else:
                    sub = h[p[:, None], p]
            diagonal = sub.reshape(-1)[:: a.size + 1]  # a view: the floor set in place
            np.maximum(diagonal, floor[a], out=diagonal)
        lam = 0.0
        if s.prior_sd > 0.0:
            decrease = (system.decrease(ga) if system is not None
                        else float(ga @ np.linalg.solve(sub, ga)))
            left = max(rss - decrease, 0.0)
            lam = max(left / max(ref.coords - a.size, 1) - ref.model_var, 0.0) / s.prior_sd**2
        weight = fixed + lam if every else lam * pulled + fixed  # (C,) each control's pull
        if number == 0 and math.isfinite(lam):  # x is u0: no pull yet, the cost is the fit's
            rhs, cost = ga, rss
        else:
            dx = x - u0
            rhs, cost = (g - weight * dx)[a], rss + float(np.dot(weight, dx * dx))
        if system is not None:
            step_a = system.step(rhs, lam * pulled[a])
        else:  # ActiveSystem.step on sub itself, which no one reads after this
            np.multiply(diagonal, damp, out=diagonal)
            diagonal += lam if every else lam * pulled[a]
            step_a = np.linalg.solve(sub, rhs)
        if np.abs(step_a).max() < s.tol:
            break
        share, took = 1.0, False
        xa = x[a]
        # the trial's matrix is read by the next step only (none after the last)
        curved = mode == "step" and number < s.steps - 1
        tangents = tangents_along(ref, a) if curved else no_tangents
        for _halving in range(s.backtrack + 1):
            trial = x.copy()
            trial[a] = np.minimum(np.maximum(xa + (step_a if share == 1.0 else share * step_a),
                                             0.0), 1.0)
            g_new, r_new, h_new, z_new = evaluate(trial, tangents)
            moved = trial - u0
            if math.isfinite(r_new) and r_new + float(np.dot(weight, moved * moved)) <= cost:
                x, g, rss, z, took = trial, g_new, r_new, z_new, True
                if curved:  # its matrix along this step's set, at the new point
                    h, held = h_new, a
                break
            share *= 0.5
        if not took:
            break
    return x[None], z
