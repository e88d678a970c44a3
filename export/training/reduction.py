"""Vertex selection: the K vertices the inverse reads, and the S that anchor head stabilisation.

The runtime's cost must not grow with the full vertex count, so the inverse network reads a fixed
subset of K vertices. They are chosen by farthest-point sampling in the neutral pose, weighted by
how much each vertex moves over the dataset, so that every moving region is covered and static
regions are skipped; the vertex each control moves most is always included, so no
control goes unobserved.

The stable vertices are those the controls move least. Taking only the very least-moving ones tends
to pick one tight cluster (the back of a head), which makes the Kabsch fit ill-conditioned; so we
take the least-moving fraction and farthest-point sample inside it to spread them out.

All functions are pure numpy.
"""

from __future__ import annotations

import logging

import numpy as np
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)


class ReductionError(RigcastError, ValueError):
    """A vertex selection was asked for something impossible; the message names the value."""

    advice = "ask for fewer vertices than the mesh has, or for a mesh that moves"


def motion_rms(neutral: np.ndarray, vertices: np.ndarray) -> np.ndarray:
    """Per-vertex RMS displacement from the neutral over a dataset.

    neutral: (V, 3); vertices: (N, V, 3)
    returns: (V,) float64 sqrt(mean_n |vertices[n, v] - neutral[v]|^2).
    """
    acc = np.zeros(neutral.shape[0], dtype=np.float64)
    step = 1024
    for start in range(0, vertices.shape[0], step):
        d = vertices[start : start + step].astype(np.float64) - neutral[None].astype(np.float64)
        acc += np.einsum("nvk,nvk->v", d, d)  # sum over samples n and axes k of d^2
    return np.sqrt(acc / max(vertices.shape[0], 1))


def farthest_point_sample(
    points: np.ndarray, k: int, weights: np.ndarray | None = None, start: int | None = None
) -> np.ndarray:
    """Greedy (weighted) farthest-point sampling.

    points: (V, D); weights: (V,) >= 0 or None (all ones); start: first index (default: the
    highest-weight point, ties to the lowest index). Each step picks argmax_v weights[v] * d(v, S),
    d being the Euclidean distance to the chosen set S, among points not yet chosen; once every
    remaining score is 0 (points coincide with chosen ones, as split normals and UV seams make,
    or have weight 0) the rest are taken by weight, then index, so K picks always end.
    returns: (k,) int64 distinct indices in pick order.
    """
    v = points.shape[0]
    if not 0 < k <= v:
        raise ReductionError(f"cannot pick {k} points out of {v}")
    pts = np.asarray(points, dtype=np.float64)
    w = np.ones(v) if weights is None else np.asarray(weights, dtype=np.float64)
    first = int(np.argmax(w)) if start is None else int(start)
    out = np.empty(k, dtype=np.int64)
    out[0] = first
    taken = np.zeros(v, dtype=bool)
    taken[first] = True
    dist = np.linalg.norm(pts - pts[first], axis=1)
    for i in range(1, k):
        score = np.where(taken, -1.0, w * dist)
        nxt = int(np.argmax(score))
        if score[nxt] <= 0.0:
            rest = np.flatnonzero(~taken)
            out[i:] = rest[np.argsort(-w[rest], kind="stable")[: k - i]]
            break
        out[i] = nxt
        taken[nxt] = True
        dist = np.minimum(dist, np.linalg.norm(pts - pts[nxt], axis=1))
    return out


def farthest_point_sample_naive(
    points: np.ndarray, k: int, weights: np.ndarray | None = None, start: int | None = None
) -> np.ndarray:
    """Loop twin of ``farthest_point_sample``: recomputes every distance to the set at each step."""
    v = points.shape[0]
    w = [1.0] * v if weights is None else [float(x) for x in weights]
    chosen = [int(np.argmax(w)) if start is None else int(start)]
    while len(chosen) < k:
        best, best_score = -1, 0.0
        for i in range(v):
            if i in chosen:
                continue
            d = min(float(np.sqrt(np.sum((points[i] - points[j]) ** 2))) for j in chosen)
            if w[i] * d > best_score:
                best, best_score = i, w[i] * d
        if best < 0:
            rest = sorted((i for i in range(v) if i not in chosen), key=lambda i: (-w[i], i))
            chosen.extend(rest[: k - len(chosen)])
            break
        chosen.append(best)
    return np.array(chosen, dtype=np.int64)


