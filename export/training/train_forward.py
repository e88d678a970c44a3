"""The forward approximator (controls -> mesh), trained on the rig's samples.

1. hold out a fraction of the samples for the report;
2. fit the linear blendshape layer by least squares on normalised controls (exact for linear rigs);
3. PCA of the linear residual (randomised SVD, Halko, Martinsson & Tropp 2011, algorithm 4.4);
4. train the correction MLP on the residual's PCA coefficients. Because the basis is orthonormal,
   squared error on coefficients equals squared mesh error within the basis, and it is far cheaper
   than a loss over all 3V coordinates.

The MLP trains on inputs with the rest pose at the origin, ``x = a (u - r)`` (``input_scale`` a;
r each control's median, its default in sparse samples) and on targets in units of their RMS; both
maps are then folded into its first and last layers (``fold_input_map``), so the exported model
still takes u and gives the coefficients. Measured on the lantern arm (linear blend skinning, where
the MLP carries nearly everything, 16,000 sparse samples): at 60 epochs centring the inputs halved
the held-out mean error; lr 1e-2 (was 3e-3) and 150 epochs (was 40) took it from 0.79 % to about
0.1 % of the diagonal. Centring on the rest pose, not on u = 0.5, is what keeps the demo face (rest
at u = 0) stable at lr 1e-2. Common practice (zero-centred inputs and unit-scale targets), no
source for a = 2 and the schedule.

Adam with a one-cycle schedule, fixed seeds, two torch threads (the machine is shared).
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from rigcast.export.training.kinematic import KinematicChain, chain_from_anchors
from rigcast.export.training.models import ForwardApproximator
from rigcast.export.training.train_common import (
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

#: The kinematic chain's output layer's learning rate, as a share of the MLP's: it starts from
#: least squares on the chain's features, so it is only polished.
CHAIN_LR = 0.1


@dataclass(frozen=True)
class ForwardConfig:
    hidden: tuple[int, ...] = (256, 256, 256)
    components: int = 96
    epochs: int = 150
    batch: int = 512
    lr: float = 1e-2
    holdout: float = 0.1
    seed: int = 0
    # A time budget (None: the fixed schedule, so a build gives the same bundle on a busy
    # machine as on a quiet one). When set, the schedule is cut to fit and the log says so.
    max_seconds: float | None = None
    # "anchored": the linear layer is each control's own effect alone (through the rest pose
    # and each control at its far bound, from ``anchors``); "lsq": least squares on the samples.
    # Least squares folds the average of every corrective a control takes part in into its
    # own shape, so alone the forward model overstated it: on the demo face five expressions
    # came back 6-8 % short of a full activation, and the fit preferred that to the truth.
    linear: str = "anchored"
    # a in x = a (2u - 1), the correction MLP's training input (see the module docstring).
    input_scale: float = 2.0
    # A learned kinematic chain beside the MLP (export/training/kinematic.py). Only controls
    # whose anchor pose turns the mesh rigidly join it (``kinematic.RIGID_TOL``): on a
    # blendshape rig none does and the model is the MLP's alone, bit for bit (the demo face,
    # face-linear and the zoo's blendshape, corrective and jaw-face kinds join none). Lantern
    # arm (12 skinned joints' angles): forward error 0.121 -> 0.0009 % of D; with the
    # refinement that differentiates the chain (4234c26), noise-free held-out poses' mean
    # error 2.8e-3 -> 9.8e-4 and false activity 0.57 -> 0.11 controls per pose (the lead's
    # figures on a cached build; a full bench A/B at one commit is still to be run). Zoo
    # chain rigs, forward held-out mean % of D (4000 samples, 40 epochs, f2f55de): seed 48
    # (2 tubes, 18 angles, 14 in the chain) 0.212 -> 0.053 (one serial chain through both
    # tubes: 0.205), seed 80 (3 tubes on a hub, 10 angles) 0.047 -> 0.0013. A twist (about a
    # tube's own axis) joins as a further angle of its joint, and each joint's angles compose
    # in the order the samples show (export/training/joint_fit.py): zoo-236895 (22 joints x 3
    # angles) the chain alone by least squares, held-out mean 0.196 -> 0.028 % of D (its
    # 96-component basis's floor). The whole forward model at these settings (16,000 samples,
    # /tmp/helper-32/fwd_only.py), held-out mean: zoo-236895 3.2e-3 -> 7.3e-4 (0.12 -> 0.028 %),
    # zoo-294487 1.6e-5 -> 5.7e-6 (0.0006 -> 0.0002 %).
    chain: bool = True



@dataclass(frozen=True)
class ForwardReport:
    """Held-out vertex errors, in mesh units and as % of the neutral's bounding-box diagonal."""

    mean_err: float
    max_err: float
    mean_err_pct_diag: float
    max_err_pct_diag: float
    linear_only_mean_err: float
    holdout_count: int
    seconds: float



