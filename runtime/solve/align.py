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
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)


class AlignError(RigcastError, ValueError):
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



def fit_rigid_naive(
    source: np.ndarray,
    target: np.ndarray,
    *,
    scale: bool = False,
    weights: np.ndarray | None = None,
) -> RigidTransform:
    """Twin of fit_rigid_batch for one frame, with explicit loops over points and optional
    weights (N,); for tests only. source, target (N, 3), N >= 3."""
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


@dataclass(frozen=True)
class StableTarget:
    """What the fit needs of the target points (the neutral's stable vertices), computed once.

    centred_over_n (3, S) float64: (target - mean).T / S; mean (3,); var (mean squared distance
    to the mean); ones_over_n (S,) float64, all 1/S; reducer (4, S) the two stacked.
    """

    centred_over_n: np.ndarray
    mean: np.ndarray
    var: float
    ones_over_n: np.ndarray
    reducer: np.ndarray  # (4, S): centred_over_n over ones_over_n, both sums in one product

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
    centred_over_n = np.ascontiguousarray(b.T / n)
    ones_over_n = np.full(n, 1.0 / n)
    return StableTarget(centred_over_n, mean, float(np.einsum("ij,ij->", b, b) / n), ones_over_n,
                        np.concatenate([centred_over_n, ones_over_n[None]]))


