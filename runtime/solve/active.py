"""The refinement's active set and its small linear systems (runtime/solve/refine.py runs them).

Which controls take part in a Gauss-Newton step (``active_set``: away from the default, or at it
with a gradient that the noise does not explain, and never pushed past a bound; ``given_moved_set``
the same test on what an at-rest control adds to the moved ones, batched, and
``given_moved_one`` for one frame with its moved set's parts made once), how strongly the
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


def pull_mask(u0: np.ndarray, d: np.ndarray, pull: str = "moved") -> np.ndarray:
    """u0 (..., C) the network's answer, d (C,) defaults -> (..., C) float64, 1 where the prior
    pulls towards the network's answer, else 0: with ``pull`` "moved" the controls it moved (no
    pull where it left a control at rest), with "all" every control (see ``RefineSettings``)."""
    if pull == "all":
        return np.ones(np.shape(u0), np.float64)
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


def given_moved_set(u: np.ndarray, d: np.ndarray, g: np.ndarray, rss: np.ndarray,
                    hessian: np.ndarray, factor: float) -> np.ndarray:
    """``active_set`` with each at-rest control tested on what it adds to the moved ones.

    u (N, C) normalised controls; d (C,) defaults; g (N, C) gradient J^T r; rss (N,) |r|^2;
    hessian (C, C) the curvature; factor: ``wake_factor``. -> (N, C) bool.

    The moved controls M (|u - d| > 1e-6) can take up part of an at-rest control's mesh effect:
    a joint's bend put on its two neighbours, which together make nearly its mesh. Then its
    gradient alone, g_c^2 / H_cc, is a sliver of |r|^2, though adding it to M would remove
    nearly all of it. What a full Gauss-Newton step on M and c removes beyond the step on M
    alone is n_c^2 / S_c, with n_c = g_c - H_cM H_MM^-1 g_M and S_c = H_cc - H_cM H_MM^-1 H_Mc
    (the Schur complement; the partial F-test of forward stepwise regression, Hastie, Tibshirani
    & Friedman, "The Elements of Statistical Learning", 2nd ed. 2009, 3.3.2). c wakes when
    n_c^2 > factor^2 S_c |r_M|^2, |r_M|^2 = |r|^2 - g_M^T H_MM^-1 g_M what the step on M
    leaves; with nothing moved this is ``active_set``'s test. For white noise n_c / sqrt(S_c)
    over the noise's std is a standard normal, as g_c / sqrt(H_cc) is, so the false-wake rate
    stays. A control on a bound whose conditional gradient points outwards stays out."""
    u, g = np.asarray(u, np.float64), np.asarray(g, np.float64)
    moved = np.abs(u - d) > 1e-6
    diag = np.diagonal(hessian)
    num, left = g.copy(), np.array(rss, np.float64)
    schur = np.repeat(diag[None], g.shape[0], axis=0)
    counts = moved.sum(axis=1)
    # frames in groups by how many controls they moved (widths up to 4, 8, 16, ...), each
    # group's systems padded to its own widest: a face moves 17 of 46 on average, 42 at most
    group = np.ceil(np.log2(np.maximum(counts, 4))).astype(np.int64)
    for width in np.unique(group[counts > 0]):
        rows = np.flatnonzero((group == width) & (counts > 0))
        num[rows], schur[rows], left[rows] = _given_rows(moved[rows], g[rows], left[rows],
                                                         hessian)
    schur = np.maximum(schur, 1e-6 * diag)
    wake = ~moved & (num * num > factor * factor * schur * left[:, None])
    push = np.where(moved, g, num)
    out: np.ndarray = (moved | wake) & ~np.where(push > 0.0, u >= 1.0, (u <= 0.0) & (push < 0.0))
    return out


def _given_rows(moved: np.ndarray, g: np.ndarray, rss: np.ndarray, hessian: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``given_moved_set``'s arithmetic on frames that each moved at least one control: moved
    (N, C) bool, g (N, C), rss (N,), hessian (C, C) -> (n (N, C), S (N, C) unfloored,
    |r_M|^2 (N,))."""
    idx, valid = gather_active(moved)
    w = idx.shape[1]
    pair = valid[:, :, None] & valid[:, None, :]
    sub = np.where(pair, hessian[idx[:, :, None], idx[:, None, :]], 0.0)
    sub[:, np.arange(w), np.arange(w)] = np.where(valid, sub[:, np.arange(w), np.arange(w)], 1.0)
    cross = hessian[idx] * valid[:, :, None]  # (N, W, C) H_Mc, zero rows on the padding
    g_m = np.take_along_axis(g, idx, axis=1) * valid
    # x (N, W, 1 + C) = H_MM^-1 [g_M, H_Mc]
    x = np.linalg.solve(sub, np.concatenate([g_m[..., None], cross], axis=2))
    left = np.maximum(rss - (g_m * x[:, :, 0]).sum(axis=1), 0.0)
    num = g - np.einsum("nwc,nw->nc", cross, x[:, :, 0])  # sum_w H_wc (H_MM^-1 g_M)_w
    schur = np.diagonal(hessian) - np.einsum("nwc,nwc->nc", cross, x[:, :, 1:])
    return num, schur, left


def given_moved_parts(hessian: np.ndarray, moved: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What ``given_moved_one`` reads for a moved set, made once per set: hessian (C, C), moved
    (W,) indices -> (H_MM^-1 (W, W), H_MM^-1 H_Mc (W, C), the Schur complements S_c (C,),
    floored at 1e-6 H_cc)."""
    inv = np.linalg.inv(hessian[moved[:, None], moved])
    p = inv @ hessian[moved]
    diag = np.diagonal(hessian)
    schur = np.maximum(diag - np.einsum("wc,wc->c", hessian[moved], p), 1e-6 * diag)
    return inv, p, schur


def given_moved_one(u: np.ndarray, d: np.ndarray, g: np.ndarray, rss: float, moved: np.ndarray,
                    parts: tuple[np.ndarray, np.ndarray, np.ndarray], factor: float
                    ) -> np.ndarray:
    """``given_moved_set`` for one frame, with the moved set's parts made once
    (``given_moved_parts``): u, g (C,), d (C,), moved (W,) indices (at least one) -> (C,) bool."""
    inv, p, schur = parts
    gm = g[moved]
    left = max(rss - float(gm @ (inv @ gm)), 0.0)
    num = g - gm @ p
    push = num.copy()
    push[moved] = gm
    free = num * num > (factor * factor * left) * schur
    free[moved] = True
    out: np.ndarray = free & ~np.where(push > 0.0, u >= 1.0, (u <= 0.0) & (push < 0.0))
    return out
