"""Batch solve: a whole take, mesh frames (T, V, 3) to controls (T, C), as fast as the CPU allows.

The stages are those of the live per-frame pipeline, run over all frames at once:

1. stabilise: batched Umeyama/Kabsch fit of every frame's stable vertices onto the neutral's
   (Umeyama, IEEE TPAMI 13(4), 1991), applied to the input vertices only;
2. batched onnxruntime inference of the inverse graph, sessions using all cores;
3. filter: the SAME causal One Euro filter as live (``OneEuroFilter``), or, since offline need not
   be causal, zero-phase smoothing (``zero_phase_smooth``), or none;
4. clamp to the schema's bounds;
5. optional fit error through the forward graph (batched), RMS and max in mesh units, per frame.
"""

from __future__ import annotations

import logging
import math
import os
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Literal

import numpy as np
from rigcast.runtime.align import fit_rigid
from rigcast.runtime.bundle import Bundle
from rigcast.runtime.inference import ForwardModel, InverseModel
from rigcast.runtime.one_euro import OneEuroFilter, OneEuroParams, zero_phase_smooth

log = logging.getLogger(__name__)

FilterKind = Literal["none", "causal", "zero_phase"]
FILTERS: tuple[str, ...] = ("none", "causal", "zero_phase")


class BatchError(ValueError):
    """A take or option the batch solve cannot use; the message names the bad value."""


@dataclass(frozen=True)
class BatchSolve:
    """Per-frame results of a batch solve.

    controls (T, C) float32 filtered and clamped; fit_rms, fit_max (T,) float32 mesh units (NaN
    when the fit error was not computed); off_manifold (T,) bool; align_rms (T,) float32 residual
    of the stabilisation (0 when off); seconds of wall time; frames_per_second = T / seconds.
    """

    controls: np.ndarray
    fit_rms: np.ndarray
    fit_max: np.ndarray
    off_manifold: np.ndarray
    align_rms: np.ndarray
    seconds: float
    frames_per_second: float


@dataclass(frozen=True)
class RigidBatch:
    """Per-frame similarity transforms ``y = scale * rotation @ x + translation``.

    rotation (T, 3, 3), translation (T, 3), scale (T,), mse (T,) mean squared residual; float64.
    """

    rotation: np.ndarray
    translation: np.ndarray
    scale: np.ndarray
    mse: np.ndarray

    def apply(self, points: np.ndarray) -> np.ndarray:
        """points (T, N, 3) -> (T, N, 3) float32."""
        m = (self.scale[:, None, None] * self.rotation).astype(np.float32)
        # out[t, n, i] = sum_j m[t, i, j] * points[t, n, j] + translation[t, i]
        out: np.ndarray = np.matmul(points.astype(np.float32, copy=False), m.transpose(0, 2, 1))
        out += self.translation.astype(np.float32)[:, None, :]
        return out


def fit_rigid_batch(source: np.ndarray, target: np.ndarray, *, scale: bool = False) -> RigidBatch:
    """Least-squares ``target ≈ s R source[t] + t`` for every frame at once (Umeyama 1991).

    source (T, S, 3) frames' stable vertices; target (S, 3) the neutral's. S >= 3.
    """
    src = np.asarray(source, dtype=np.float64)
    tgt = np.asarray(target, dtype=np.float64)
    if src.ndim != 3 or src.shape[1:] != tgt.shape or tgt.ndim != 2 or tgt.shape[1] != 3:
        raise BatchError(
            f"source must be (T, S, 3) and target (S, 3), got {src.shape} and {tgt.shape}"
        )
    if tgt.shape[0] < 3:
        raise BatchError(f"need at least 3 stable vertices, got {tgt.shape[0]}")
    n = tgt.shape[0]
    mu_s = src.mean(axis=1)  # (T, 3)
    mu_t = tgt.mean(axis=0)  # (3,)
    b = tgt - mu_t  # (S, 3); sum_n b[n] = 0, so centring the source is not needed in cov
    # cov[t, i, j] = (1/S) sum_n b[n, i] * src[t, n, j]
    cov = np.einsum("ni,tnj->tij", b, src) / n
    var_s = np.einsum("tnj,tnj->t", src, src) / n - np.einsum("tj,tj->t", mu_s, mu_s)
    var_t = float(np.einsum("ni,ni->", b, b)) / n
    u, d, vt = np.linalg.svd(cov)
    det = np.linalg.det(u @ vt)
    # Reflection correction (Umeyama eq. 39-40): flip the weakest axis where U V^T reflects.
    sign = np.where(det < 0.0, -1.0, 1.0)
    u[:, :, 2] *= sign[:, None]
    rotation = u @ vt
    trace_ds = d[:, 0] + d[:, 1] + sign * d[:, 2]
    if scale:
        if not np.all(var_s > 0.0):
            raise BatchError(f"stable vertices coincide in frame {int(np.argmin(var_s))}")
        s = trace_ds / var_s
        mse = var_t - trace_ds**2 / var_s
    else:
        s = np.ones(src.shape[0])
        mse = var_t + var_s - 2.0 * trace_ds
    translation = mu_t[None] - s[:, None] * np.einsum("tij,tj->ti", rotation, mu_s)
    return RigidBatch(rotation, translation, s, np.maximum(mse, 0.0))