@dataclass(frozen=True)
class RigidBatch:
    """Per-frame similarity transforms ``y = scale * rotation @ x + translation``.

    rotation (B, 3, 3), translation (B, 3), scale (B,), mse (B,) mean squared residual of the
    fit; float64. The live server holds a batch of one, ``rigcast solve`` a batch of many.
    """

    rotation: np.ndarray
    translation: np.ndarray
    scale: np.ndarray
    mse: np.ndarray

    def __len__(self) -> int:
        return int(self.scale.shape[0])

    def frames(self, start: int, stop: int) -> RigidBatch:
        """The transforms of frames ``start:stop``."""
        sl = slice(start, stop)
        return RigidBatch(self.rotation[sl], self.translation[sl], self.scale[sl], self.mse[sl])

    def pose(self, index: int) -> RigidTransform:
        """Frame ``index`` as a RigidTransform."""
        return RigidTransform(self.rotation[index], self.translation[index],
                              float(self.scale[index]))

    @property
    def rms(self) -> np.ndarray:
        """(B,) root-mean-square residual of each frame's fit (mesh units)."""
        out: np.ndarray = np.sqrt(self.mse)
        return out

    def apply(self, points: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """points (B, N, 3) -> (B, N, 3) float32 (into ``out`` when given, (B, N, 3) float32)."""
        m = (self.scale[:, None, None] * self.rotation).astype(np.float32)
        # out[b, n, i] = sum_j m[b, i, j] * points[b, n, j] + translation[b, i]. m^T is made
        # contiguous: numpy hands a contiguous (B, 3, 3) to BLAS frame by frame, while a
        # transposed view takes its generic loop (about 1.5x the time on the solve's points).
        mt = np.ascontiguousarray(m.transpose(0, 2, 1))
        res: np.ndarray = np.matmul(points.astype(np.float32, copy=False), mt, out=out)
        # The translation one coordinate at a time (the same float32 sums): a (B, 1, 3)
        # broadcast add runs numpy's inner loop over 3 numbers at a time, over 3x slower.
        shift = self.translation.astype(np.float32)
        for i in range(3):
            column = res[:, :, i]
            np.add(column, shift[:, i : i + 1], out=column)
        return res


def fit_rigid_batch(source: np.ndarray, target: np.ndarray | StableTarget, *,
                    scale: bool = False) -> RigidBatch:
    """Least-squares ``target ≈ s R source[b] + t`` for every frame at once (Umeyama 1991).

    source (B, S, 3) the frames' stable vertices, any float dtype; target (S, 3) the neutral's,
    or its ``stable_target`` (computed once per bundle). S >= 3. The rigid fit of the product:
    the live server calls it with B = 1. Reductions are matmuls against the precomputed target
    (only the target is centred, since Σ b = 0 makes Σ b (s - μs)^T equal Σ b s^T), and the
    residual comes in closed form (Umeyama eq. 41 and its scale-free analogue), no second pass.
    """
    tgt = target if isinstance(target, StableTarget) else stable_target(target)
    src = np.asarray(source, dtype=np.float64)
    if src.ndim != 3 or src.shape[1:] != (tgt.count, 3):
        raise AlignError(f"source must be (B, {tgt.count}, 3) to fit the target, got {src.shape}")
    n = tgt.count
    # One product per frame: rows 0-2 give cov[b, i, j] = (1/S) Σ_n (t - μt)[n, i] s[b, n, j],
    # row 3 the source's mean μs[b, j] = (1/S) Σ_n s[b, n, j].
    sums = np.matmul(tgt.reducer, src)  # (B, 4, 3)
    cov, mu_s = sums[:, :3], sums[:, 3]
    second = np.einsum("bnj,bnj->b", src, src) / n
    var_s = second - np.einsum("bj,bj->b", mu_s, mu_s)
    var_s[var_s <= 1e-12 * second] = 0.0  # cancellation residue: the points coincide
    return _umeyama_batch(cov, mu_s, var_s, tgt.mean, tgt.var, scale)


def _umeyama_batch(cov: np.ndarray, mu_s: np.ndarray, var_s: np.ndarray, mu_t: np.ndarray,
                   var_t: np.ndarray | float, scale: bool) -> RigidBatch:
    """Umeyama's closed form per frame from cov (B, 3, 3) = (1/N) Σ (t - μt)(s - μs)^T, the
    source means (B, 3) and variances (B,), the target means ((B, 3) or (3,)) and variances."""
    u, d, vt = np.linalg.svd(cov)
    rotation = np.matmul(u, vt)
    # Reflection correction (Umeyama eq. 39-40): flip the weakest axis where U V^T reflects.
    flip = np.linalg.det(rotation) < 0.0
    trace_ds = d.sum(axis=1)
    if np.count_nonzero(flip):  # a plain count: ``any`` costs a reduction's set-up per frame
        u[flip, :, 2] *= -1.0
        rotation = np.matmul(u, vt)
        trace_ds -= 2.0 * flip * d[:, 2]
    # rotated[b] = R[b] μs[b]
    rotated = np.einsum("bij,bj->bi", rotation, mu_s)
    if scale:
        if not np.all(var_s > 0.0):
            raise AlignError(f"stable vertices coincide in frame {int(np.argmin(var_s))}; "
                             "scale is undefined")
        s = trace_ds / var_s
        mse = var_t - trace_ds**2 / var_s
        rotated *= s[:, None]
    else:
        s = np.ones(cov.shape[0])
        mse = var_t + var_s - 2.0 * trace_ds
    translation = mu_t - rotated  # μt - s R μs
    return RigidBatch(rotation, translation, s, np.maximum(mse, 0.0))


def fit_rigid_pairs(source: np.ndarray, target: np.ndarray, *, scale: bool = False
                    ) -> RigidBatch:
    """Least-squares ``target[b] ≈ s R source[b] + t`` per frame, each frame with its own target
    (Umeyama 1991): source, target (B, N, 3), N >= 3, computed in float32 products (so to
    float32's precision). The realignment's fit, where the target is each frame's solved mesh
    rather than the neutral."""
    src, tgt = np.asarray(source), np.asarray(target)
    if src.ndim != 3 or src.shape != tgt.shape or src.shape[1] < 3 or src.shape[2] != 3:
        raise AlignError(f"source and target must both be (B, N >= 3, 3), got {src.shape} and "
                         f"{tgt.shape}")
    n = src.shape[1]
    # Float32 products through BLAS, with sums as products with a row of ones: on every vertex
    # of every frame, float64 copies and numpy's own reductions cost several times the rest of
    # the frame's solve. Both sets are centred first, so the products keep float32's precision.
    ones = np.ones((1, 1, n), np.float32)
    cs = src.astype(np.float32, copy=False)
    ct = tgt.astype(np.float32, copy=False)
    mu_s = np.matmul(ones, cs)[:, 0].astype(np.float64) / n  # (B, 3)
    mu_t = np.matmul(ones, ct)[:, 0].astype(np.float64) / n
    cs = cs - mu_s[:, None].astype(np.float32)
    ct = ct - mu_t[:, None].astype(np.float32)
    cov = np.matmul(ct.transpose(0, 2, 1), cs).astype(np.float64) / n  # Σ (t - μt)(s - μs)^T
    var_s = np.einsum("bnj,bnj->b", cs, cs, dtype=np.float64) / n
    var_t = np.einsum("bnj,bnj->b", ct, ct, dtype=np.float64) / n
    return _umeyama_batch(cov, mu_s, var_s, mu_t, var_t, scale)


def fit_rigid(source: np.ndarray, target: np.ndarray, *, scale: bool = False) -> RigidTransform:
    """One frame of fit_rigid_batch: source, target (N, 3), N >= 3 -> RigidTransform (float64)."""
    src = np.asarray(source)
    tgt = np.asarray(target)
    _check(src, tgt, None)
    return fit_rigid_batch(src[None], tgt, scale=scale).pose(0)
