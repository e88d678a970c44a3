"""Batch solve: a whole take, mesh frames (T, V, 3) to controls (T, C), as fast as the CPU allows.

The stages are those of the live per-frame pipeline, run over all frames at once:

1. stabilise: batched Umeyama/Kabsch fit of every frame's stable vertices onto the neutral's
   (Umeyama, IEEE TPAMI 13(4), 1991), applied to the input vertices only;
2. batched onnxruntime inference of the inverse graph, sessions using all cores;
3. filter: the SAME causal One Euro filter as live (``OneEuroFilter``, here ``one_euro_series``),
   or, since offline need not be causal, zero-phase smoothing (``zero_phase_smooth``), or none;
4. clamp to the schema's bounds;
5. fit error through the forward graph (batched), RMS and max in mesh units, per frame: on a
   subset of the vertices by default (``fit_subset``: the input and stable vertices plus a fixed
   random sample, with a stratified RMS estimate), on all of them, or off;
6. off-manifold flags: the adaptive threshold of ``runtime.manifold`` on each frame's max vertex
   error (running median + k MAD, floored by the bundle's training fit error), or a fixed one.
"""

from __future__ import annotations

import logging
import math
import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Literal

import numpy as np
import onnxruntime as ort
from rigcast.runtime.align import fit_rigid
from rigcast.runtime.bundle import FORWARD_INPUT, FORWARD_OUTPUT, Bundle
from rigcast.runtime.config import filter_defaults
from rigcast.runtime.inference import ForwardModel, InverseModel, open_session
from rigcast.runtime.manifold import ManifoldConfig, floor_for_bundle, off_manifold_thresholds
from rigcast.runtime.one_euro import OneEuroParams, OneEuroState, zero_phase_smooth
from rigcast.runtime.pipeline import stabilise_for

log = logging.getLogger(__name__)

FilterKind = Literal["none", "causal", "zero_phase"]
FILTERS: tuple[str, ...] = ("none", "causal", "zero_phase")
FitErrorMode = Literal["full", "subset", "off"]
FIT_ERROR_MODES: tuple[str, ...] = ("subset", "full", "off")
FIT_SLICE = 128  # frames per forward-model call in the fit error


class BatchError(ValueError):
    """A take or option the batch solve cannot use; the message names the bad value."""


@dataclass(frozen=True)
class BatchSolve:
    """Per-frame results of a batch solve.

    controls (T, C) float32 filtered and clamped; fit_rms, fit_max (T,) float32 mesh units (NaN
    when the fit error was not computed); off_manifold (T,) bool, fit_max above thresholds (T,)
    (NaN when not computed, inf during the detector's warm-up); align_rms (T,) float32 residual
    of the stabilisation (0 when off); seconds of wall time; frames_per_second = T / seconds;
    fit_error the mode used ("subset", "full", "off") and fit_vertices how many vertices it read.
    """

    controls: np.ndarray
    fit_rms: np.ndarray
    fit_max: np.ndarray
    off_manifold: np.ndarray
    thresholds: np.ndarray
    align_rms: np.ndarray
    seconds: float
    frames_per_second: float
    fit_error: str
    fit_vertices: int


@dataclass(frozen=True)
class RigidBatch:
    """Per-frame similarity transforms ``y = scale * rotation @ x + translation``.

    rotation (T, 3, 3), translation (T, 3), scale (T,), mse (T,) mean squared residual; float64.
    """

    rotation: np.ndarray
    translation: np.ndarray
    scale: np.ndarray
    mse: np.ndarray

    def frames(self, start: int, stop: int) -> RigidBatch:
        """The transforms of frames ``start:stop``."""
        sl = slice(start, stop)
        return RigidBatch(self.rotation[sl], self.translation[sl], self.scale[sl], self.mse[sl])

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
    """The live server's default One Euro settings, with beta per unit of each control's range."""
    return filter_params(bundle, *filter_defaults())