def randomized_pca(
    x: np.ndarray, k: int, seed: int = 0, oversample: int = 10, power: int = 3
) -> np.ndarray:
    """Top-k right singular vectors of x (uncentred), by randomised subspace iteration.

    x: (N, D) -> (k', D) orthonormal rows, k' = min(k, N, D). Halko, Martinsson & Tropp (2011),
    "Finding structure with randomness", algorithms 4.4 (subspace iteration) and 5.1.
    """
    n, d = x.shape
    k = min(k, n, d)
    rng = np.random.default_rng(seed)
    a = np.asarray(x, np.float32)
    q = np.linalg.qr(a @ rng.standard_normal((d, k + oversample)).astype(np.float32))[0]
    for _ in range(power):
        q = np.linalg.qr(a.T @ q)[0]
        q = np.linalg.qr(a @ q)[0]
    b = q.T @ a  # (k + p, D)
    _, _, vt = np.linalg.svd(b.astype(np.float64), full_matrices=False)
    return vt[:k].astype(np.float32)


def randomized_pca_naive(x: np.ndarray, k: int) -> np.ndarray:
    """Exact twin of ``randomized_pca``: full SVD, top-k right singular vectors."""
    _, _, vt = np.linalg.svd(np.asarray(x, np.float64), full_matrices=False)
    return vt[: min(k, *x.shape)]


def fold_input_map(first: torch.nn.Linear, scale: float, rest: torch.Tensor) -> None:
    """Fold x = scale (u - rest) into the layer ``first`` (weight (H, C), bias (H,)); rest: (C,).
    In place: afterwards first(u) equals the old first(x), i.e. W' = scale W, b' = b - W' rest."""
    with torch.no_grad():
        first.weight.mul_(scale)
        first.bias.sub_(first.weight @ rest.to(first.weight.dtype))


def fit_linear(
    u: np.ndarray, offsets: np.ndarray, ridge: float = 1e-6
) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares affine map from normalised controls to flat offsets.

    u: (N, C); offsets: (N, D) -> weight (C, D), bias (D,) minimising |[u 1] [W; b] - offsets|^2
    (normal equations, a tiny ridge for controls the data never moves).
    """
    n, c = u.shape
    a = np.concatenate([u, np.ones((n, 1), np.float32)], axis=1).astype(np.float32)
    ata = (a.T.astype(np.float64) @ a.astype(np.float64)) + ridge * n * np.eye(c + 1)
    aty = np.zeros((c + 1, offsets.shape[1]), np.float64)
    for s in range(0, n, 4096):
        aty += (a[s : s + 4096].T @ offsets[s : s + 4096]).astype(np.float64)
    sol = np.linalg.solve(ata, aty).astype(np.float32)
    return sol[:c], sol[c]



def fit_anchored(u: np.ndarray, offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The affine map through anchor poses: u (C + 1, C) normalised controls, the rest pose
    then each control alone moved from it (``sampling.anchor_poses``); offsets (C + 1, D).
    -> weight (C, D), bias (D,) with [u_i 1] [W; b] = offsets_i exactly: W_c is control c's own
    effect per unit of u, b makes the rest pose exact. A control that does not move gets 0."""
    d = u[0].astype(np.float64)
    step = np.diagonal(u[1:]).astype(np.float64) - d  # (C,) how far each anchor moved
    delta = offsets[1:].astype(np.float64) - offsets[0].astype(np.float64)  # (C, D)
    safe = np.abs(step) > 1e-12
    weight = np.where(safe[:, None], delta / np.where(safe, step, 1.0)[:, None], 0.0)
    bias = offsets[0].astype(np.float64) - d @ weight
    return weight.astype(np.float32), bias.astype(np.float32)


