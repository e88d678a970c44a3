"""Rigid stabilisation: the similarity transform that best maps one point set onto another.

Least squares after Umeyama, "Least-squares estimation of transformation parameters between two
point patterns", IEEE TPAMI 13(4), 1991 (Kabsch's rotation, plus the reflection correction and the
optional uniform scale). Pure numpy; runs on the per-frame hot path with S ~ 100-300 points.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

log = logging.getLogger(__name__)


class AlignError(ValueError):
    """Point sets that cannot be aligned (wrong shapes, too few or coincident points)."""


@dataclass(frozen=True)
class RigidTransform:
    """``y = scale * rotation @ x + translation`` for each point x.

    rotation (3, 3) float64 proper rotation (det +1), translation (3,) float64, scale > 0.
    """

    rotation: np.ndarray
    translation: np.ndarray
    scale: float = 1.0

    @classmethod
    def identity(cls) -> RigidTransform:
        return cls(np.eye(3), np.zeros(3), 1.0)

    def apply(self, points: np.ndarray) -> np.ndarray:
        """points (..., 3) -> (..., 3), in the dtype of ``points`` when it is floating."""
        pts = np.asarray(points)
        dtype = pts.dtype if pts.dtype.kind == "f" else np.float64
        # (..., 3) @ (3, 3): each row x becomes R x.
        out = pts @ (self.scale * self.rotation.T).astype(dtype, copy=False)
        out += self.translation.astype(dtype, copy=False)
        return out

    def inverse(self) -> RigidTransform:
        """The transform undoing this one: x = (1/s) R^T (y - t)."""
        rt = self.rotation.T
        inv_s = 1.0 / self.scale
        return RigidTransform(rt.copy(), -inv_s * (rt @ self.translation), inv_s)

    def compose(self, other: RigidTransform) -> RigidTransform:
        """``self ∘ other``: apply ``other`` first, then ``self``."""
        return RigidTransform(
            self.rotation @ other.rotation,
            self.scale * (self.rotation @ other.translation) + self.translation,
            self.scale * other.scale,
        )

    @property
    def angle_deg(self) -> float:
        """Rotation angle in degrees (0..180), from trace(R) = 1 + 2 cos(theta)."""
        c = (float(np.trace(self.rotation)) - 1.0) / 2.0
        return math.degrees(math.acos(min(1.0, max(-1.0, c))))

    def to_dict(self) -> dict[str, object]:
        """Plain lists and floats, for telemetry."""
        return {
            "rotation": self.rotation.tolist(),
            "translation": self.translation.tolist(),
            "scale": float(self.scale),
            "angle_deg": self.angle_deg,
        }


def _check(source: np.ndarray, target: np.ndarray, weights: np.ndarray | None) -> None:
    if source.ndim != 2 or source.shape[1] != 3 or source.shape != target.shape:
        raise AlignError(
            f"source and target must both be (N, 3); got {source.shape} and {target.shape}"
        )
    if source.shape[0] < 3:
        raise AlignError(f"need at least 3 points to fit a rigid transform, got {source.shape[0]}")
    if weights is not None:
        if weights.shape != (source.shape[0],):
            raise AlignError(f"weights must be ({source.shape[0]},), got {weights.shape}")
        if not np.all(weights >= 0) or not weights.sum() > 0:
            raise AlignError("weights must be non-negative with a positive sum")


def _from_covariance(
    cov: np.ndarray, mu_s: np.ndarray, mu_t: np.ndarray, var_s: float, scale: bool
) -> tuple[RigidTransform, float]:
    """Umeyama's closed form from cov = Σ w (t - μt)(s - μs)^T (3, 3). Returns (T, trace(DS))."""
    u, d, vt = np.linalg.svd(cov)
    rotation = u @ vt
    # Reflection correction (Umeyama eq. 39-40): S = diag(1, 1, -1) when det(U) det(V^T) < 0,
    # i.e. when U V^T is a reflection; the weakest singular axis is the one flipped.
    sign = 1.0
    if _det3(rotation) < 0.0:
        sign = -1.0
        u[:, 2] *= -1.0
        rotation = u @ vt
    trace_ds = float(d[0] + d[1] + sign * d[2])
    if scale:
        if not var_s > 0.0:
            raise AlignError("source points coincide; scale is undefined")
        s = trace_ds / var_s
    else:
        s = 1.0
    translation = mu_t - s * (rotation @ mu_s)
    return RigidTransform(rotation, translation, s), trace_ds


