"""The refinement's active set and its small linear systems (runtime/solve/refine.py runs them).

Which controls take part in a Gauss-Newton step (``active_set``: away from the default, or at it
with a gradient that the noise does not explain, and never pushed past a bound), how strongly the
prior pulls each one (``pull_mask``), and the damped, ridged systems on each frame's active
controls: batched for many frames (``solve_active``, with its per-frame twin
``solve_active_naive``), and from factors cached per active set for the live path's one frame
(``ActiveFactors``).
"""

from __future__ import annotations

import contextlib

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


def a_mask(a: np.ndarray, c: int) -> np.ndarray:
    """Active control indices a (k,) -> (1, C) bool."""
    out = np.zeros((1, c), bool)
    out[0, a] = True
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


def solve_active(hessian: np.ndarray, g: np.ndarray, free: np.ndarray, damping: float,
                 ridge: np.ndarray | None = None) -> np.ndarray:
    """The damped Gauss-Newton step on each frame's active controls.

    hessian (C, C); g (N, C); free (N, C) bool; each active diagonal entry becomes
    H_cc (1 + damping) + ridge_nc, ridge (N,) per frame or (N, C) per frame and control (zeros
    if None) -> delta (N, C), zero outside the active set.
    Each frame's system is gathered to its own active controls, padded to the batch's largest
    active count with identity rows, and solved in one batched call.
    """
    n, c = g.shape
    delta = np.zeros((n, c), np.float64)
    ridge = np.zeros((n, c)) if ridge is None else np.asarray(ridge, np.float64)
    if ridge.ndim == 1:
        ridge = np.repeat(ridge[:, None], c, axis=1)
    if n == 1:  # one frame: plain indexing is several times cheaper
        a = np.flatnonzero(free[0])
        if a.size:
            h = hessian[a[:, None], a]
            h[np.diag_indices(a.size)] = h[np.diag_indices(a.size)] * (1.0 + damping) + ridge[0, a]
            delta[0, a] = np.linalg.solve(h, g[0, a])
        return delta
    idx, valid = gather_active(free)
    if idx.shape[1] == 0:
        return delta
    sub = hessian[idx[:, :, None], idx[:, None, :]]  # (N, W, W)
    step = solve_gathered(sub, np.take_along_axis(g, idx, axis=1), valid, damping,
                          np.take_along_axis(ridge, idx, axis=1))
    np.put_along_axis(delta, idx, step, axis=1)
    return delta


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


def solve_active_naive(hessian: np.ndarray, g: np.ndarray, free: np.ndarray, damping: float,
                       ridge: np.ndarray | None = None) -> np.ndarray:
    """Per-frame twin of ``solve_active``: index lists and one small solve per frame."""
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


class ActiveFactors:
    """Per active set, the factors a frame's step needs, kept while the set recurs.

    For the active controls A of a frame: H_AA^-1 (the prior weight's full Gauss-Newton step)
    and the eigendecomposition Q diag(lam) Q^T of H_AA + damping diag(H_AA), so that the step's
    system with any ridge rho, (H_AA + damping diag(H_AA) + rho I), is solved as
    Q diag(1 / (lam + rho)) Q^T (a ridge adds to every eigenvalue of a symmetric matrix and keeps
    its eigenvectors). A live stream's active set changes rarely from one frame to the next, so
    a frame's two small dense solves become four matrix-vector products. ``solve_active`` is the
    twin these are tested against. At most ``size`` sets are kept (the oldest go first).
    """

    def __init__(self, hessian: np.ndarray, damping: float, size: int = 256) -> None:
        self.hessian, self.damping, self.size = hessian, float(damping), int(size)
        self._sets: dict[bytes, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}

    def get(self, a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """a (k,) int64 active controls -> (H_AA^-1 (k, k), Q (k, k), lam (k,))."""
        key = a.tobytes()
        hit = self._sets.get(key)
        if hit is not None:
            return hit
        h = self.hessian[a[:, None], a]
        damped = h.copy()
        damped[np.diag_indices(a.size)] *= 1.0 + self.damping
        lam, q = np.linalg.eigh(damped)
        hit = (np.linalg.inv(h), q, lam)
        if len(self._sets) >= self.size:
            # the batch path's threads may share a refiner: drop the oldest, if still there
            with contextlib.suppress(StopIteration, RuntimeError):
                self._sets.pop(next(iter(self._sets)), None)
        self._sets[key] = hit
        return hit

    def full_decrease(self, a: np.ndarray, g: np.ndarray) -> float:
        """a (k,) active controls, g (C,) one frame's gradient -> g_A^T H_AA^-1 g_A, what a full
        undamped Gauss-Newton step on A would remove from |r|^2."""
        if a.size == 0:
            return 0.0
        ga = g[a]
        return float(ga @ (self.get(a)[0] @ ga))

    def step_active(self, a: np.ndarray, rhs_a: np.ndarray, ridge: float) -> np.ndarray:
        """:meth:`step` on the active controls only: a (k,) non-empty, rhs_a (k,) -> delta_A
        (k,)."""
        _, q, lam = self.get(a)
        out: np.ndarray = q @ ((rhs_a @ q) / (lam + ridge))
        return out

    def step(self, a: np.ndarray, rhs: np.ndarray, ridge: float) -> np.ndarray:
        """a (k,) active controls, rhs (C,) one frame's right-hand side, ridge >= 0 -> delta (C,):
        (H_AA + damping diag(H_AA) + ridge I) delta_A = rhs_A, zero outside A."""
        delta = np.zeros(rhs.shape[0], np.float64)
        if a.size:
            _, q, lam = self.get(a)
            delta[a] = q @ ((q.T @ rhs[a]) / (lam + ridge))
        return delta
