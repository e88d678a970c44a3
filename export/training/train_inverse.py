"""The inverse network (mesh -> controls), trained through the frozen forward model.

Loss per batch of clean meshes ``x`` (B, V, 3):

    c    = inverse(x[:, K] + noise)            noise ~ N(0, sigma^2), sigma = noise_frac * diagonal
    loss = mean_v w_v |forward(c)_v - x_v|^2 / scale^2  +  mean_c l1_c |c - default| / range
           (+ supervised, general mode only: BCE(u(c), u(c_true)) with a weight decaying from
              ``supervised`` to ``supervised_floor``)
           (+ consistency * mean ((c - c') / range)^2,   c' = inverse(x[:, K] + noise'), a second,
              independent draw of the same noise; or, in mesh space, the weighted mean of
              |forward(c) - forward(c')|^2 / scale^2)

- sparsity by mesh effect: the mesh loss is normalised by ``scale``, the RMS motion of the input
  vertices, which the rig's largest control sets. One shared L1 coefficient then pulls control c
  towards rest by l1 / (2 C E_c) of its range (E_c its mesh loss curvature, ``l1_coefficients``):
  on the demo face, beside a jaw that moves 65 % of the vertices by 4.9 % of the diagonal (RMS),
  that pull was 40 % of the range for the median control and 4.5 ranges for a nostril, so only
  the supervised floor kept small, local shapes alive, and they died when the jaw opened (the
  "lost expressions" of issue 12). With ``shrink`` > 0 each control gets its own coefficient so
  that the pull is at most ``shrink`` of its range, except for controls the input noise hides,
  which keep ``l1`` (``sparsity.l1_coefficients``).
- general mode: batches mix the rig's sampled meshes with fresh random poses rendered through the
  frozen forward model (cheap augmentation); labels are known there, so an early, linearly
  decaying supervised term on normalised controls speeds convergence; after its decay it keeps a
  small floor weight, so the final solution is the mesh-space one up to that small pull.
- stability: the output's scaled sigmoid is flat past its clip and inside the rest band (see
  models.py), so an output pushed there on every pose gets no gradient from the mesh loss and
  stays dead (a face-linear build lost jaw_drop with its logit near -194 after a loss spike at
  the peak learning rate). Two guards: the gradient norm is clipped before each Adam step
  (``clip_norm``: one bad batch cannot throw the weights far), and the supervised floor's BCE on
  the logits has the gradient sigmoid(z) - target, which never vanishes, so a dead output is
  always pulled back (about 0.03 logit a step on the test rig; a quadratic penalty on logits past
  8 was tried too: it pulled faster but, through the clip, doubled the held-out error). The
  clip does not remove the loss spike at the peak learning rate (face-linear, 1,500 steps, seed
  1: spike 0.45 with it, 0.17 without; the same final loss, 0.0018); the floor is what makes a
  dead output recoverable. The
  reported loss (``final_loss``, ``loss_curve``) is the mesh-space part (mesh + L1),
  comparable between configs.
- noise consistency: the same pose under two noise draws should give the same controls (the
  method's "similar meshes, similar controls"). The mesh loss alone already charges the output's
  variance under noise once, but only by its mesh effect: controls that move the mesh little or
  alike (a per-frame fit's ill-conditioned directions) follow the noise nearly for free, and those
  dominate the take's jitter. The term in normalised controls charges them by their range.
- take mode: the user's frames only, no labels; purely self-supervised, starting from a given
  (general) inverse.

Adam with a one-cycle schedule, fixed seeds, two torch threads (the machine is shared).
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import torch
import torch.nn.functional as F
from rigcast.export.training.models import ForwardApproximator, InverseNetwork
from rigcast.export.training.sparsity import l1_coefficients
from rigcast.export.training.train_common import (
    PROBE_STEPS,
    TORCH_THREADS,
    Progress,
    TrainError,
    diagonal,
    fit_budget,
    one_cycle,
    split_holdout,
    vertex_errors,
)

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class InverseConfig:
    hidden: tuple[int, ...] = (512, 512)
    steps: int = 3000
    batch: int = 256
    lr: float = 1.5e-3
    noise_frac: float = 0.0015  # input noise sigma as a fraction of the neutral's bbox diagonal
    jitter_frac: float = 0.0  # random rigid translation, fraction of diagonal (0 = off)
    wobble_frac: float = 0.001  # RMS of a smooth random deformation, fraction of diagonal (0 = off)
    l1: float = 5e-2  # measured on face-linear: 1e-2 -> 10.3 active (truth 5.8), 1e-1 -> 2.6
    fresh_fraction: float = 0.5  # share of each general batch rendered through the forward model
    supervised: float = 1.0  # initial weight of the early supervised term (general mode only)
    supervised_until: float = 0.6  # share of the steps over which that weight decays to 0
    supervised_floor: float = 0.01  # weight the supervised term keeps after its decay (above)
    clip_norm: float = 1.0  # gradient-norm clip before each Adam step (0 = off); median norm on
    # face-linear's first 80 steps: 0.71, max 10.6
    loss_vertices: int = 1536  # mesh loss on this many fixed random moving vertices (0 = all)
    # Noise consistency (module docstring), in normalised controls. 30 by default: the take's
    # jitter against per-frame non-linear least squares (bench/quality.py, the full solve as
    # served), 0 -> 30, with the other section-3 figures held: demo face 0.37 -> 0.10, zoo-899926
    # 1.08 -> 0.54, fresh zoo-576132 (jaw face) 1.16 -> 0.62 (take error 0.56 -> 0.55 x, none
    # lost either way). Earlier, network alone on zoo 342431: 100 cut more (0.054 -> 0.019) for
    # +25 % take error; 10 in mesh space: 0.034, +25 % (a small mesh effect is charged little).
    consistency: float = 30.0
    consistency_space: Literal["mesh", "controls"] = "controls"
    # Sparsity by mesh effect (module docstring, sparsity.py): when > 0, no control is pulled
    # towards rest by more than this share of its range, except controls the training's noise
    # hides, which keep ``l1``; 0: ``l1`` for every control.
    shrink: float = 0.02  # measured on the demo face and zoo rigs (the closing note of 2026-12-05)
    seed: int = 0
    max_seconds: float | None = None  # a time budget; None: the fixed schedule (see above)



@dataclass(frozen=True)
class InverseReport:
    """Mesh error of forward(inverse(x)) against x (through the forward model), on check meshes."""

    mode: str
    mean_err: float
    max_err: float
    mean_err_pct_diag: float
    final_loss: float
    steps: int
    seconds: float
    input_scale: float
    loss_curve: tuple[float, ...] = field(default=(), compare=False)
    clipped_steps: int = 0  # steps whose gradient norm the clip cut (config.clip_norm)
    grad_norm_p50: float = 0.0  # median gradient norm before the clip (0: no clip, not measured)
    grad_norm_max: float = 0.0


def activity_rates(
    controls: np.ndarray, lower: np.ndarray, upper: np.ndarray, defaults: np.ndarray
) -> np.ndarray:
    """controls: (N, C) -> (C,) share of samples where |c - default| > 1% of the range."""
    span = np.asarray(upper, np.float64) - lower
    return np.mean(np.abs(np.asarray(controls, np.float64) - defaults) > 0.01 * span, axis=0)


def random_poses(
    rng: np.random.Generator,
    n: int,
    lower: np.ndarray,
    upper: np.ndarray,
    defaults: np.ndarray,
    rates: np.ndarray,
) -> np.ndarray:
    """(n, C) float32 poses: control c is drawn uniformly in bounds with probability rates[c],
    else left at its default. Matches the sparse training distribution without the rig."""
    c = lower.shape[0]
    active = rng.random((n, c)) < rates
    vals = lower + (upper - lower) * rng.random((n, c))
    return np.where(active, vals, defaults).astype(np.float32)


def input_scale(meshes: np.ndarray, neutral: np.ndarray, input_indices: np.ndarray) -> float:
    """RMS offset of the input vertices over meshes (N, V, 3), floored to 1e-3 x the diagonal."""
    sub = np.asarray(meshes[: min(meshes.shape[0], 4096)][:, input_indices], np.float64)
    rms = float(np.sqrt(np.mean((sub - neutral[input_indices]) ** 2)))
    return max(rms, 1e-3 * diagonal(neutral))


def train_inverse(
    forward: ForwardApproximator,
    meshes: np.ndarray,
    input_indices: np.ndarray,
    defaults: np.ndarray,
    config: InverseConfig = InverseConfig(),
    *,
    mode: Literal["general", "take"] = "general",
    controls: np.ndarray | None = None,
    region_weights: np.ndarray | None = None,
    init: InverseNetwork | None = None,
    progress: Progress | None = None,
) -> tuple[InverseNetwork, InverseReport]:
    """Train (or, in take mode, fine-tune) an InverseNetwork through the frozen ``forward``.

    meshes: (N, V, 3) clean training meshes in the neutral's frame (the rig's samples in general
    mode, the user's frames in take mode); input_indices: (K,); defaults: (C,); controls: (N, C)
    labels of ``meshes`` (general mode only; used for the early supervised term and the activity
    rates of fresh poses); region_weights: (V,) >= 0 per-vertex loss weights (normalised to mean
    1); init: a network to start from (required in take mode).
    """
    t0 = time.perf_counter()
    torch.set_num_threads(TORCH_THREADS)
    torch.manual_seed(config.seed)
    rng = np.random.default_rng(config.seed)
    if mode not in ("general", "take"):
        raise TrainError(f"inverse mode must be 'general' or 'take', got {mode!r}")
    if config.consistency < 0.0 or config.consistency_space not in ("mesh", "controls"):
        raise TrainError(
            "inverse consistency must be >= 0 in space 'mesh' or 'controls', got "
            f"{config.consistency!r} in {config.consistency_space!r}"
        )
    if not 0.0 <= config.shrink <= 1.0:
        raise TrainError(
            f"inverse shrink must be a share of the range in [0, 1], got {config.shrink!r}"
        )
    if mode == "take" and init is None:
        raise TrainError("take mode fine-tunes an existing inverse; pass init=")
    neutral = forward.neutral.numpy().reshape(-1, 3)
    v = neutral.shape[0]
    if meshes.ndim != 3 or meshes.shape[1:] != (v, 3):
        raise TrainError(f"meshes must be (N, {v}, 3), got {meshes.shape}")
    lo, hi = forward.lower.numpy(), forward.upper.numpy()
    defaults = np.asarray(defaults, np.float32)
    labelled = mode == "general" and controls is not None
    n = meshes.shape[0]
    fit_idx, check_idx = split_holdout(n, 0.05, config.seed) if n >= 20 else (np.arange(n), np.arange(n))
    if init is None:
        scale = input_scale(meshes, neutral, input_indices)
        model = InverseNetwork(
            neutral[input_indices], scale, lo, hi, defaults, hidden=config.hidden
        )
    else:
        model = init
        scale = 1.0 / float(model.inv_scale)
    # The input vertices hold every control's own region (reduction.control_region_vertices), so
    # a small, local shape always has vertices in the loss, not only where a random draw fell.
    loss_idx = np.union1d(loss_vertex_subset(meshes, neutral, config.loss_vertices, config.seed),
                          np.asarray(input_indices, np.int64))
    weights = _region_weights(region_weights, v)[torch.from_numpy(loss_idx)]
    fwd_sub = forward.restricted(loss_idx)
    loss_t = torch.from_numpy(loss_idx)
    diag = diagonal(neutral)
    sigma, jitter = config.noise_frac * diag, config.jitter_frac * diag
    wobble_bank = (
        torch.from_numpy(
            smooth_field_bank(neutral[input_indices], config.wobble_frac * diag, config.seed)
        )
        if config.wobble_frac > 0.0
        else None
    )
    rates = (
        activity_rates(controls, lo, hi, defaults) if labelled and controls is not None else None
    )
    fresh = round(config.fresh_fraction * config.batch) if rates is not None else 0
    idx_t = torch.as_tensor(input_indices, dtype=torch.long)
    span_t, def_t = torch.from_numpy(hi - lo), torch.from_numpy(defaults)
    l1_c = torch.from_numpy(l1_coefficients(
        forward, loss_idx, scale, config.l1, config.shrink, noise=sigma, weights=weights.numpy()
    ))
    opt = torch.optim.Adam(model.parameters(), lr=config.lr)
    sched = one_cycle(opt, config.lr, config.steps)
    inv_s2 = 1.0 / (scale * scale)
    curve: list[float] = []
    norms: list[float] = []
    clipped = 0
    model.train()
    loss_val, total, step = float("nan"), config.steps, 0
    t_loop = time.perf_counter()
    while step < total:
        if step == PROBE_STEPS and config.max_seconds is not None:
            total = fit_budget(
                total, step, time.perf_counter() - t_loop, config.max_seconds - (t_loop - t0)
            )
            if total != config.steps:
                log.warning(
                    "inverse: the %.0fs time budget cut training to %d of %d steps",
                    config.max_seconds,
                    total,
                    config.steps,
                )
                sched = one_cycle(opt, config.lr, total - step)
        pick = np.sort(
            rng.choice(fit_idx, size=config.batch - fresh, replace=fit_idx.size < config.batch)
        )
        x = torch.from_numpy(np.asarray(meshes[pick], np.float32))
        c_true = (
            torch.from_numpy(np.asarray(controls[pick], np.float32))
            if labelled and controls is not None
            else None
        )
        if fresh and rates is not None and c_true is not None:
            c_new = torch.from_numpy(random_poses(rng, fresh, lo, hi, defaults, rates))
            with torch.no_grad():
                x = torch.cat([x, forward(c_new)])
            c_true = torch.cat([c_true, c_new])
        z = model.logits(_augment(x[:, idx_t], sigma, jitter, wobble_bank))
        c = model.from_logits(z)
        pred = fwd_sub(c)
        diff = pred - x[:, loss_t]
        loss = (weights * diff.pow(2).sum(-1)).mean() * inv_s2 / 3.0
        loss = loss + (l1_c * (c - def_t).abs() / span_t).mean()
        objective = float(loss.detach())  # the mesh-space loss, without the supervised term
        if config.consistency > 0.0:
            # a second, independent noise draw on the same poses must give the same answer
            c2 = model(_augment(x[:, idx_t], sigma, jitter, wobble_bank))
            if config.consistency_space == "mesh":
                gap = (weights * (pred - fwd_sub(c2)).pow(2).sum(-1)).mean() * inv_s2 / 3.0
            else:
                gap = ((c - c2) / span_t).pow(2).mean()
            loss = loss + config.consistency * gap
        ramp = max(0.0, 1.0 - step / max(1.0, config.supervised_until * total))
        sup = max(config.supervised * ramp, config.supervised_floor)
        if c_true is not None and sup > 0.0:
            loss = loss + sup * F.binary_cross_entropy_with_logits(
                z, model.sigmoid_target(c_true)
            )
        opt.zero_grad(set_to_none=True)
        loss.backward()
        if config.clip_norm > 0.0:
            norm = float(torch.nn.utils.clip_grad_norm_(model.parameters(), config.clip_norm))
            clipped += norm > config.clip_norm
            norms.append(norm)
        opt.step()
        if step < total - 1:
            sched.step()
        loss_val = objective
        if step % 50 == 0:
            curve.append(loss_val)
            if progress is not None:
                progress(f"inverse-{mode}", step, total)
        step += 1
    if progress is not None:
        progress(f"inverse-{mode}", total, total)
    model.eval()
    for p in model.parameters():
        p.requires_grad_(False)
    mean_err, max_err = _inverse_errors(forward, model, meshes[check_idx], input_indices)
    report = InverseReport(
        mode=mode,
        mean_err=mean_err,
        max_err=max_err,
        mean_err_pct_diag=100.0 * mean_err / diag,
        final_loss=loss_val,
        steps=step,
        seconds=time.perf_counter() - t0,
        input_scale=scale,
        loss_curve=tuple(curve),
        clipped_steps=int(clipped),
        grad_norm_p50=float(np.median(norms)) if norms else 0.0,
        grad_norm_max=float(np.max(norms)) if norms else 0.0,
    )
    log.info(
        "inverse (%s): mean %.3g (%.3f%% diag), max %.3g, %d steps, %.1fs",
        mode,
        mean_err,
        report.mean_err_pct_diag,
        max_err,
        report.steps,
        report.seconds,
    )
    return model, report


def _augment(
    clean: torch.Tensor, sigma: float, jitter: float, wobble_bank: torch.Tensor | None
) -> torch.Tensor:
    """clean: (N, K, 3) input vertices -> one draw of the training's input noise on them: white
    noise of ``sigma`` per coordinate, a rigid shift of ``jitter`` and a smooth field from
    ``wobble_bank`` (K', K) when given."""
    noisy = clean + sigma * torch.randn(clean.shape[0], clean.shape[1], 3)
    if jitter > 0.0:
        noisy = noisy + jitter * torch.randn(clean.shape[0], 1, 3)
    if wobble_bank is not None:
        amp = torch.randn(clean.shape[0], wobble_bank.shape[0], 3)
        noisy = noisy + torch.einsum("kv,nkx->nvx", wobble_bank, amp)
    return noisy


def smooth_field_bank(
    points: np.ndarray, rms: float, seed: int, count: int = 48
) -> np.ndarray:
    """(count, K) float32 Gaussian-blob fields on points (K, 3) for the smooth-deformation
    augmentation: ``sum_k bank[k] * a_k`` with a_k ~ N(0, 1) per axis has RMS ``rms`` per
    coordinate over the points. Blob radii run from 10 % to 30 % of the points' bbox diagonal
    (a low-frequency model of capture drift; common practice, no published source)."""
    rng = np.random.default_rng(seed + 7919)
    pts = np.asarray(points, np.float64)
    d = diagonal(pts)
    centres = pts[rng.choice(pts.shape[0], size=count, replace=pts.shape[0] < count)]
    radii = d * rng.uniform(0.1, 0.3, size=count)
    dist2 = ((pts[None] - centres[:, None]) ** 2).sum(-1)  # (count, K)
    bank = np.exp(-0.5 * dist2 / radii[:, None] ** 2)
    var = float(np.mean((bank**2).sum(0)))  # per-coordinate variance with unit amplitudes
    return (bank * (rms / math.sqrt(max(var, 1e-30)))).astype(np.float32)


def loss_vertex_subset(
    meshes: np.ndarray, neutral: np.ndarray, count: int, seed: int
) -> np.ndarray:
    """(L,) sorted vertex indices for the training loss: all vertices if count is 0 or >= V, else
    ``count`` drawn uniformly (seeded) from those that move in the first 512 meshes (N, V, 3)."""
    v = neutral.shape[0]
    if count <= 0 or count >= v:
        return np.arange(v)
    moved = np.abs(np.asarray(meshes[:512], np.float32) - neutral[None]).max(axis=(0, 2)) > 0
    pool = np.flatnonzero(moved) if moved.sum() >= count else np.arange(v)
    return np.sort(np.random.default_rng(seed).choice(pool, size=count, replace=False))


def _region_weights(region_weights: np.ndarray | None, v: int) -> torch.Tensor:
    if region_weights is None:
        return torch.ones(v)
    w = np.asarray(region_weights, np.float64)
    if w.shape != (v,) or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise TrainError(
            f"region weights must be ({v},) finite, >= 0 and not all zero; got shape {w.shape}"
        )
    return torch.from_numpy((w / w.mean()).astype(np.float32))


@torch.no_grad()
def _inverse_errors(
    forward: ForwardApproximator,
    inverse: InverseNetwork,
    meshes: np.ndarray,
    input_indices: np.ndarray,
) -> tuple[float, float]:
    """Mean and max vertex error of forward(inverse(x)) against x, over meshes (N, V, 3)."""
    errs = []
    for s in range(0, meshes.shape[0], 512):
        x = torch.from_numpy(np.array(meshes[s : s + 512], np.float32, copy=True))
        pred = forward(inverse(x[:, torch.as_tensor(input_indices)]))
        errs.append(vertex_errors(pred.numpy(), x.numpy()))
    e = np.concatenate(errs)
    return float(e.mean()), float(e.max())