def _det3(m: np.ndarray) -> float:
    """det of a (3, 3) matrix by cofactors on Python floats (np.linalg.det costs more here)."""
    (a, b, c), (d, e, f), (g, h, i) = m.tolist()
    return float(a * (e * i - f * h) - b * (d * i - f * g) + c * (d * h - e * g))


def _fit(
    source: np.ndarray, target: np.ndarray, scale: bool, weights: np.ndarray | None
) -> tuple[RigidTransform, float]:
    """Vectorised fit; returns the transform and the weighted mean squared residual.

    Written for the hot path: reductions are matmuls with a weight vector (far cheaper than
    ``mean(axis=0)`` at this size), and only the target is centred, since Σ w b = 0 makes
    Σ w b (s - μs)^T equal Σ w b s^T.
    """
    src = source.astype(np.float64, copy=False)
    tgt = target.astype(np.float64, copy=False)
    n = src.shape[0]
    w = np.full(n, 1.0 / n) if weights is None else weights / weights.sum()
    mu_s = w @ src
    mu_t = w @ tgt
    b = tgt - mu_t
    wb = b * w[:, None] if weights is not None else b * (1.0 / n)
    cov = wb.T @ src  # cov[i, j] = Σ_n w_n b[n, i] s[n, j]
    second = float(w @ np.einsum("ij,ij->i", src, src))
    var_s = second - float(mu_s @ mu_s)
    if var_s <= 1e-12 * second:  # cancellation residue: the points coincide
        var_s = 0.0
    var_t = float(wb.ravel() @ b.ravel())
    transform, trace_ds = _from_covariance(cov, mu_s, mu_t, var_s, scale)
    # Residual in closed form (Umeyama eq. 41 and its scale-free analogue), no second pass.
    mse = var_t - trace_ds**2 / var_s if scale else var_t + var_s - 2.0 * trace_ds
    return transform, max(mse, 0.0)


def fit_rigid(
    source: np.ndarray,
    target: np.ndarray,
    *,
    scale: bool = False,
    weights: np.ndarray | None = None,
) -> RigidTransform:
    """Least-squares ``target ≈ s R source + t`` (Umeyama 1991).

    source, target: (N, 3) any float dtype, N >= 3. weights: (N,) non-negative or None.
    Returns a RigidTransform in float64; scale is 1.0 unless ``scale=True``.
    """
    src = np.asarray(source)
    tgt = np.asarray(target)
    w = None if weights is None else np.asarray(weights, dtype=np.float64)
    _check(src, tgt, w)
    return _fit(src, tgt, scale, w)[0]


def fit_rigid_naive(
    source: np.ndarray,
    target: np.ndarray,
    *,
    scale: bool = False,
    weights: np.ndarray | None = None,
) -> RigidTransform:
    """Twin of fit_rigid with explicit loops over points; for tests only."""
    src = np.asarray(source, dtype=np.float64)
    tgt = np.asarray(target, dtype=np.float64)
    n = src.shape[0]
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    _check(src, tgt, None if weights is None else w)
    total = sum(float(w[k]) for k in range(n))
    mu_s = np.zeros(3)
    mu_t = np.zeros(3)
    for k in range(n):
        mu_s += w[k] * src[k] / total
        mu_t += w[k] * tgt[k] / total
    cov = np.zeros((3, 3))
    var_s = 0.0
    for k in range(n):
        a = src[k] - mu_s
        b = tgt[k] - mu_t
        for i in range(3):
            for j in range(3):
                cov[i, j] += w[k] * b[i] * a[j] / total
        var_s += w[k] * float(a @ a) / total
    return _from_covariance(cov, mu_s, mu_t, var_s, scale)[0]


