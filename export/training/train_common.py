"""Pieces every training loop shares: the error, the progress callback, the hold-out split, the
one-cycle schedule and its time budget, and the vertex error figures (mesh units)."""

from __future__ import annotations

import logging
from collections.abc import Callable

import numpy as np
import torch
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)

Progress = Callable[[str, int, int], None]
TORCH_THREADS = 2
PROBE_STEPS = 20  # steps timed before a time budget cuts the schedule


class TrainError(RigcastError, ValueError):
    """Training inputs are unusable; the message names the bad value."""


def diagonal(neutral: np.ndarray) -> float:
    """neutral: (V, 3) -> length of its axis-aligned bounding-box diagonal."""
    return float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0)))


def vertex_errors(pred: np.ndarray, true: np.ndarray) -> np.ndarray:
    """pred, true: (N, V, 3) -> (N, V) Euclidean distance per vertex."""
    return np.linalg.norm(np.asarray(pred, np.float64) - np.asarray(true, np.float64), axis=-1)


def split_holdout(n: int, holdout: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(train indices, held-out indices), both sorted: a seeded share ``holdout`` of range(n) is
    held out, at least one and never all (none when n is 1)."""
    order = np.random.default_rng(seed).permutation(n)
    n_hold = min(max(1, round(holdout * n)), n - 1) if n > 1 else 0
    return np.sort(order[n_hold:]), np.sort(order[:n_hold])


def fit_budget(total: int, done: int, elapsed: float, budget: float) -> int:
    """Shrink a step count so that the remaining steps, at the pace of the first ``done`` steps
    (``elapsed`` seconds), fit the ``budget`` seconds left; a schedule must know its length up
    front, so this runs once, early. Never fewer than 2 x ``done`` steps."""
    per_step = elapsed / max(done, 1)
    if per_step * total <= budget:
        return total
    return max(2 * done, int(budget / per_step))


def one_cycle(
    opt: torch.optim.Optimizer, lr: float | list[float], total: int
) -> torch.optim.lr_scheduler.LRScheduler:
    """The one-cycle learning-rate schedule both networks train with (15 % warm-up); ``lr``: the
    peak, or one peak per parameter group."""
    return torch.optim.lr_scheduler.OneCycleLR(
        opt, max_lr=lr, total_steps=max(total, 2), pct_start=0.15
    )