def input_count_for(vertex_count: int) -> int:
    """Default K: an eighth of the mesh, at least 256 and at most 512 (never more than V)."""
    return int(min(vertex_count, max(256, min(512, vertex_count // 8))))


def stable_count_for(vertex_count: int) -> int:
    """Default S: a fortieth of the mesh, at least 64 and at most 200 (never more than V)."""
    return int(min(vertex_count, max(64, min(200, vertex_count // 40))))


def select_input_vertices(
    neutral: np.ndarray,
    motion: np.ndarray,
    k: int,
    must_include: np.ndarray | None = None,
    moving_fraction: float = 1e-3,
) -> np.ndarray:
    """Choose K input vertices covering every moving region.

    neutral: (V, 3); motion: (V,) per-vertex RMS displacement; must_include: (M,) indices that
    are always taken (e.g. ``control_region_vertices``: each control's own region). Vertices
    moving less than ``moving_fraction`` x the largest motion count as static and are only used
    if K exceeds the moving ones. Weighted FPS with weight sqrt(motion / max motion), seeded with
    the must-include set, spreads the rest.
    returns: (K,) sorted unique int64.
    """
    v = neutral.shape[0]
    if not 0 < k <= v:
        raise ReductionError(f"cannot pick {k} input vertices out of {v}")
    peak = float(motion.max())
    if peak <= 0.0:
        raise ReductionError("no vertex moves over the dataset; the rig's controls do nothing")
    chosen = np.unique(np.asarray(must_include if must_include is not None else [], np.int64))
    if chosen.size >= k:
        order = np.argsort(-motion[chosen], kind="stable")
        return np.sort(chosen[order[:k]])
    weights = np.sqrt(motion / peak)
    weights[motion <= moving_fraction * peak] = 0.0
    pts = np.asarray(neutral, np.float64)
    taken = np.zeros(v, dtype=bool)
    taken[chosen] = True
    dist = np.full(v, np.inf)
    for idx in chosen:
        dist = np.minimum(dist, np.linalg.norm(pts - pts[idx], axis=1))
    picked = list(chosen)
    while len(picked) < k:
        score = np.where(taken, -1.0, weights * np.where(np.isinf(dist), 1e300, dist))
        j = int(np.argmax(score))
        if score[j] <= 0.0:  # the rest is static or coincides with picked vertices
            rest = np.flatnonzero(~taken)
            picked.extend(rest[np.argsort(-motion[rest], kind="stable")[: k - len(picked)]])
            break
        picked.append(j)
        taken[j] = True
        dist = np.minimum(dist, np.linalg.norm(pts - pts[j], axis=1))
    return np.sort(np.asarray(picked, dtype=np.int64))


#: Most stable vertices the build takes from a static region: enough that sensor noise barely
#: turns the fit (its rotation error falls as 1 / sqrt(S)), few enough that the live rigid fit
#: stays a small share of the frame (a choice of ours, measured on the demo face).
STABLE_CAP = 2048
#: A vertex moving at most this share of the rig's largest motion counts as static.
STATIC_FRACTION = 1e-3


def stable_vertices_for(neutral: np.ndarray, motion: np.ndarray, cap: int = STABLE_CAP,
                        static_fraction: float = STATIC_FRACTION) -> np.ndarray:
    """The build's default stable vertices: every static vertex (motion at most
    ``static_fraction`` of the largest), spread by farthest-point sampling down to ``cap``, when
    the rig has more of them than ``stable_count_for`` asks; else ``select_stable_vertices``.

    Why many: the rigid fit's noise. On the demo face with 0.1-0.2 % of D of sensor noise, the
    92 default stable vertices turned each frame enough to double the solve's error against the
    clean mesh (1.96x per-frame non-linear least squares, 0.71x without stabilisation); its 1,612
    static vertices brought it to 0.98x. neutral (V, 3); motion (V,) -> (S,) sorted int64."""
    s = stable_count_for(neutral.shape[0])
    peak = float(np.max(motion)) if motion.size else 0.0
    static = np.flatnonzero(motion <= static_fraction * peak)
    if peak <= 0.0 or static.size <= s:
        return select_stable_vertices(neutral, motion, s)
    n = min(static.size, cap)
    picks = farthest_point_sample(neutral[static], n, start=int(np.argmin(motion[static])))
    return np.sort(static[picks]).astype(np.int64)


def select_stable_vertices(
    neutral: np.ndarray, motion: np.ndarray, s: int, fraction: float = 0.2
) -> np.ndarray:
    """Choose S well-spread vertices that the controls move least.

    neutral: (V, 3); motion: (V,) per-vertex RMS displacement. Takes the ``fraction`` of vertices
    with the lowest motion (at least S of them), then farthest-point samples S of those, starting
    from the least-moving one. returns: (S,) sorted unique int64.
    """
    v = neutral.shape[0]
    if not 3 <= s <= v:
        raise ReductionError(f"cannot pick {s} stable vertices out of {v} (need 3 <= S <= V)")
    if not 0.0 < fraction <= 1.0:
        raise ReductionError(f"stable fraction must be in (0, 1], got {fraction}")
    pool_size = max(s, round(fraction * v))
    pool = np.argsort(motion, kind="stable")[:pool_size]
    picks = farthest_point_sample(neutral[pool], s, start=0)
    return np.sort(pool[picks])


def control_peak_vertices(linear_weight: np.ndarray) -> np.ndarray:
    """Each control's most-moved vertex.

    linear_weight: (C, 3V) per-control offsets of a linear fit -> (C,) int64 vertex indices.
    """
    c = linear_weight.shape[0]
    mag = np.linalg.norm(linear_weight.reshape(c, -1, 3), axis=2)  # (C, V)
    return np.argmax(mag, axis=1).astype(np.int64)


def control_region_vertices(linear_weight: np.ndarray, neutral: np.ndarray, per_control: int
                            ) -> np.ndarray:
    """The ``per_control`` vertices each control moves most, at distinct positions.

    linear_weight: (C, 3V) per-control offsets of a linear fit; neutral: (V, 3). A small, local
    shape (an eyelid, a nostril) then always has vertices of its own among the inverse's inputs,
    however little of the mesh it moves. Vertices at the same position as one already taken
    (split normals, UV seams) are skipped. returns: sorted unique int64 indices.
    """
    c = linear_weight.shape[0]
    mag = np.linalg.norm(linear_weight.reshape(c, -1, 3), axis=2)  # (C, V)
    _, first = np.unique(np.round(np.asarray(neutral, np.float64), 9), axis=0, return_index=True)
    distinct = np.zeros(mag.shape[1], dtype=bool)
    distinct[first] = True
    out: list[np.ndarray] = []
    for row in mag:
        order = np.argsort(-np.where(distinct, row, -1.0), kind="stable")[:per_control]
        out.append(order[row[order] > 0.0])
    return np.unique(np.concatenate(out)).astype(np.int64) if out else np.zeros(0, np.int64)


def stable_motion(motion: np.ndarray, stable: np.ndarray, diagonal: float) -> float:
    """RMS motion of the stable vertices as a fraction of the bounding-box diagonal.

    motion: (V,) per-vertex RMS displacement over the dataset; stable: (S,) indices. A rig with
    a rigid region (the back of a head) gives ~0; a rig with none gives the typical motion.
    """
    return float(np.sqrt(np.mean(np.asarray(motion, np.float64)[stable] ** 2)) / diagonal)
