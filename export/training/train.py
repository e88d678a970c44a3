"""Training: the forward approximator on sampled data, then the inverse through the frozen forward.

The work lives in three modules; this one keeps the import path callers use:
- ``train_forward``: ``ForwardConfig``, ``train_forward`` (linear layer by least squares, PCA of
  the residual, a correction MLP on its coefficients), ``ForwardReport``;
- ``train_inverse``: ``InverseConfig``, ``train_inverse`` (general or take mode, a mesh-space loss
  through the frozen forward model), ``InverseReport``, and the augmentations;
- ``train_common``: ``TrainError``, the hold-out split, the one-cycle schedule and its time
  budget, and the vertex error figures.
"""

from __future__ import annotations

from rigcast.export.training.train_common import (
    TORCH_THREADS,
    Progress,
    TrainError,
    diagonal,
    vertex_errors,
)
from rigcast.export.training.train_forward import (
    ForwardConfig,
    ForwardReport,
    fit_linear,
    randomized_pca,
    randomized_pca_naive,
    train_forward,
)
from rigcast.export.training.train_inverse import (
    InverseConfig,
    InverseReport,
    activity_rates,
    input_scale,
    loss_vertex_subset,
    random_poses,
    smooth_field_bank,
    train_inverse,
)

__all__ = [
    "TORCH_THREADS",
    "ForwardConfig",
    "ForwardReport",
    "InverseConfig",
    "InverseReport",
    "Progress",
    "TrainError",
    "activity_rates",
    "diagonal",
    "fit_linear",
    "input_scale",
    "loss_vertex_subset",
    "random_poses",
    "randomized_pca",
    "randomized_pca_naive",
    "smooth_field_bank",
    "train_forward",
    "train_inverse",
    "vertex_errors",
]
