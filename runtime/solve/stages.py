"""The solve's array stages after the rigid fit, each written once for a batch of B frames.

The live server runs them on a batch of one frame, ``rigcast solve`` on batches of many
(runtime/solve/solve_core.py strings them together). Each fast function has its naive twin beside it,
which the tests hold it to:

- :func:`gather_inputs`: the inverse's K input vertices of each frame, moved by the frame's rigid
  fit (``align.RigidBatch``) when the solve stabilises;
- :func:`clamp`: the controls into the schema's bounds, saying which frames were clipped;
- :func:`fit_error`: per frame, RMS and max distance between the forward model's mesh and the
  (stabilised) input, on all vertices or on a weighted subset (:func:`fit_subset`).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from rigcast.runtime.solve.align import RigidBatch

log = logging.getLogger(__name__)


#: frames per gather-and-move in ``gather_inputs``: a slice's gathered rows are still in cache
#: when they are moved (the demo face's realignment source, 2,337 rows of 1,024 frames: 27 ->
#: 18 us a frame, one thread; the same bits)
GATHER_SLICE = 64


def gather_inputs(frames: np.ndarray, indices: np.ndarray, rigid: RigidBatch | None,
                  out: np.ndarray | None = None) -> np.ndarray:
    """frames (B, V, 3), indices (K,) -> (B, K, 3) float32: rigid.apply(frames[:, indices]), or
    the gathered rows as they are when ``rigid`` is None. Only the K rows are moved, never all V.
    ``out`` (B, K, 3) float32, when given, receives the result."""
    if rigid is None:
        if out is None:
            out = np.empty((frames.shape[0], indices.shape[0], 3), np.float32)
        np.take(frames, indices, axis=1, out=out)
        return out
    # Gathered apart, then moved into ``out``: a product into its own operand would make numpy
    # copy the operand first.
    count = frames.shape[0]
    if count <= GATHER_SLICE:
        moved: np.ndarray = rigid.apply(np.take(frames, indices, axis=1), out=out)
        return moved
    if out is None:
        out = np.empty((count, indices.shape[0], 3), np.float32)
    for j in range(0, count, GATHER_SLICE):
        k = min(j + GATHER_SLICE, count)
        rigid.frames(j, k).apply(np.take(frames[j:k], indices, axis=1), out=out[j:k])
    return out


def gather_inputs_naive(frames: np.ndarray, indices: np.ndarray, rigid: RigidBatch | None
                        ) -> np.ndarray:
    """Twin of gather_inputs: each row moved on its own, in float64."""
    out = np.empty((frames.shape[0], indices.shape[0], 3), np.float64)
    for b in range(frames.shape[0]):
        for k, v in enumerate(indices):
            p = np.asarray(frames[b, v], np.float64)
            if rigid is not None:
                p = rigid.scale[b] * rigid.rotation[b] @ p + rigid.translation[b]
            out[b, k] = p
    return out


def clamp(values: np.ndarray, lower: np.ndarray, upper: np.ndarray,
          out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """values (B, C), lower/upper (C,) -> (out (B, C) float32 in bounds, clipped (B,) bool)."""
    clipped: np.ndarray = np.asarray(((values < lower) | (values > upper)).any(axis=1))
    if out is None:
        out = np.empty(values.shape, np.float32)
    # np.clip's numbers with two ufunc calls (its wrapper costs more than both on one frame)
    np.minimum(np.maximum(values, lower), upper, out=out)
    return out, clipped


def clamp_naive(values: np.ndarray, lower: np.ndarray, upper: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """Twin of clamp: a loop over frames and controls."""
    out = np.empty(values.shape, np.float32)
    clipped = np.zeros(values.shape[0], bool)
    for b in range(values.shape[0]):
        for c in range(values.shape[1]):
            v = float(values[b, c])
            lo, hi = float(lower[c]), float(upper[c])
            clipped[b] |= v < lo or v > hi
            out[b, c] = min(max(v, lo), hi)
    return out, clipped


@dataclass(frozen=True)
class FitSubset:
    """Vertices the fit error reads, and how to weigh them into an RMS over all V vertices.

    indices (M,) int64: first the ``exact`` vertices always read, then a sample of the rest;
    weights (M,) float32: 1 for the exact ones, (V - exact) / sample for the sampled ones, so
    ``sum(weights * d2[indices]) / V`` estimates ``mean(d2)`` without bias (stratified sampling).
    """

    indices: np.ndarray
    weights: np.ndarray
    exact: int
    vertex_count: int


def fit_subset(vertex_count: int, always: np.ndarray, sample: int, seed: int = 0) -> FitSubset:
    """The fit-error vertices: ``always`` (A,) indices plus ``sample`` of the others, drawn once
    with ``seed``. All vertices (weights 1) when the others are no more than ``sample``."""
    exact = np.unique(np.asarray(always, dtype=np.int64))
    rest = np.setdiff1d(np.arange(vertex_count, dtype=np.int64), exact)
    if rest.shape[0] <= sample:
        drawn = rest
    else:
        drawn = np.sort(np.random.default_rng(seed).choice(rest, size=sample, replace=False))
    weights = np.ones(exact.shape[0] + drawn.shape[0], np.float32)
    if drawn.shape[0]:
        weights[exact.shape[0] :] = rest.shape[0] / drawn.shape[0]
    return FitSubset(np.concatenate([exact, drawn]), weights, int(exact.shape[0]), vertex_count)


def fit_error(predicted: np.ndarray, observed: np.ndarray, rigid: RigidBatch | None,
              weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame fit error of the forward model's meshes against the observed ones.

    predicted (B, M, 3) forward model output, in the neutral's frame; observed (B, M, 3) the
    same vertices of the input meshes, moved into that frame by ``rigid`` (None: as they are);
    weights (M,) per-vertex weights of the RMS (``FitSubset.weights``; None: all 1).
    Returns (rms (B,), max (B,)) float64, mesh units.
    """
    if rigid is not None:
        diff = rigid.apply(observed)
        diff -= predicted
    else:
        diff = np.subtract(observed, predicted, dtype=np.float32)
    # d2[b, m] = sum_x diff[b, m, x]^2: an in-place square, then the three summed by a product
    # with a column of ones (BLAS; two strided adds cost twice as much)
    np.square(diff, out=diff)
    d2 = diff @ np.ones(3, np.float32)
    if weights is None:
        mean_d2 = d2.mean(axis=1, dtype=np.float64)
    else:
        mean_d2 = (d2.astype(np.float64) @ weights) / float(weights.sum())
    return np.sqrt(mean_d2), np.sqrt(d2.max(axis=1).astype(np.float64))