def stabilise(
    points: np.ndarray,
    stable_indices: np.ndarray,
    neutral_stable: np.ndarray,
    *,
    scale: bool = False,
) -> tuple[RigidTransform, float]:
    """The transform taking this frame's stable vertices onto the neutral's, and the fit residual.

    points (V, 3) float32 frame; stable_indices (S,) int; neutral_stable (S, 3) the neutral's
    stable vertices (precompute ``neutral[stable_indices]`` once per bundle).
    Returns ``(transform, rms)``: apply ``transform`` to just the vertices the model needs
    (``transform.apply(points[input_indices])``), never to all V; ``rms`` is the root-mean-square
    distance (mesh units) left between the aligned stable vertices and the neutral's.
    Shapes are checked; index bounds are the caller's (the bundle validates them once).
    """
    stable = np.take(points, stable_indices, axis=0)
    if stable.shape != neutral_stable.shape or stable.ndim != 2 or stable.shape[1] != 3:
        raise AlignError(
            f"stable vertices {stable.shape} do not match neutral_stable {neutral_stable.shape}"
        )
    if stable.shape[0] < 3:
        raise AlignError(f"need at least 3 stable vertices, got {stable.shape[0]}")
    transform, mse = _fit(stable, neutral_stable, scale, None)
    return transform, math.sqrt(mse)


@dataclass(frozen=True)
class StableTarget:
    """What stabilisation needs of the neutral's stable vertices, computed once per bundle.

    centred_over_n (3, S) float64: (neutral_stable - mean).T / S; mean (3,); var (mean squared
    distance to the mean); ones_over_n (S,) float64, all 1/S.
    """

    centred_over_n: np.ndarray
    mean: np.ndarray
    var: float
    ones_over_n: np.ndarray

    @property
    def count(self) -> int:
        return int(self.ones_over_n.shape[0])


def stable_target(neutral_stable: np.ndarray) -> StableTarget:
    """neutral_stable (S, 3), S >= 3 -> its StableTarget."""
    tgt = np.asarray(neutral_stable, dtype=np.float64)
    if tgt.ndim != 2 or tgt.shape[1] != 3 or tgt.shape[0] < 3:
        raise AlignError(f"neutral_stable must be (S, 3) with S >= 3, got {tgt.shape}")
    n = tgt.shape[0]
    mean = tgt.mean(axis=0)
    b = tgt - mean
    return StableTarget(np.ascontiguousarray(b.T / n), mean, float(np.einsum("ij,ij->", b, b) / n),
                        np.full(n, 1.0 / n))


def stabilise_fast(
    points: np.ndarray, stable_indices: np.ndarray, target: StableTarget, *, scale: bool = False
) -> tuple[RigidTransform, float]:
    """Same result as ``stabilise(points, stable_indices, neutral_stable)``, for the hot path.

    points (V, 3) float32; stable_indices (S,) int; target from ``stable_target(neutral_stable)``.
    The target's centring and variance are precomputed, so a frame costs one gather, one
    conversion, three small reductions and the 3 x 3 SVD. Returns ``(transform, rms)``.
    """
    src = np.take(points, stable_indices, axis=0).astype(np.float64)
    if src.shape != (target.count, 3):
        raise AlignError(f"stable vertices {src.shape} do not match the target's "
                         f"({target.count}, 3)")
    cov = target.centred_over_n @ src  # cov[i, j] = (1/S) Σ_n (t - μt)[n, i] s[n, j]
    mu_s = target.ones_over_n @ src
    second = float(np.vdot(src, src)) / target.count
    var_s = second - float(mu_s @ mu_s)
    if var_s <= 1e-12 * second:  # cancellation residue: the points coincide
        var_s = 0.0
    transform, trace_ds = _from_covariance(cov, mu_s, target.mean, var_s, scale)
    var_t = target.var
    mse = var_t - trace_ds**2 / var_s if scale else var_t + var_s - 2.0 * trace_ds
    return transform, math.sqrt(max(mse, 0.0))
