"""The inverse's sparsity term: one L1 coefficient per control, set from its mesh effect.

The training loss (train_inverse.py) is, per sample, over L loss vertices and C controls,

    mean_v w_v |forward(c)_v - x_v|^2 / (3 scale^2)  +  mean_c coef_c |u_c - d_c|

with u the normalised controls (c - lo) / range. Along one control the mesh term's curvature is

    E_c = mean_v w_v |W_c,v|^2 / (3 scale^2)          W: the forward model's linear part, per range

and the minimiser of E_c (u - u*)^2 + (coef_c / C) |u| is the soft threshold u* - coef_c / (2 C E_c)
(a diagonal view: it leaves out the coupling between controls, the forward model's non-linear
part and the supervised term). ``scale`` is the RMS motion of the input vertices, which the rig's
largest control sets, so one shared coefficient pulls a small, local control to rest by many
times its range beside a large one (demo face: a nostril 4.5 ranges, the median control 40 %).
"""

from __future__ import annotations

import numpy as np
from rigcast.export.training.models import ForwardApproximator

#: A control whose whole-range motion over the loss vertices is below this many standard
#: deviations of the training's input noise counts as hidden by the noise (the 3-sigma rule of
#: detection; common practice, no source).
HIDDEN_SNR = 3.0


def squared_effect(forward: ForwardApproximator, vertices: np.ndarray) -> np.ndarray:
    """(C, L) |W_c,v|^2: each control's whole-range motion at each of ``vertices`` (L,), squared,
    from the forward model's linear part."""
    c = forward.control_count
    w = np.asarray(forward.linear_weight.detach().numpy(), np.float64).reshape(c, -1, 3)
    out: np.ndarray = np.sum(w[:, np.asarray(vertices)] ** 2, axis=-1)
    return out


def mesh_curvatures(
    forward: ForwardApproximator,
    vertices: np.ndarray,
    scale: float,
    weights: np.ndarray | None = None,
) -> np.ndarray:
    """(C,) E_c = mean over ``vertices`` (L,) of w_v |W_c,v|^2 / (3 scale^2); weights: (L,) the
    loss's vertex weights (None: all 1)."""
    sq = squared_effect(forward, vertices)
    if weights is not None:
        sq = sq * np.asarray(weights, np.float64)[None, :]
    return np.mean(sq, axis=1) / (3.0 * scale * scale)


def hidden_by_noise(
    forward: ForwardApproximator, vertices: np.ndarray, noise: float
) -> np.ndarray:
    """(C,) bool: control c's whole-range motion over ``vertices`` (L,), as a signal-to-noise
    ratio against white noise of ``noise`` per coordinate, sqrt(sum_v |W_c,v|^2) / noise, is at
    most ``HIDDEN_SNR``: no single frame tells it from the noise."""
    if noise <= 0.0:
        return np.zeros(forward.control_count, bool)
    energy = np.sum(squared_effect(forward, vertices), axis=1)
    return np.asarray(np.sqrt(energy) / noise <= HIDDEN_SNR)


def l1_coefficients(
    forward: ForwardApproximator,
    vertices: np.ndarray,
    scale: float,
    l1: float,
    shrink: float,
    *,
    noise: float = 0.0,
    weights: np.ndarray | None = None,
) -> np.ndarray:
    """(C,) float32 L1 coefficients of the inverse's loss (module docstring).

    ``shrink`` 0: ``l1`` for every control. Otherwise min(l1, 2 C shrink E_c): no control is
    pulled towards rest by more than ``shrink`` of its range, and one that ``l1`` pulls less keeps
    ``l1``. Controls hidden by the training's input noise (``hidden_by_noise``, white noise of
    ``noise`` per coordinate) keep ``l1``: a smaller coefficient would only let them follow the
    noise. Floored at 1e-6 l1. vertices: (L,) the loss vertices; weights: (L,) their weights.
    """
    c = forward.control_count
    if shrink == 0.0:
        return np.full(c, l1, np.float32)
    e = mesh_curvatures(forward, vertices, scale, weights)
    coef = np.clip(2.0 * c * shrink * e, 1e-6 * l1, l1)
    return np.where(hidden_by_noise(forward, vertices, noise), l1, coef).astype(np.float32)
