"""Frame moments: one pass over the refinement's basis that serves every rigid motion of a frame.

The projected refinement (runtime/solve/refine.py) reads a frame through p = A y, y = x - offset on
its S vertices, A (R, 3S) the forward model's bases there; a_ri (3,) is row r's part at vertex i.
Bundles since the moment form project each frame once onto the 3 x 3 moments

    m_r = sum_i y_i a_ri^T        (R, 3, 3), stored m[r, k, j] = sum_i y_ik a_rij

(with q = sum_i y_i oc_i^T, s = sum_i y_i and |y|^2, oc_i = offset_i - mean(offset)), in
``refine_project.onnx``. That pass reads A once, as the plain projection did, yet from it follow
exactly, in R numbers and a few 3 x 3 products:

- the projection itself, p_r = trace(m_r);
- the projection and |y|^2 of the frame moved by any similarity x -> L x + t
  (:func:`moved_state`), so a realignment need not project the frame again;
- the cross moments between the frame and the forward model's mesh for any weights z
  (offset + A^T z), which is what Umeyama's fit of one onto the other needs
  (:func:`realign_fit`), so a realignment need not evaluate the forward model on all V
  vertices either.

All positions are taken relative to the offset's centroid (``BasisConstants.centre``): stage
meshes can sit far from the origin, and products of uncentred float32 coordinates would lose the
few millimetres the fit is about. Every function here has a naive twin in the tests that builds
the vertices explicitly.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from rigcast.runtime.solve.align import RigidBatch, _umeyama_batch


@dataclass(frozen=True)
class BasisConstants:
    """What the moment form needs of the basis itself, from the graph's constant outputs, float64.

    cross (R, 3, 3): sum_i oc_ik a_rij at [r, k, j]; colsum (R, 3): sum_i a_ri; scatter (3, 3):
    sum_i oc_i oc_i^T; oc_sum (3,): sum_i oc_i (zero up to rounding); count: S; centre (3,): the
    offset's centroid."""

    cross: np.ndarray
    colsum: np.ndarray
    scatter: np.ndarray
    oc_sum: np.ndarray
    count: float
    centre: np.ndarray

    @cached_property
    def basis_terms(self) -> np.ndarray:
        """(12, R): cross_r flattened over colsum_r, column r (``moved_state``'s basis terms in
        one product), made once."""
        r = self.colsum.shape[0]
        return np.ascontiguousarray(np.concatenate([self.cross.reshape(r, 9), self.colsum],
                                                   axis=1).T)

    @classmethod
    def from_outputs(cls, table: np.ndarray, centre: np.ndarray) -> BasisConstants:
        """table (4, 3R + 4) float64 = [oc | 1]^T [A' | oc | 1] with A' (S, 3R), A'[i, 3r + j] =
        a_rij (the graph's ``moment_constants``); centre (3,)."""
        t = np.asarray(table, np.float64)
        r = (t.shape[1] - 4) // 3
        return cls(
            cross=t[:3, : 3 * r].reshape(3, r, 3).transpose(1, 0, 2).copy(),
            colsum=t[3, : 3 * r].reshape(r, 3).copy(),
            scatter=t[:3, 3 * r : 3 * r + 3].copy(),
            oc_sum=t[3, 3 * r : 3 * r + 3].copy(),
            count=float(t[3, 3 * r + 3]),
            centre=np.asarray(centre, np.float64).copy(),
        )


@dataclass(frozen=True)
class FrameMoments:
    """One batch of frames through the moment graph, float64.

    m (N, R, 3, 3): sum_i y_ik a_rij at [n, r, k, j]; q (N, 3, 3): sum_i y_ik oc_ij; s (N, 3):
    sum_i y_i; yy (N,): |y|^2."""

    m: np.ndarray
    q: np.ndarray
    s: np.ndarray
    yy: np.ndarray

    @classmethod
    def from_outputs(cls, moments: np.ndarray, norm_sq: np.ndarray) -> FrameMoments:
        """moments (N, 3, 3R + 4) = y^T [A' | oc | 1] per frame; norm_sq (N,) = |y|^2."""
        mo = np.asarray(moments)
        n, r = mo.shape[0], (mo.shape[2] - 4) // 3
        # m in float64 and in its own order in one pass: its (R, 9) rows are then a view for
        # the realignment's products (a transposed view made every reshape copy it)
        m = np.empty((n, r, 3, 3))
        m[...] = mo[:, :, : 3 * r].reshape(n, 3, r, 3).transpose(0, 2, 1, 3)
        tail = mo[:, :, 3 * r :].astype(np.float64)
        return cls(m=m, q=tail[:, :, :3], s=tail[:, :, 3], yy=np.asarray(norm_sq, np.float64))

    def take(self, rows: np.ndarray) -> FrameMoments:
        return FrameMoments(self.m[rows], self.q[rows], self.s[rows], self.yy[rows])