def fit_rigid_batch_naive(source: np.ndarray, target: np.ndarray, *, scale: bool = False
                          ) -> RigidBatch:
    """Twin of fit_rigid_batch: the single-frame ``fit_rigid`` in a loop over frames."""
    fits = [fit_rigid(frame, target, scale=scale) for frame in np.asarray(source)]
    rot = np.stack([f.rotation for f in fits])
    trans = np.stack([f.translation for f in fits])
    sc = np.array([f.scale for f in fits])
    moved = np.stack([f.apply(np.asarray(fr, np.float64))
                      for f, fr in zip(fits, source, strict=True)])
    mse = ((moved - np.asarray(target, np.float64)[None]) ** 2).sum(-1).mean(-1)
    return RigidBatch(rot, trans, sc, mse)


def all_cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


def default_params(bundle: Bundle) -> OneEuroParams:
    """The live server's default One Euro settings (runtime/config.py StreamConfig)."""
    return OneEuroParams.uniform(bundle.control_count, min_cutoff=1.0, beta=0.5, d_cutoff=1.0)


def default_off_manifold(bundle: Bundle) -> float:
    """Fit-RMS threshold for off-manifold frames when none is given.

    3 x the training fit RMS when the manifest records one (as the live server does), else 1% of
    the neutral's bounding-box diagonal (a starting point of ours).
    """
    figures = bundle.manifest.get("training", {})
    fit = figures.get("inverse_fit_rms") if isinstance(figures, dict) else None
    if isinstance(fit, int | float) and math.isfinite(fit) and fit > 0:
        return 3.0 * float(fit)
    span = bundle.neutral.max(axis=0) - bundle.neutral.min(axis=0)
    return 0.01 * float(np.linalg.norm(span))