def fit_error_naive(predicted: np.ndarray, observed: np.ndarray, rigid: RigidBatch | None,
                    weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Twin of fit_error: loops over frames and vertices, in float64."""
    b_count, m_count = predicted.shape[0], predicted.shape[1]
    w = np.ones(m_count) if weights is None else np.asarray(weights, np.float64)
    rms, worst = [], []
    for b in range(b_count):
        total, peak = 0.0, 0.0
        for m in range(m_count):
            p = np.asarray(observed[b, m], np.float64)
            if rigid is not None:
                p = rigid.scale[b] * rigid.rotation[b] @ p + rigid.translation[b]
            d2 = float(np.sum((p - predicted[b, m]) ** 2))
            total += w[m] * d2
            peak = max(peak, d2)
        rms.append(math.sqrt(total / float(w.sum())))
        worst.append(math.sqrt(peak))
    return np.array(rms), np.array(worst)


def ease_towards(current: np.ndarray, target: np.ndarray, dt_s: float, tau_s: float
                 ) -> np.ndarray:
    """current (C,), target (C,) -> (C,) float32: one step of a first-order ease (an exponential
    approach with time constant ``tau_s``) over ``dt_s`` seconds, ``current + (1 - exp(-dt/tau))
    (target - current)``; so after t seconds of steps, whatever their sizes, the distance left
    is exp(-t/tau) of the start's. dt_s <= 0 leaves ``current``."""
    alpha = -math.expm1(-max(dt_s, 0.0) / tau_s)  # 1 - exp(-dt/tau), exact for small dt
    out: np.ndarray = (current + np.float32(alpha) * (target - current)).astype(np.float32)
    return out