_EYE3 = np.eye(3)
_EYE3.setflags(write=False)


def projection_state(fm: FrameMoments) -> np.ndarray:
    """(N, R + 1): the projection p = A y (p_r = trace(m_r)), then |y|^2 (the refinement's state)."""
    p = np.einsum("nrkk->nr", fm.m)
    out: np.ndarray = np.concatenate([p, fm.yy[:, None]], axis=1)
    return out


def moved_state(fm: FrameMoments, const: BasisConstants, linear: np.ndarray,
                shift: np.ndarray) -> np.ndarray:
    """The refinement's state (N, R + 1) of the frames moved by x -> L x + t, where t (N, 3) is
    the translation in centred coordinates (``shift``, i.e. the move of x - centre) and L (N, 3, 3)
    a scaled rotation. With y' = L y + (L - I) oc_i + t:

        p'_r   = <L, m_r^T> + <L - I, cross_r^T> + t . colsum_r
        |y'|^2 = s^2 |y|^2 + 2 <L^T (L - I), q> + 2 t . L s_y + tr((L - I) scatter (L - I)^T)
                 + 2 t . (L - I) oc_sum + S |t|^2,   s^2 = tr(L^T L) / 3.
    """
    lin = np.asarray(linear, np.float64)
    t = np.asarray(shift, np.float64)
    n, r = fm.m.shape[:2]
    d = lin - _EYE3
    # Each contraction as one matmul on flattened 3 x 3 blocks (a batch of one frame pays
    # numpy's per-call cost, not the arithmetic): <L, m_r^T> = m_r.flat . L^T.flat, and the
    # basis's two terms in one product, [(L - I)^T.flat, t] . [cross_r.flat, colsum_r].
    lin_t = lin.transpose(0, 2, 1)
    p = np.matmul(fm.m.reshape(n, r, 9), lin_t.reshape(n, 9, 1))[..., 0]
    p += np.concatenate([d.transpose(0, 2, 1).reshape(n, 9), t], axis=1) @ const.basis_terms
    # |y'|^2 with 2 t . (L s_y + (L - I) oc_sum) = 2 t . (L (s_y + oc_sum) - oc_sum) in one dot
    # and the scale's and the scatter's terms as one: tr(L^T L) |y|^2 / 3 + <(L - I) scatter,
    # L - I> + 2 <L^T (L - I), q>
    moved = np.matmul(lin, (fm.s + const.oc_sum)[..., None])[..., 0] - const.oc_sum
    x = np.matmul(lin_t, d)  # L^T (L - I)
    d_sc = np.matmul(d, const.scatter)  # (L - I) scatter
    add = np.add.reduce
    yy = (add(lin * lin, axis=(1, 2)) * (fm.yy / 3.0) + add(d_sc * d + 2.0 * x * fm.q, axis=(1, 2))
          + add(t * (2.0 * moved + const.count * t), axis=1))
    out: np.ndarray = np.concatenate([p, yy[:, None]], axis=1)
    return out


