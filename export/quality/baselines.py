"""The baselines the quality report compares rigcast's inverse against.

(a) Bounded linear least squares: the rig linearised at its default pose by finite differences
    through the real rig, each frame solved by ``scipy.optimize.lsq_linear`` within the bounds.
    It is the exact optimum for a linear rig.
(b) Bounded per-frame non-linear least squares through the REAL rig (``solve_nlls``):
    ``scipy.optimize.least_squares`` (trust-region reflective, bounds = the schema's), each frame
    warm-started from the previous frame's solution, with a forward-difference Jacobian from one
    batched ``rig.evaluate`` of C + 1 probes. The best a per-frame solver can do.
(c) Per-frame gradient optimisation through the trained forward approximator: projected Adam on
    the controls (scaled to [0, 1] by range), from the defaults, a fixed number of steps, all frames
    of a take in one batch since they are independent. This is the "optimise each frame" approach
    that rigcast replaces.

torch is imported inside ``optimise_frames`` only, so importing this module stays cheap.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.errors import RigcastError
from scipy.optimize import least_squares, lsq_linear

log = logging.getLogger(__name__)


class BaselineError(RigcastError, ValueError):
    """A baseline was given inconsistent inputs; the message names the bad value."""

    advice = "give the baseline a take and controls of the same rig"


@dataclass(frozen=True)
class LinearisedRig:
    """f(w) ~= base + jacobian @ (w - at), vertices flattened to V*3.

    at: (C,) float64; base: (V*3,) float64; jacobian: (V*3, C) float64; seconds to build.
    """

    at: np.ndarray
    base: np.ndarray
    jacobian: np.ndarray
    seconds: float


@dataclass(frozen=True)
class Solve:
    """controls: (T, C) float32; seconds: solve time for the take; per_frame_s = seconds / T."""

    controls: np.ndarray
    seconds: float
    per_frame_s: float
    loss_history: tuple[float, ...] = ()


def linearise_rig(
    rig: Rig, *, rel_step: float = 0.01, at: np.ndarray | None = None
) -> LinearisedRig:
    """Forward differences through the real rig: J[:, i] = (f(a + h_i e_i) - f(a)) / h_i.

    h_i = rel_step * range_i, signed toward the inside of the bounds (defaults often sit on a
    bound). ``at`` defaults to the schema's defaults.
    """
    if not 0.0 < rel_step <= 0.5:
        raise BaselineError(f"rel_step must be in (0, 0.5], got {rel_step}")
    t0 = time.perf_counter()
    lo = rig.schema.lower.astype(np.float64)
    hi = rig.schema.upper.astype(np.float64)
    a = rig.schema.defaults.astype(np.float64) if at is None else np.asarray(at, dtype=np.float64)
    c = a.shape[0]
    h = rel_step * (hi - lo)
    h = np.where(a + h <= hi, h, -h)
    probes = np.repeat(a[None], c + 1, axis=0)
    probes[1:] += np.diag(h)
    out = rig.evaluate(probes).astype(np.float64).reshape(c + 1, -1)
    base = out[0]
    jac = ((out[1:] - base) / h[:, None]).T
    seconds = time.perf_counter() - t0
    log.info(
        "linearised rig %s: %d controls, %d coordinates, %.2fs", rig.name, c, base.size, seconds
    )
    return LinearisedRig(at=a, base=base, jacobian=jac, seconds=seconds)


def solve_lsq(
    lin: LinearisedRig, observed: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> Solve:
    """observed: (T, V, 3) -> bounded least-squares controls (T, C) per frame.

    Minimises ||J w - (y - base + J at)||^2 over lower <= w <= upper with scipy's lsq_linear. J is
    reduced once by a thin QR (J = Q R, so ||J w - b|| = ||R w - Q^T b|| up to a constant), which
    leaves the minimiser unchanged and makes each frame's problem C x C.
    """
    y = np.asarray(observed, dtype=np.float64)
    t = y.shape[0]
    y = y.reshape(t, -1)
    if y.shape[1] != lin.base.shape[0]:
        raise BaselineError(
            f"observed frames have {y.shape[1] // 3} vertices, "
            f"the linearised rig {lin.base.size // 3}"
        )
    lo, hi = np.asarray(lower, dtype=np.float64), np.asarray(upper, dtype=np.float64)
    t0 = time.perf_counter()
    q, r = np.linalg.qr(lin.jacobian, mode="reduced")
    # rhs[t] = Q^T (y[t] - base + J at)
    rhs = (y - lin.base + lin.jacobian @ lin.at) @ q
    out = np.empty((t, lo.shape[0]))
    for i in range(t):
        out[i] = lsq_linear(r, rhs[i], bounds=(lo, hi), method="bvls").x
    seconds = time.perf_counter() - t0
    return Solve(
        controls=np.clip(out, lo, hi).astype(np.float32), seconds=seconds, per_frame_s=seconds / t
    )


def solve_lsq_naive(
    lin: LinearisedRig, observed: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> np.ndarray:
    """Twin of ``solve_lsq`` without the QR reduction: lsq_linear on the full (V*3, C) system."""
    y = np.asarray(observed, dtype=np.float64).reshape(observed.shape[0], -1)
    b = y - lin.base + lin.jacobian @ lin.at
    lo, hi = np.asarray(lower, dtype=np.float64), np.asarray(upper, dtype=np.float64)
    return np.stack([lsq_linear(lin.jacobian, bi, bounds=(lo, hi), method="bvls").x for bi in b])


def fd_jacobian(rig: Rig, x: np.ndarray, rel_step: float) -> tuple[np.ndarray, np.ndarray]:
    """Forward differences through the rig at ``x`` (C,), in ONE batched evaluation of the C + 1
    probes x, x + h_1 e_1, ..., x + h_C e_C; h_i = rel_step * range_i, signed toward the inside
    of the bounds. returns (f(x) (V*3,), J (V*3, C)) in float64."""
    lo = rig.schema.lower.astype(np.float64)
    hi = rig.schema.upper.astype(np.float64)
    h = rel_step * (hi - lo)
    h = np.where(x + h <= hi, h, -h)
    probes = np.repeat(x[None], x.shape[0] + 1, axis=0)
    probes[1:] += np.diag(h)
    out = rig.evaluate(probes).astype(np.float64).reshape(x.shape[0] + 1, -1)
    return out[0], ((out[1:] - out[0]) / h[:, None]).T


def solve_nlls(
    rig: Rig,
    observed: np.ndarray,
    *,
    warm_start: bool = True,
    rel_step: float = 1e-3,
    max_nfev: int = 30,
    ftol: float = 1e-5,
    tr_solver: str = "lsmr",
    progress: Callable[[int, int], None] | None = None,
) -> Solve:
    """Bounded per-frame non-linear least squares through the real rig.

    observed: (T, V, 3) -> controls (T, C): for each frame, argmin ||rig(w) - y_t||^2 over the
    schema's bounds with ``scipy.optimize.least_squares(method="trf")``, the variables scaled by
    each control's range. Frame t starts from frame t - 1's solution (``warm_start``; else from
    the defaults, for independent poses); frame 0 from the defaults. The Jacobian is
    ``fd_jacobian`` (one batched rig evaluation per Jacobian). ``progress(done, total)`` is called
    every 25 frames.

    Defaults, measured on the demo face (46 controls, 3,714 vertices, 12 frames of a noisy take):
    trust-region steps by LSMR (``tr_solver="lsmr"``) cost a third of the SVD ones at the same
    error; with scipy's ``ftol=1e-8`` a frame took 27 evaluations, with 1e-6 12.5 and with 1e-4
    5.7, at the same mean error against the clean mesh (1.108e-3, 1.111e-3, 1.106e-3); 1e-5 sits
    between. On noise-free poses the cost keeps falling by far more than that share, so they are
    solved to the float32 rig's rounding (tests/test_baselines.py).
    """
    if not 0.0 < rel_step <= 0.1:
        raise BaselineError(f"rel_step must be in (0, 0.1], got {rel_step}")
    if max_nfev < 1:
        raise BaselineError(f"max_nfev must be at least 1, got {max_nfev}")
    y = np.asarray(observed, dtype=np.float64)
    if y.ndim != 3 or y.shape[1:] != (rig.vertex_count, 3):
        raise BaselineError(
            f"observed must be (T, {rig.vertex_count}, 3) for rig {rig.name!r}, got {y.shape}"
        )
    s = rig.schema
    lo, hi = s.lower.astype(np.float64), s.upper.astype(np.float64)
    defaults = np.clip(s.defaults.astype(np.float64), lo, hi)
    t = y.shape[0]
    out = np.empty((t, lo.shape[0]))
    x = defaults
    t0 = time.perf_counter()
    for i in range(t):
        target = y[i].reshape(-1)

        def residual(w: np.ndarray, target: np.ndarray = target) -> np.ndarray:
            return rig.evaluate(w[None]).astype(np.float64).reshape(-1) - target

        def jacobian(w: np.ndarray) -> np.ndarray:
            return fd_jacobian(rig, w, rel_step)[1]

        start = x if warm_start else defaults
        fit = least_squares(residual, start, jac=jacobian, bounds=(lo, hi), method="trf",
                            x_scale=hi - lo, max_nfev=max_nfev, ftol=ftol,
                            tr_solver=tr_solver)
        x = np.clip(fit.x, lo, hi)
        out[i] = x
        if progress is not None and ((i + 1) % 25 == 0 or i + 1 == t):
            progress(i + 1, t)
    seconds = time.perf_counter() - t0
    log.info("non-linear least squares: %d frames in %.1fs", t, seconds)
    return Solve(controls=out.astype(np.float32), seconds=seconds, per_frame_s=seconds / max(t, 1))


def optimise_frames(
    forward: Callable[[Any], Any],
    observed: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    defaults: np.ndarray,
    *,
    steps: int = 250,
    lr: float = 0.02,
    chunk: int = 256,
) -> Solve:
    """Per-frame projected Adam on the controls through a differentiable forward model.

    forward: torch callable, controls (N, C) float32 tensor -> vertices (N, V, 3) tensor.
    observed: (T, V, 3). Each frame starts from ``defaults`` and minimises its own mean squared
    vertex error; the parameter is u = (w - lower) / range, clamped to [0, 1] after every step
    (projected gradient, common practice for box constraints). Frames are optimised ``chunk`` at a
    time; the loss of each frame does not depend on the others, so batching changes nothing.
    """
    import torch

    if steps < 1:
        raise BaselineError(f"steps must be at least 1, got {steps}")
    y_all = torch.as_tensor(np.asarray(observed, dtype=np.float32))
    lo = torch.as_tensor(np.asarray(lower, dtype=np.float32))
    span = torch.as_tensor(np.asarray(upper, dtype=np.float32)) - lo
    u0 = (torch.as_tensor(np.asarray(defaults, dtype=np.float32)) - lo) / span
    outs: list[np.ndarray] = []
    history = np.zeros(steps)
    t0 = time.perf_counter()
    for s in range(0, y_all.shape[0], chunk):
        y = y_all[s : s + chunk]
        u = u0.repeat(y.shape[0], 1).clone().requires_grad_(True)
        opt = torch.optim.Adam([u], lr=lr)
        for k in range(steps):
            pred = forward(lo + span * u)
            # Sum over frames of each frame's mean: frames stay independent under Adam.
            loss = ((pred - y) ** 2).sum(dim=-1).mean(dim=-1).sum()
            # Gradient for u only; the forward model's weights stay untouched.
            (u.grad,) = torch.autograd.grad(loss, [u])
            opt.step()
            with torch.no_grad():
                u.clamp_(0.0, 1.0)
            history[k] += float(loss.detach())
        outs.append((lo + span * u.detach()).numpy())
    seconds = time.perf_counter() - t0
    t = int(y_all.shape[0])
    controls = np.concatenate(outs).astype(np.float32)
    log.info("per-frame optimisation: %d frames x %d steps in %.1fs", t, steps, seconds)
    return Solve(
        controls=controls,
        seconds=seconds,
        per_frame_s=seconds / t,
        loss_history=tuple(float(v) / t for v in history),
    )