def train_forward(
    controls: np.ndarray,
    vertices: np.ndarray,
    neutral: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    config: ForwardConfig = ForwardConfig(),
    progress: Progress | None = None,
    anchors: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[ForwardApproximator, ForwardReport]:
    """Fit a ForwardApproximator on samples.

    controls: (N, C); vertices: (N, V, 3); neutral: (V, 3); lower, upper: (C,); anchors:
    (controls (C + 1, C) from ``sampling.anchor_poses``, their vertices (C + 1, V, 3)) for the
    anchored linear layer (least squares without them). The anchors also join the samples the
    correction trains on.
    """
    t0 = time.perf_counter()
    torch.set_num_threads(TORCH_THREADS)
    torch.manual_seed(config.seed)
    n, v = vertices.shape[0], vertices.shape[1]
    if controls.shape[0] != n or n < 2:
        raise TrainError(
            f"need matching controls and vertices with N >= 2, got {controls.shape} "
            f"and {vertices.shape}"
        )
    lo, hi = np.asarray(lower, np.float32), np.asarray(upper, np.float32)
    u_all = ((np.asarray(controls, np.float32) - lo) / (hi - lo)).astype(np.float32)
    train_idx, hold_idx = split_holdout(n, config.holdout, config.seed)
    flat_neutral = np.asarray(neutral, np.float32).reshape(1, v * 3)
    offs = (vertices[train_idx].reshape(-1, v * 3) - flat_neutral).astype(np.float32)
    u = u_all[train_idx]
    ua: np.ndarray | None = None
    if anchors is not None:
        ua = ((np.asarray(anchors[0], np.float32) - lo) / (hi - lo)).astype(np.float32)
        oa = (np.asarray(anchors[1], np.float32).reshape(-1, v * 3) - flat_neutral)
    if ua is not None and config.linear == "anchored":
        weight, bias = fit_anchored(ua, oa)
        u = np.concatenate([u, ua])
        offs = np.concatenate([offs, oa.astype(np.float32)])
    else:
        weight, bias = fit_linear(u, offs)
    offs -= u @ weight + bias  # residual, in place
    rng = np.random.default_rng(config.seed)
    sub = rng.choice(offs.shape[0], size=min(offs.shape[0], 6000), replace=False)
    basis = randomized_pca(offs[sub], config.components, seed=config.seed)
    targets = (offs @ basis.T).astype(np.float32)  # (N_train, P) residual coefficients
    del offs
    chain = None
    if config.chain and ua is not None and basis.shape[0] > 0:
        rows = train_idx  # the samples' vertices, read only for the rows the chain asks for
        chain = chain_from_anchors(ua, oa, np.asarray(neutral, np.float32),
                                   np.median(u, axis=0), basis.shape[0], seed=config.seed,
                                   samples=(u_all[rows], lambda r: vertices[rows[r]]))
    model = ForwardApproximator(neutral, lo, hi, weight, bias, basis, hidden=config.hidden,
                                chain=chain)
    if model.correction is not None:
        _fit_coefficients(model, u, targets, config, progress)
    model.eval()
    for p in model.parameters():
        p.requires_grad_(False)
    report = _forward_report(
        model, controls[hold_idx], vertices[hold_idx], neutral, weight, bias, lo, hi, t0
    )
    log.info(
        "forward: held-out mean %.3g (%.3f%% diag), max %.3g (%.3f%% diag), "
        "linear-only mean %.3g, %.1fs",
        report.mean_err,
        report.mean_err_pct_diag,
        report.max_err,
        report.max_err_pct_diag,
        report.linear_only_mean_err,
        report.seconds,
    )
    return model, report


def _fit_coefficients(
    model: ForwardApproximator,
    u: np.ndarray,
    targets: np.ndarray,
    config: ForwardConfig,
    progress: Progress | None,
) -> None:
    assert model.correction is not None
    scale = float(config.input_scale)
    if not scale > 0.0 or not math.isfinite(scale):
        raise TrainError(f"forward input_scale must be a positive finite number, got {scale!r}")
    # Targets in units of their RMS, so the schedule behaves the same whatever the residual's
    # size (a near-linear rig's residual of 1e-6 is otherwise buried under the MLP's start-up
    # noise); the RMS goes back into the last layer after training.
    rms = float(np.sqrt(np.mean(np.square(targets, dtype=np.float64))))
    unit = rms if rms > 0.0 and math.isfinite(rms) else 1.0
    # The rest pose at the input's origin: each control's median, its default in sparse samples.
    rest = torch.from_numpy(np.median(u, axis=0).astype(np.float32))
    uc = torch.from_numpy(u)
    ut = scale * (uc - rest)
    tt = torch.from_numpy((targets / unit).astype(np.float32))
    n = ut.shape[0]
    per_epoch = max(1, math.ceil(n / config.batch))
    total = per_epoch * config.epochs
    groups: list[dict[str, Any]] = [{"params": list(model.correction.parameters()),
                                     "lr": config.lr}]
    peaks = [config.lr]
    feats = torch.zeros((n, 0))
    if model.chain is not None:
        # The geometry stays as the anchors' rotation fits found it, so the chain's features
        # are computed once and the chain costs a linear layer per step (training it too cost
        # 4x the step time and no accuracy on the lantern arm).
        with torch.no_grad():
            feats = model.chain.features(uc)
        _start_chain_output(model.chain, feats, tt)
        groups.append({"params": list(model.chain.out.parameters()),
                       "lr": CHAIN_LR * config.lr})
        peaks.append(CHAIN_LR * config.lr)
    opt = torch.optim.Adam(groups, lr=config.lr)
    sched = one_cycle(opt, peaks, total)
    gen = torch.Generator().manual_seed(config.seed)
    start, step, epochs = time.perf_counter(), 0, config.epochs
    model.train()
    epoch = 0
    while epoch < epochs:
        if epoch == 1 and config.max_seconds is not None:
            epochs = fit_budget(epochs, 1, time.perf_counter() - start, config.max_seconds)
            if epochs != config.epochs:
                log.warning("forward: the %.0fs time budget cut training to %d of %d epochs",
                            config.max_seconds, epochs, config.epochs)
                total = per_epoch * epochs
                sched = one_cycle(opt, peaks, total - step)
        perm = torch.randperm(n, generator=gen)
        for b in range(per_epoch):
            idx = perm[b * config.batch : (b + 1) * config.batch]
            pred = model.correction(ut[idx])
            if model.chain is not None:
                pred = pred + model.chain.out(feats[idx])
            loss = F.mse_loss(pred, tt[idx])
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            if step < total - 1:
                sched.step()
            step += 1
        epoch += 1
        if progress is not None:
            progress("forward", epoch, epochs)
    first, last = model.correction[0], model.correction[-1]
    assert isinstance(first, torch.nn.Linear) and isinstance(last, torch.nn.Linear)
    fold_input_map(first, scale, rest)
    with torch.no_grad():
        for out in [last] + ([model.chain.out] if model.chain is not None else []):
            out.weight.mul_(unit)
            out.bias.mul_(unit)
    log.debug("forward: final coefficient mse %.3g", unit * unit * float(loss.detach()))


@torch.no_grad()
def _start_chain_output(chain: KinematicChain, features: torch.Tensor, targets: torch.Tensor,
                        ridge: float = 1e-6) -> None:
    """The chain's output layer by least squares on its features (N, 12J) at the geometry
    found from the anchors; targets (N, P). The mesh is linear in the joints' transforms, so
    on a skinned chain this is nearly the whole residual before any step."""
    feats = torch.cat([features, torch.ones(features.shape[0], 1)], dim=1).double()
    gram = feats.T @ feats
    gram += ridge * float(gram.diagonal().mean()) * torch.eye(gram.shape[0], dtype=gram.dtype)
    sol = torch.linalg.solve(gram, feats.T @ targets.double())
    chain.out.weight.copy_(sol[:-1].T.float())
    chain.out.bias.copy_(sol[-1].float())


@torch.no_grad()
def _forward_report(
    model: ForwardApproximator,
    controls: np.ndarray,
    vertices: np.ndarray,
    neutral: np.ndarray,
    weight: np.ndarray,
    bias: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    t0: float,
) -> ForwardReport:
    diag = diagonal(neutral)
    errs, lin_errs = [], []
    for s in range(0, controls.shape[0], 512):
        c = np.array(controls[s : s + 512], np.float32, copy=True)
        pred = model(torch.from_numpy(c)).numpy()
        errs.append(vertex_errors(pred, vertices[s : s + 512]))
        lin = neutral[None] + (((c - lo) / (hi - lo)) @ weight + bias).reshape(c.shape[0], -1, 3)
        lin_errs.append(vertex_errors(lin, vertices[s : s + 512]))
    e, le = np.concatenate(errs), np.concatenate(lin_errs)
    return ForwardReport(
        mean_err=float(e.mean()),
        max_err=float(e.max()),
        mean_err_pct_diag=100.0 * float(e.mean()) / diag,
        max_err_pct_diag=100.0 * float(e.max()) / diag,
        linear_only_mean_err=float(le.mean()),
        holdout_count=int(controls.shape[0]),
        seconds=time.perf_counter() - t0,
    )

