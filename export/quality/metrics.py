"""Quality metrics for solved controls: vertex error, control error, sparsity and jitter.

All pure numpy. T frames, V vertices, C controls. Control figures are given raw and normalised by
each control's range (``upper - lower``) so that controls of different units can be averaged.
The loop twins (``*_naive``) exist to check the vectorised versions.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from rigcast.export.quality.take_synth import bbox_diagonal
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)

__all__ = [
    "ACTIVE_FRACTION",
    "ControlErrorStats",
    "VertexErrorStats",
    "active_controls",
    "active_controls_naive",
    "bbox_diagonal",
    "control_error",
    "jitter",
    "jitter_naive",
    "vertex_distances",
    "vertex_distances_naive",
    "vertex_error",
]

#: A control counts as active when it is further than this fraction of its range from its default.
ACTIVE_FRACTION = 0.01


class MetricError(RigcastError, ValueError):
    """Arrays given to a metric have incompatible shapes; the message names them."""

    advice = "compare arrays of the same frames, vertices and controls"


@dataclass(frozen=True)
class VertexErrorStats:
    """mean/max over all frames and vertices; per_frame_mean/per_frame_max: (T,)."""

    mean: float
    max: float
    per_frame_mean: np.ndarray
    per_frame_max: np.ndarray


@dataclass(frozen=True)
class ControlErrorStats:
    """Mean absolute control error over frames and controls, raw and as a fraction of range."""

    mean_abs: float
    mean_abs_norm: float
    max_abs_norm: float


def _same_shape(a: np.ndarray, b: np.ndarray, what: str) -> None:
    if a.shape != b.shape:
        raise MetricError(f"{what}: shapes differ, {a.shape} vs {b.shape}")


def vertex_distances(pred: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """pred, ref: (T, V, 3) -> (T, V) Euclidean distance per vertex."""
    pred, ref = np.asarray(pred, dtype=np.float64), np.asarray(ref, dtype=np.float64)
    _same_shape(pred, ref, "vertex_distances")
    return np.linalg.norm(pred - ref, axis=-1)


def vertex_distances_naive(pred: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Loop twin of ``vertex_distances``."""
    out = np.zeros(pred.shape[:2])
    for t in range(pred.shape[0]):
        for v in range(pred.shape[1]):
            d = [float(pred[t, v, k]) - float(ref[t, v, k]) for k in range(3)]
            out[t, v] = (d[0] ** 2 + d[1] ** 2 + d[2] ** 2) ** 0.5
    return out


def vertex_error(pred: np.ndarray, ref: np.ndarray) -> VertexErrorStats:
    """pred, ref: (T, V, 3) -> mean and max distance, overall and per frame."""
    d = vertex_distances(pred, ref)
    return VertexErrorStats(
        mean=float(d.mean()),
        max=float(d.max()),
        per_frame_mean=d.mean(axis=1),
        per_frame_max=d.max(axis=1),
    )


def _ranges(lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    span = np.asarray(upper, dtype=np.float64) - np.asarray(lower, dtype=np.float64)
    if np.any(span <= 0):
        raise MetricError(f"control ranges must be positive, got {span[span <= 0]}")
    return span


def control_error(
    pred: np.ndarray, truth: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> ControlErrorStats:
    """pred, truth: (T, C); lower, upper: (C,) -> mean |pred - truth|, raw and per range."""
    pred, truth = np.asarray(pred, dtype=np.float64), np.asarray(truth, dtype=np.float64)
    _same_shape(pred, truth, "control_error")
    err = np.abs(pred - truth)
    norm = err / _ranges(lower, upper)
    return ControlErrorStats(
        mean_abs=float(err.mean()), mean_abs_norm=float(norm.mean()), max_abs_norm=float(norm.max())
    )


def active_controls(
    controls: np.ndarray,
    defaults: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    fraction: float = ACTIVE_FRACTION,
) -> np.ndarray:
    """controls: (T, C); defaults, lower, upper: (C,) -> (T,) int count of controls with
    |w - default| > fraction * range."""
    w = np.asarray(controls, dtype=np.float64)
    off = np.abs(w - np.asarray(defaults, dtype=np.float64))
    return (off > fraction * _ranges(lower, upper)).sum(axis=1)


def active_controls_naive(
    controls: np.ndarray,
    defaults: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    fraction: float = ACTIVE_FRACTION,
) -> np.ndarray:
    """Loop twin of ``active_controls``."""
    out = np.zeros(controls.shape[0], dtype=np.int64)
    for t in range(controls.shape[0]):
        for c in range(controls.shape[1]):
            span = float(upper[c]) - float(lower[c])
            if abs(float(controls[t, c]) - float(defaults[c])) > fraction * span:
                out[t] += 1
    return out


def jitter(controls: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> float:
    """controls: (T, C), T >= 3 -> RMS over frames and controls of the second difference
    w[t+1] - 2 w[t] + w[t-1], each control divided by its range (units: range per frame^2)."""
    w = np.asarray(controls, dtype=np.float64)
    if w.ndim != 2 or w.shape[0] < 3:
        raise MetricError(f"jitter needs controls of shape (T >= 3, C), got {w.shape}")
    acc = (w[2:] - 2.0 * w[1:-1] + w[:-2]) / _ranges(lower, upper)
    return float(np.sqrt(np.mean(acc**2)))


def jitter_naive(controls: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> float:
    """Loop twin of ``jitter``."""
    total, n = 0.0, 0
    for t in range(1, controls.shape[0] - 1):
        for c in range(controls.shape[1]):
            span = float(upper[c]) - float(lower[c])
            a = float(controls[t + 1, c]) - 2.0 * float(controls[t, c]) + float(controls[t - 1, c])
            total += (a / span) ** 2
            n += 1
    return (total / n) ** 0.5