def filter_params(bundle: Bundle, min_cutoff: float, beta: float,
                  d_cutoff: float = 1.0) -> OneEuroParams:
    """Uniform One Euro settings for a bundle's controls; beta per unit of each control's range,
    as on the live server."""
    schema = bundle.schema
    return OneEuroParams.uniform(bundle.control_count, min_cutoff, beta, d_cutoff
                                 ).per_unit_range(schema.upper - schema.lower)


@dataclass(frozen=True)
class SolveOptions:
    """How a take is solved; validated here, once.

    stabilise / stabilise_scale: remove rigid (or similarity) head motion first; stabilise None
    follows the bundle (on only when its build found a rigid region; ``pipeline.stabilise_for``).
    filter: "causal" (the live server's One Euro; ``params``, default the server's, reset after a
    gap of more than ``gap_s`` seconds), "zero_phase" (offline, no lag; cutoff ``smooth_hz``) or
    "none". batch_size: frames per onnxruntime call.
    fit_error: "subset" (default; on the vertices of ``fit_subset``: the inverse's input and
    stable vertices plus ``fit_sample`` others drawn once with a fixed seed), "full" (every
    vertex) or "off".
    off_manifold_threshold: a fixed threshold on the frame's max vertex error instead of the
    adaptive one; manifold: the adaptive detector's settings (None: defaults, with the bundle's
    floor from ``manifold.floor_for_bundle``).
    """

    stabilise: bool | None = None
    stabilise_scale: bool = False
    filter: FilterKind = "causal"
    params: OneEuroParams | None = None
    gap_s: float = 0.25
    smooth_hz: float = 3.0
    batch_size: int = 1024
    fit_error: FitErrorMode = "subset"
    fit_sample: int = 512
    off_manifold_threshold: float | None = None
    manifold: ManifoldConfig | None = None

    def __post_init__(self) -> None:
        if self.filter not in FILTERS:
            raise BatchError(f"filter must be one of {FILTERS}, got {self.filter!r}")
        if self.fit_error not in FIT_ERROR_MODES:
            raise BatchError(f"fit_error must be one of {FIT_ERROR_MODES}, got {self.fit_error!r}")
        if not isinstance(self.batch_size, int) or self.batch_size < 1:
            raise BatchError(f"batch_size must be an integer >= 1, got {self.batch_size!r}")
        if not isinstance(self.fit_sample, int) or self.fit_sample < 0:
            raise BatchError(f"fit_sample must be an integer >= 0, got {self.fit_sample!r}")
        for name in ("gap_s", "smooth_hz"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise BatchError(f"{name} must be finite and > 0, got {value!r}")
        thr = self.off_manifold_threshold
        if thr is not None and not (math.isfinite(thr) and thr > 0):
            raise BatchError(f"off_manifold_threshold must be finite and > 0, got {thr!r}")


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


def fit_error_batch(predicted: np.ndarray, observed: np.ndarray, rigid: RigidBatch | None,
                    weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame fit error of the forward model's meshes against the observed ones.

    predicted (B, M, 3) forward model output, in the neutral's frame; observed (B, M, 3) the
    same vertices of the input meshes, moved into that frame by ``rigid`` (None: as they are);
    weights (M,) per-vertex weights of the RMS (``FitSubset.weights``; None: all 1).
    Returns (rms (B,), max (B,)) float32, mesh units.
    """
    diff = rigid.apply(observed) if rigid is not None else np.array(observed, dtype=np.float32)
    diff -= predicted
    d2 = np.einsum("bmx,bmx->bm", diff, diff)  # d2[b, m] = |diff[b, m]|^2
    mean_d2 = d2.mean(axis=1) if weights is None else (d2 @ weights) / float(weights.sum())
    return np.sqrt(mean_d2).astype(np.float32), np.sqrt(d2.max(axis=1)).astype(np.float32)


def fit_error_batch_naive(predicted: np.ndarray, observed: np.ndarray, rigid: RigidBatch | None,
                          weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Twin of fit_error_batch: loops over frames and vertices, in float64."""
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
    return np.array(rms, np.float32), np.array(worst, np.float32)


def one_euro_series(x: np.ndarray, t_ns: np.ndarray, params: OneEuroParams, *,
                    gap_ns: int | None, state: OneEuroState | None = None
                    ) -> tuple[np.ndarray, OneEuroState | None]:
    """The live One Euro filter (``OneEuroFilter``) over a run of frames, with its state carried.

    x (T, C), t_ns (T,) int64 sender times -> (y (T, C) float64, state after the last frame).
    The per-interval smoothing factors are computed for all frames at once; only the recurrence
    itself loops. Same results as ``OneEuroFilter`` called frame by frame (see the test).
    """
    xv = np.asarray(x, dtype=np.float64)
    t = np.asarray(t_ns, dtype=np.int64)
    n = xv.shape[0]
    y = np.empty_like(xv)
    if n == 0:
        return y, state
    prev_t = np.empty(n, np.int64)
    prev_t[1:] = t[:-1]
    prev_t[0] = state.t_prev_ns if state is not None else t[0]
    te = (t - prev_t) * 1e-9  # (T,) seconds, as one_euro_step computes it
    restart = np.zeros(n, bool)
    if state is None:
        restart[0] = True
    if gap_ns is not None:
        restart |= (t - prev_t) > gap_ns
    hold = (te <= 0.0) & ~restart
    safe = np.where(te > 0.0, te, 1.0)
    a_d = 1.0 / (1.0 + 1.0 / (2.0 * math.pi * safe[:, None] * params.d_cutoff[None]))  # (T, C)
    two_pi_te = 2.0 * math.pi * safe  # (T,)
    mc, beta = params.min_cutoff, params.beta
    x_prev = state.x_prev if state is not None else xv[0]
    dx_prev = state.dx_prev if state is not None else np.zeros(xv.shape[1])
    t_prev = int(prev_t[0])
    for i in range(n):
        xi = xv[i]
        if restart[i]:
            x_prev, dx_prev = xi.copy(), np.zeros_like(xi)
        elif not hold[i]:
            dx = (xi - x_prev) / te[i]
            dx_prev = a_d[i] * dx + (1.0 - a_d[i]) * dx_prev
            a = 1.0 / (1.0 + 1.0 / (two_pi_te[i] * (mc + beta * np.abs(dx_prev))))
            x_prev = a * xi + (1.0 - a) * x_prev
        if not hold[i]:
            t_prev = int(t[i])
        y[i] = x_prev
    return y, OneEuroState(np.array(x_prev), np.array(dx_prev), t_prev)


GraphCutter = Callable[[bytes, int, np.ndarray], "bytes | None"]


class BatchSolver:
    """A bundle's sessions, opened once, for solving many takes.

    ``subset_graph``, when given, cuts the forward graph down to the fit-error subset's vertices
    (``rigcast.forward_subset.slice_forward_graph``: forward bytes, V, indices (M,) -> ONNX bytes
    or None); the subset fit error then costs a fraction of the full forward model. Without it,
    or when it returns None, the full forward graph runs and the subset is gathered from it.
    """

    def __init__(self, bundle: Bundle, *, threads: int | None = None,
                 subset_graph: GraphCutter | None = None) -> None:
        self.bundle = bundle
        self.threads = threads or all_cores()
        self.inverse = InverseModel(bundle, threads=self.threads)
        self._forward: ForwardModel | None = None
        self._cutter = subset_graph
        self._subsets: dict[int, tuple[FitSubset, ort.InferenceSession | None]] = {}
        self.neutral_stable = np.asarray(bundle.neutral[bundle.stable_indices], np.float64)

    @property
    def forward(self) -> ForwardModel:
        if self._forward is None:
            self._forward = ForwardModel(self.bundle, threads=self.threads)
        return self._forward

    def fit_subset(self, sample: int) -> FitSubset:
        """The bundle's input and stable vertices plus ``sample`` others (fixed seed 0)."""
        return self._subset(sample)[0]

    def subset_forward(self, sample: int) -> bool:
        """Whether the subset fit error runs a cut forward graph (else the full one)."""
        return self._subset(sample)[1] is not None

    def _subset(self, sample: int) -> tuple[FitSubset, ort.InferenceSession | None]:
        if sample not in self._subsets:
            b = self.bundle
            subset = fit_subset(b.vertex_count, np.concatenate([b.input_indices,
                                                                b.stable_indices]), sample)
            session = None
            if self._cutter is not None and subset.indices.shape[0] < b.vertex_count:
                graph = self._cutter(b.forward_onnx, b.vertex_count, subset.indices)
                if graph is not None:
                    session = open_session(graph, threads=self.threads)
            log.info("fit-error subset: %d of %d vertices, %s forward graph",
                     subset.indices.shape[0], b.vertex_count, "cut" if session else "full")
            self._subsets[sample] = (subset, session)
        return self._subsets[sample]

    def solve(self, vertices: np.ndarray, times_s: np.ndarray,
              options: SolveOptions | None = None) -> BatchSolve:
        """vertices (T, V, 3), times_s (T,) increasing seconds -> BatchSolve.

        Chunks of ``batch_size`` frames are stabilised, solved and fitted on a thread pool (numpy
        and onnxruntime release the GIL); the causal filter runs over each chunk in order on this
        thread meanwhile. The fit error uses the solved controls before the filter, as the live
        server does: the filter's lag on fast motion is not a property of the mesh.
        """
        opts = options or SolveOptions()
        # Sessions and the fit-error subset are set up once per solver, outside the timing.
        subset, cut = (self._subset(opts.fit_sample) if opts.fit_error == "subset"
                       else (None, None))
        forward = self.forward if opts.fit_error != "off" else None
        stabilise = stabilise_for(opts.stabilise, self.bundle, f"solve {self.bundle.name}")
        start = time.perf_counter()
        verts, times = self._check(vertices, times_s)
        t, c, bs = verts.shape[0], self.bundle.control_count, opts.batch_size
        raw = np.empty((t, c), np.float32)
        align_rms = np.zeros(t, np.float32)
        fit_rms = np.full(t, np.nan, np.float32)
        fit_max = np.full(t, np.nan, np.float32)
        idx_in, idx_st = self.bundle.input_indices, self.bundle.stable_indices

        def solve_chunk(i0: int) -> RigidBatch | None:
            chunk = verts[i0 : i0 + bs]
            _check_finite(chunk, i0)
            inputs = np.take(chunk, idx_in, axis=1)
            rigid = None
            if stabilise:
                rigid = fit_rigid_batch(np.take(chunk, idx_st, axis=1), self.neutral_stable,
                                        scale=opts.stabilise_scale)
                inputs = rigid.apply(inputs)
                align_rms[i0 : i0 + bs] = np.sqrt(rigid.mse)
            solved = self.inverse.solve(np.ascontiguousarray(inputs, np.float32))
            if not np.isfinite(solved).all():
                # Finite but extreme input can overflow inside the graph (as on the live path).
                bad = int(np.argmin(np.isfinite(solved).all(axis=1)))
                raise BatchError(f"frame {i0 + bad}: the inverse returned NaN or Inf (the mesh "
                                 "is far outside anything the bundle was trained on)")
            raw[i0 : i0 + bs] = solved
            return rigid

        def predict(controls: np.ndarray) -> np.ndarray:
            """controls (n, C) -> the subset's (n, M, 3), or every vertex (n, V, 3)."""
            assert forward is not None
            if cut is not None:
                out: np.ndarray = cut.run([FORWARD_OUTPUT], {FORWARD_INPUT: controls})[0]
                return out
            full = forward.evaluate(controls)
            return full if subset is None else np.take(full, subset.indices, axis=1)

        def fit_chunk(i0: int, rigid: RigidBatch | None) -> None:
            # In slices of FIT_SLICE frames: the forward model's output then stays in cache
            # while the fit error reads it back.
            for j0 in range(i0, min(i0 + bs, t), FIT_SLICE):
                j1 = min(j0 + FIT_SLICE, i0 + bs, t)
                obs = verts[j0:j1] if subset is None else np.take(verts[j0:j1], subset.indices,
                                                                    axis=1)
                part = rigid.frames(j0 - i0, j1 - i0) if rigid is not None else None
                fit_rms[j0:j1], fit_max[j0:j1] = fit_error_batch(
                    predict(raw[j0:j1]), obs, part, subset.weights if subset else None)

        causal = opts.filter == "causal"
        controls = np.empty((t, c), np.float64) if causal else raw
        params = opts.params or default_params(self.bundle)
        t_ns = np.round(times * 1e9).astype(np.int64)
        state: OneEuroState | None = None
        with ThreadPoolExecutor(max_workers=self.threads) as pool:
            starts = range(0, t, bs)
            solving = [pool.submit(solve_chunk, i0) for i0 in starts]
            fitting = []
            try:
                for i0, job in zip(starts, solving, strict=True):
                    rigid = job.result()
                    if forward is not None:
                        fitting.append(pool.submit(fit_chunk, i0, rigid))
                    if causal:
                        controls[i0 : i0 + bs], state = one_euro_series(
                            raw[i0 : i0 + bs], t_ns[i0 : i0 + bs], params,
                            gap_ns=round(opts.gap_s * 1e9), state=state)
                if opts.filter == "zero_phase":
                    controls = zero_phase_smooth(raw, times, opts.smooth_hz)
                for fitted in fitting:
                    fitted.result()
            except BaseException:
                pool.shutdown(wait=True, cancel_futures=True)  # a bad frame: skip the rest
                raise
        lo, hi = self.bundle.schema.lower, self.bundle.schema.upper
        clamped = np.clip(controls, lo, hi).astype(np.float32)
        thresholds, off = self._off_manifold(fit_max, opts)
        seconds = time.perf_counter() - start
        log.info("batch solve: %d frames in %.3f s (%.0f frames/s), fit error %s",
                 t, seconds, t / seconds, opts.fit_error)
        fit_vertices = (0 if opts.fit_error == "off" else subset.indices.shape[0]
                        if subset is not None else self.bundle.vertex_count)
        return BatchSolve(clamped, fit_rms, fit_max, off, thresholds, align_rms, seconds,
                          t / seconds, opts.fit_error, fit_vertices)

    def _off_manifold(self, fit_max: np.ndarray, opts: SolveOptions
                      ) -> tuple[np.ndarray, np.ndarray]:
        if opts.fit_error == "off":
            return np.full(fit_max.shape, np.nan), np.zeros(fit_max.shape, bool)
        if opts.off_manifold_threshold is not None:
            thresholds = np.full(fit_max.shape, opts.off_manifold_threshold)
        else:
            config = opts.manifold or ManifoldConfig(
                floor=floor_for_bundle(self.bundle.manifest, self.bundle.neutral))
            thresholds = off_manifold_thresholds(fit_max, config)
        with np.errstate(invalid="ignore"):
            return thresholds, np.asarray(fit_max > thresholds)

    def _check(self, vertices: np.ndarray, times_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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
        return verts.astype(np.float32, copy=False), times


def _check_finite(chunk: np.ndarray, first_frame: int) -> None:
    """BatchError naming the first frame of ``chunk`` (B, V, 3) with NaN or Inf."""
    if np.isfinite(chunk).all():
        return
    finite = np.isfinite(chunk.reshape(chunk.shape[0], -1)).all(axis=1)
    raise BatchError(f"frame {first_frame + int(np.argmin(finite))} has NaN or Inf vertices")


def solve_take(bundle: Bundle, vertices: np.ndarray, times_s: np.ndarray,
               options: SolveOptions | None = None, *, threads: int | None = None,
               subset_graph: GraphCutter | None = None) -> BatchSolve:
    """One-shot batch solve; see ``BatchSolver``. ``threads`` defaults to all cores."""
    solver = BatchSolver(bundle, threads=threads, subset_graph=subset_graph)
    return solver.solve(vertices, times_s, options)
