"""The refinement's active set and its small linear systems (runtime/solve/refine.py runs them).

Which controls take part in a Gauss-Newton step (``active_set``: away from the default, or at it
with a gradient that the noise does not explain, and never pushed past a bound), how strongly the
prior pulls each one (``pull_mask``), and the damped, ridged systems on each frame's active
controls, gathered (``gather_active``) and solved in one batched call (``solve_gathered``; its
per-frame twin is in tests/test_refine.py).
"""

from __future__ import annotations

import numpy as np


def active_set(u: np.ndarray, d: np.ndarray, g: np.ndarray, rss: np.ndarray,
               hessian_diag: np.ndarray, kappa: float, coords: int,
               wake_share: float = 0.0) -> np.ndarray:
    """Which controls take part in the next step. u (N, C) normalised controls in [0, 1];
    d (C,) normalised defaults; g (N, C) gradient J^T r; rss (N,) |r|^2; hessian_diag (C,);
    coords: 3K, the residual's length; wake_share: least share of |r|^2 that g_c^2 / H_cc (what
    control c alone removes) must reach to wake it. -> (N, C) bool."""
    # max(kappa sqrt(H_cc) sigma, sqrt(wake_share H_cc |r|^2)), sigma = |r| / sqrt(coords)
    tau = np.sqrt(hessian_diag)[None] * (wake_factor(kappa, coords, wake_share)
                                         * np.sqrt(np.maximum(rss, 0.0)))[:, None]
    return free_controls(u, d, g, tau)


def pull_mask(u0: np.ndarray, d: np.ndarray) -> np.ndarray:
    """u0 (..., C) the network's answer, d (C,) defaults -> (..., C) float64, 1 where the prior
    pulls towards the network's answer (the controls it moved), 0 where it left a control at
    rest (no pull: see ``RefineSettings``)."""
    out: np.ndarray = (np.abs(u0 - d) > 1e-6).astype(np.float64)
    return out


def free_controls(u: np.ndarray, d: np.ndarray, g: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """u, g, tau (..., C), d (C,) -> (..., C) bool: a control is free when it is away from its
    default or its gradient beats the threshold tau, and its gradient does not push it past the
    bound it sits on."""
    moved = (np.abs(u - d) > 1e-6) | (np.abs(g) > tau)
    out: np.ndarray = moved & ~np.where(g > 0.0, u >= 1.0, (u <= 0.0) & (g < 0.0))
    return out


def wake_factor(kappa: float, coords: int, wake_share: float) -> float:
    """The correlation test's threshold per sqrt(H_cc) |r|: an at-rest control wakes when
    |g_c| > wake_factor sqrt(H_cc) |r| (see ``active_set``)."""
    return max(kappa / np.sqrt(coords), np.sqrt(wake_share))


def gather_active(free: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """free (N, C) bool -> (idx (N, W) each frame's active controls first, in order, then
    padding; valid (N, W) bool, which entries are active), W the largest active count."""
    counts = free.sum(axis=1)
    width = int(counts.max()) if free.shape[0] else 0
    idx = np.argsort(~free, axis=1, kind="stable")[:, :width]
    return idx, np.arange(width)[None] < counts[:, None]


def solve_gathered(sub: np.ndarray, rhs: np.ndarray, valid: np.ndarray, damping: float,
                   ridge: np.ndarray) -> np.ndarray:
    """Each frame's gathered system: sub (N, W, W) the curvature on its active controls
    (anything in padded rows and columns), rhs, ridge (N, W), valid (N, W) bool -> step (N, W),
    zero where not valid: (sub (1 + damping on the diagonal) + ridge) step = rhs on the valid
    entries, identity rows on the padding."""
    pair = valid[:, :, None] & valid[:, None, :]
    sub = np.where(pair, sub, 0.0)
    w = sub.shape[1]
    diag = sub[:, np.arange(w), np.arange(w)]
    sub[:, np.arange(w), np.arange(w)] = np.where(valid, diag * (1.0 + damping) + ridge, 1.0)
    step = np.linalg.solve(sub, np.where(valid, rhs, 0.0)[..., None])[..., 0]
    out: np.ndarray = np.where(valid, step, 0.0)
    return out