def realign_fit(fm: FrameMoments, const: BasisConstants, weights: np.ndarray, *,
                extra_source: np.ndarray | None = None, extra_target: np.ndarray | None = None,
                scale: bool = False, centred: bool = False) -> RigidBatch:
    """Umeyama (1991) per frame: the similarity, in centred coordinates, that maps the frames'
    S vertices x_i (= y_i + offset_i) onto the forward model's mesh offset_i + sum_r z_r a_ri,
    z = weights (N, R), together with extra pairs (the stable vertices and the rest of the mesh:
    extra_source (N, E, 3) in the frames, extra_target (E, 3) or per frame (N, E, 3) where they
    belong; ``centred``: both already less ``const.centre``). Returns the fit of
    (x - centre) -> (target - centre); its ``mse`` is not computed (zeros)."""
    z = np.asarray(weights, np.float64)
    c = const
    n_frames, r = fm.m.shape[:2]
    sum_s = fm.s + c.oc_sum  # (N, 3): sum of x - centre
    on_basis = z @ c.basis_terms.T  # (N, 12): sum_r z_r cross_r flat, then sum_r z_r colsum_r
    sum_t = c.oc_sum + on_basis[:, 9:]  # sum of target - centre
    # sum (t - centre)(x - centre)^T; the two weighted sums over r as matmuls on flat 3 x 3s
    weighted = (np.matmul(z[:, None], fm.m.reshape(n_frames, r, 9))[:, 0]
                + on_basis[:, :9])  # (N, 9): [k, j] of sum_r z_r (m_r + cross_r)
    cross = fm.q.transpose(0, 2, 1) + c.scatter + weighted.reshape(n_frames, 3, 3
                                                                   ).transpose(0, 2, 1)
    n = c.count  # pairs per frame, the same for every frame
    sq_s = None
    if scale:  # the source's spread sets the scale; a rigid fit does not read it
        sq_s = fm.yy + 2.0 * np.trace(fm.q, axis1=1, axis2=2) + np.trace(c.scatter)
    if extra_source is not None and extra_target is not None:
        # float32 products through BLAS (as align.fit_rigid_pairs): on the ~2,000 stable
        # vertices of a batch, float64 copies and einsum cost more than the rest of the fit.
        es = np.asarray(extra_source, np.float32)  # (N, E, 3), centred coordinates
        et = np.asarray(extra_target, np.float32)  # (E, 3) or (N, E, 3)
        if not centred:
            centre = c.centre.astype(np.float32)
            es, et = es - centre, et - centre
        ones = _ones(es.shape[1])
        sum_s = sum_s + np.matmul(ones, es)[:, 0].astype(np.float64)
        sum_t = sum_t + np.matmul(ones, et)[..., 0, :].astype(np.float64)
        cross = cross + np.matmul(np.swapaxes(et, -1, -2), es).astype(np.float64)  # t_e x_e^T
        if sq_s is not None:
            sq_s = sq_s + np.einsum("nek,nek->n", es, es, dtype=np.float64)
        n = n + es.shape[1]
    mu_s, mu_t = sum_s / n, sum_t / n
    cov = cross / n - mu_t[:, :, None] * mu_s[:, None, :]
    var_s = (np.zeros(n_frames) if sq_s is None
             else sq_s / n - (mu_s * mu_s).sum(axis=1))
    fit = _umeyama_batch(cov, mu_s, var_s, mu_t, 0.0, scale)
    return RigidBatch(fit.rotation, fit.translation, fit.scale, np.zeros(z.shape[0]))


_ONES: dict[int, np.ndarray] = {}


def _ones(count: int) -> np.ndarray:
    """(1, count) float32 ones, read-only, made once per count (the sums as BLAS products)."""
    ones = _ONES.get(count)
    if ones is None:
        if len(_ONES) >= 8:
            _ONES.clear()
        ones = np.ones((1, count), np.float32)
        ones.setflags(write=False)
        _ONES[count] = ones
    return ones


def uncentre(fit: RigidBatch, centre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A fit of (x - centre) -> (x' - centre) as x' = L x + t: (L (N, 3, 3), t (N, 3))."""
    lin = fit.scale[:, None, None] * fit.rotation
    t = fit.translation + centre - lin @ np.asarray(centre, np.float64)
    return lin, t


def compose(first: RigidBatch, linear: np.ndarray, shift: np.ndarray) -> RigidBatch:
    """x -> L (s R x + t0) + t as one RigidBatch (the first fit's ``mse`` kept); L a scaled
    rotation (N, 3, 3), shift t (N, 3)."""
    s = np.cbrt(np.linalg.det(linear))
    rot = (linear / s[:, None, None]) @ first.rotation
    return RigidBatch(rot, np.einsum("njk,nk->nj", linear, first.translation) + shift,
                      s * first.scale, first.mse)