class BatchSolver:
    """A bundle's two sessions, opened once, for solving many takes."""

    def __init__(self, bundle: Bundle, *, threads: int | None = None) -> None:
        self.bundle = bundle
        self.threads = threads or all_cores()
        self.inverse = InverseModel(bundle, threads=self.threads)
        self._forward: ForwardModel | None = None
        self.neutral_stable = np.asarray(bundle.neutral[bundle.stable_indices], np.float64)

    @property
    def forward(self) -> ForwardModel:
        if self._forward is None:
            self._forward = ForwardModel(self.bundle, threads=self.threads)
        return self._forward

    def solve(
        self,
        vertices: np.ndarray,
        times_s: np.ndarray,
        *,
        stabilise: bool = True,
        stabilise_scale: bool = False,
        filter: FilterKind = "causal",
        params: OneEuroParams | None = None,
        gap_s: float = 0.25,
        smooth_hz: float = 3.0,
        batch_size: int = 1024,
        fit_error: bool = True,
        off_manifold_threshold: float | None = None,
    ) -> BatchSolve:
        """vertices (T, V, 3), times_s (T,) increasing seconds -> BatchSolve.

        ``params`` are the causal filter's (default: the live server's); ``gap_s`` resets it as
        live does; ``smooth_hz`` is the zero-phase smoother's cutoff.
        """
        start = time.perf_counter()
        verts, times = self._check(vertices, times_s, filter, batch_size)
        t = verts.shape[0]
        lo, hi = self.bundle.schema.lower, self.bundle.schema.upper
        starts = range(0, t, batch_size)
        idx_in, idx_st = self.bundle.input_indices, self.bundle.stable_indices

        def infer(i0: int) -> tuple[np.ndarray, RigidBatch | None]:
            chunk = verts[i0 : i0 + batch_size]
            inputs = np.take(chunk, idx_in, axis=1)
            fit = None
            if stabilise:
                fit = fit_rigid_batch(np.take(chunk, idx_st, axis=1), self.neutral_stable,
                                      scale=stabilise_scale)
                inputs = fit.apply(inputs)
            return self.inverse.solve(np.ascontiguousarray(inputs, np.float32)), fit

        # numpy and onnxruntime release the GIL, so chunks overlap on the cores.
        with ThreadPoolExecutor(max_workers=self.threads) as pool:
            solved = list(pool.map(infer, starts))
            raw = np.concatenate([r for r, _ in solved])
            rigid = [f for _, f in solved]
            align_rms = (np.concatenate([np.sqrt(f.mse) for f in rigid if f is not None])
                         if stabilise else np.zeros(t)).astype(np.float32)
            controls = self._filter(raw, times, filter, params, gap_s, smooth_hz)
            controls = np.clip(controls, lo, hi).astype(np.float32)
            fit_rms = np.full(t, np.nan, np.float32)
            fit_max = np.full(t, np.nan, np.float32)
            if fit_error:
                forward = self.forward

                def error(n: int) -> tuple[np.ndarray, np.ndarray]:
                    i0 = starts[n]
                    pred = forward.evaluate(controls[i0 : i0 + batch_size])
                    fit = rigid[n]
                    diff = fit.apply(verts[i0 : i0 + batch_size]) if fit is not None else (
                        verts[i0 : i0 + batch_size].copy())
                    diff -= pred
                    dist2 = np.einsum("bvx,bvx->bv", diff, diff)
                    return np.sqrt(dist2.mean(axis=1)), np.sqrt(dist2.max(axis=1))

                errs = list(pool.map(error, range(len(starts))))
                fit_rms[:] = np.concatenate([e[0] for e in errs])
                fit_max[:] = np.concatenate([e[1] for e in errs])
        threshold = off_manifold_threshold or default_off_manifold(self.bundle)
        off = np.asarray(fit_rms > threshold)  # NaN compares False: unknown is not flagged
        seconds = time.perf_counter() - start
        log.info("batch solve: %d frames in %.3f s (%.0f frames/s)", t, seconds, t / seconds)
        return BatchSolve(controls, fit_rms, fit_max, off, align_rms, seconds, t / seconds)

    def _check(self, vertices: np.ndarray, times_s: np.ndarray, filter: str, batch_size: int
               ) -> tuple[np.ndarray, np.ndarray]:
        verts = np.asarray(vertices)
        times = np.asarray(times_s, dtype=np.float64)
        v = self.bundle.vertex_count
        if verts.ndim != 3 or verts.shape[1:] != (v, 3):
            raise BatchError(f"take must be (T, {v}, 3) for bundle {self.bundle.name!r}, "
                             f"got {verts.shape}")
        if verts.shape[0] == 0:
            raise BatchError("take has no frames")
        if times.shape != (verts.shape[0],):
            raise BatchError(f"times_s must be ({verts.shape[0]},), got {times.shape}")
        if verts.shape[0] > 1 and not np.all(np.diff(times) > 0):
            raise BatchError("times_s must be strictly increasing")
        if filter not in FILTERS:
            raise BatchError(f"filter must be one of {FILTERS}, got {filter!r}")
        if batch_size < 1:
            raise BatchError(f"batch_size must be >= 1, got {batch_size}")
        finite = np.isfinite(verts.reshape(verts.shape[0], -1)).all(axis=1)
        if not finite.all():
            raise BatchError(f"frame {int(np.argmin(finite))} has NaN or Inf vertices")
        return verts.astype(np.float32, copy=False), times

    def _filter(self, raw: np.ndarray, times: np.ndarray, filter: str,
                params: OneEuroParams | None, gap_s: float, smooth_hz: float) -> np.ndarray:
        if filter == "none":
            return raw
        if filter == "zero_phase":
            return zero_phase_smooth(raw, times, smooth_hz)
        one_euro = OneEuroFilter(params or default_params(self.bundle),
                                 gap_ns=round(gap_s * 1e9))
        t_ns = np.round(times * 1e9).astype(np.int64)
        out = np.empty(raw.shape, np.float64)
        for i in range(raw.shape[0]):
            out[i] = one_euro(raw[i], int(t_ns[i]), i)
        return out


def solve_take(
    bundle: Bundle,
    vertices: np.ndarray,
    times_s: np.ndarray,
    *,
    stabilise: bool = True,
    stabilise_scale: bool = False,
    filter: FilterKind = "causal",
    params: OneEuroParams | None = None,
    gap_s: float = 0.25,
    smooth_hz: float = 3.0,
    batch_size: int = 1024,
    threads: int | None = None,
    fit_error: bool = True,
    off_manifold_threshold: float | None = None,
) -> BatchSolve:
    """One-shot batch solve; see ``BatchSolver.solve``. ``threads`` defaults to all cores."""
    return BatchSolver(bundle, threads=threads).solve(
        vertices, times_s, stabilise=stabilise, stabilise_scale=stabilise_scale, filter=filter,
        params=params, gap_s=gap_s, smooth_hz=smooth_hz, batch_size=batch_size,
        fit_error=fit_error, off_manifold_threshold=off_manifold_threshold,
    )
