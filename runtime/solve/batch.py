"""Batch solve: a whole take, mesh frames (T, V, 3) to controls (T, C), as fast as the CPU allows.

The stages are the solve core's (runtime/solve/solve_core.py), the very functions the live server runs
on a batch of one frame, here on chunks of ``batch_size`` frames:

1. stabilise: the batched Umeyama/Kabsch fit of every frame's stable vertices onto the
   neutral's (Umeyama, IEEE TPAMI 13(4), 1991), applied to the input vertices only;
2. batched onnxruntime inference of the inverse graph (and its refinement);
3. filter: the live server's causal One Euro filter, built from the same per-stream settings
   (``SolveOptions.stream``, a ``config.StreamConfig``: ``rigcast solve --config serve.toml``
   reads it from the server's file), or, since offline need not be causal, "smooth" (zero-phase
   smoothing, ``one_euro.zero_phase_smooth``), or none;
4. clamp to the schema's bounds;
5. fit error through the forward graph (batched), RMS and max in mesh units, per frame: on a
   subset of the vertices by default (``stages.fit_subset``: the input and stable vertices plus a
   fixed random sample, with a stratified RMS estimate), on all of them, or off;
6. off-manifold flags: the adaptive threshold of ``runtime.solve.manifold`` on each frame's max vertex
   error (running median + k MAD, floored by the bundle's training fit error), or a fixed one.

Threads: stages 1, 2 and 5 of a chunk are one job on a pool of ``threads`` workers (numpy's large
operations and onnxruntime release the GIL), each session running one intra-op thread, so the
chunks share the cores without onnxruntime's threads competing with the pool's; the filter runs on
the calling thread over the chunks in frame order as they finish. A chunk's work is the same on
any thread, so the result equals the one-thread path's bit for bit (tests/test_batch.py).
"""

from __future__ import annotations

import logging
import math
import os
import time
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import onnxruntime as ort
from rigcast.runtime.bundle import FORWARD_INPUT, FORWARD_OUTPUT, Bundle
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.solve.align import RigidBatch, fit_rigid_batch
from rigcast.runtime.solve.blas_threads import held_blas_threads
from rigcast.runtime.solve.inference import open_session
from rigcast.runtime.solve.manifold import ManifoldConfig, off_manifold_thresholds
from rigcast.runtime.solve.one_euro import OneEuroFilter, zero_phase_smooth
from rigcast.runtime.solve.solve_core import (
    SolveModel,
    build_filter,
    filter_and_clamp,
    frame_fit_error,
    open_model,
    solve_points,
    stabilise_for,
    stabilise_frames,
)
from rigcast.runtime.solve.stages import FitSubset, fit_subset
from rigcast.runtime.solve.stages import fit_error as fit_error_batch
from rigcast.runtime.solve.stages import fit_error_naive as fit_error_batch_naive

log = logging.getLogger(__name__)

# Names other modules import from here.
__all__ = ["FILTERS", "FIT_ERROR_SCOPES", "FIT_SLICE", "STABILISE_SLICE", "STAGES",
           "BatchError", "BatchSolve", "BatchSolver", "FilterKind", "FitErrorScope", "FitSubset",
           "RigidBatch", "SolveOptions", "all_cores", "fit_error_batch", "fit_error_batch_naive",
           "fit_rigid_batch", "fit_subset", "solve_take"]

FilterKind = Literal["none", "causal", "smooth"]
FILTERS: tuple[str, ...] = ("none", "causal", "smooth")
# Which vertices the fit error reads (``fit_error_scope``); when the server computes it is
# another setting, ``config.StreamConfig.fit_error_schedule``.
FitErrorScope = Literal["full", "subset", "off"]
FIT_ERROR_SCOPES: tuple[str, ...] = ("subset", "full", "off")
FIT_SLICE = 32  # frames per forward-model call in the fit error (its output stays in cache)
STABILISE_SLICE = 64  # frames per stabilisation call (its gathers stay in cache)
STAGES: tuple[str, ...] = ("stabilise", "solve", "fit_error", "filter")  # BatchSolve.stage_cpu_s
_DEFAULT_STREAM = StreamConfig()


class BatchError(RigcastError, ValueError):
    """A take or option the batch solve cannot use; the message names the bad value."""

    advice = "check the take and the solve options; `rigcast solve --help` lists them"


@dataclass(frozen=True)
class BatchSolve:
    """Per-frame results of a batch solve.

    controls (T, C) float32 filtered and clamped; fit_rms, fit_max (T,) float32 mesh units (NaN
    when the fit error was not computed); off_manifold (T,) bool, fit_max above thresholds (T,)
    (NaN when not computed, inf during the detector's warm-up); align_rms (T,) float32 residual
    of the stabilisation (0 when off); seconds of wall time; frames_per_second = T / seconds;
    fit_error_scope the scope used ("subset", "full", "off") and fit_vertices how many vertices it read;
    rigid the fits that stabilised the frames (the head pose is their inverse,
    ``head_pose.HeadPose.from_stabiliser(rigid.pose(t))``), None when not stabilised;
    stage_cpu_s the CPU time of each stage on the threads that ran it, summed over the chunks
    (``time.thread_time``, which a machine loaded by others disturbs less than wall time):
    "stabilise" (with the finite check), "solve" (inference, refinement and realignment),
    "fit_error", "filter"
    (the filter and clamp).
    """

    controls: np.ndarray
    fit_rms: np.ndarray
    fit_max: np.ndarray
    off_manifold: np.ndarray
    thresholds: np.ndarray
    align_rms: np.ndarray
    seconds: float
    frames_per_second: float
    fit_error_scope: str
    fit_vertices: int
    rigid: RigidBatch | None = None  # each frame's stabilising fit (T frames); None when off
    stage_cpu_s: Mapping[str, float] = field(default_factory=dict)


def all_cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


@dataclass(frozen=True)
class SolveOptions:
    """How a take is solved; validated here, once.

    stream: the per-stream settings ``rigcast serve`` takes (``config.StreamConfig``: One Euro
    min_cutoff, beta, d_cutoff and per-group overrides, pass-through, the reset gap ``gap_ms``,
    stabilise (None follows the bundle, ``solve_core.stabilise_for``), stabilise_scale, a fixed
    off_manifold_threshold); None: their defaults. Its ``stream`` and ``bundle`` are not used.
    filter: "causal" (the live server's One Euro filter with those settings), "smooth" (offline,
    zero-phase, no lag; cutoff ``smooth_hz``) or "none". batch_size: frames per onnxruntime call.
    fit_error_scope: which vertices the fit error reads: "full" (default, every vertex, as the live
    server reads), "subset" (faster: the inverse's input and stable vertices plus
    ``fit_sample`` others drawn once with a fixed seed; its max misses a bulge on the vertices
    it does not read: off-manifold recall 0.75 against 0.95 with "full" on a zoo rig) or
    "off". manifold: the adaptive off-manifold detector's settings (None: defaults,
    with the bundle's floor from ``manifold.floor_for_bundle``).
    """

    stream: StreamConfig | None = None
    filter: FilterKind = "causal"
    smooth_hz: float = 3.0
    batch_size: int = 1024
    fit_error_scope: FitErrorScope = "full"
    fit_sample: int = 512
    manifold: ManifoldConfig | None = None

    def __post_init__(self) -> None:
        if self.filter not in FILTERS:
            raise BatchError(f"filter must be one of {FILTERS}, got {self.filter!r}")
        if self.fit_error_scope not in FIT_ERROR_SCOPES:
            raise BatchError(f"fit_error_scope must be one of {FIT_ERROR_SCOPES}, "
                             f"got {self.fit_error_scope!r}")
        if not isinstance(self.batch_size, int) or self.batch_size < 1:
            raise BatchError(f"batch_size must be an integer >= 1, got {self.batch_size!r}")
        if not isinstance(self.fit_sample, int) or self.fit_sample < 0:
            raise BatchError(f"fit_sample must be an integer >= 0, got {self.fit_sample!r}")
        if not (math.isfinite(self.smooth_hz) and self.smooth_hz > 0):
            raise BatchError(f"smooth_hz must be finite and > 0, got {self.smooth_hz!r}")

    @property
    def settings(self) -> StreamConfig:
        """The per-stream settings in force."""
        return self.stream if self.stream is not None else _DEFAULT_STREAM


GraphCutter = Callable[[bytes, int, np.ndarray], "bytes | None"]


class BatchSolver:
    """A bundle's sessions, opened once, for solving many takes.

    ``subset_graph``, when given, cuts the forward graph down to the fit-error subset's vertices
    (``rigcast.solving.forward_subset.slice_forward_graph``: forward bytes, V, indices (M,) -> ONNX bytes
    or None); the subset fit error then costs a fraction of the full forward model. Without it,
    or when it returns None, the full forward graph runs and the subset is gathered from it.
    ``threads``: chunks solved at once (None: every core this process may use);
    ``session_threads``: onnxruntime's intra-op threads per session (1: the pool fills the cores).
    """

    def __init__(self, bundle: Bundle, *, threads: int | None = None,
                 session_threads: int = 1, subset_graph: GraphCutter | None = None) -> None:
        if threads is not None and (not isinstance(threads, int) or threads < 1):
            raise BatchError(f"threads must be an integer >= 1, got {threads!r}")
        if not isinstance(session_threads, int) or session_threads < 1:
            raise BatchError(f"session_threads must be an integer >= 1, got {session_threads!r}")
        self.bundle = bundle
        self.threads = threads or all_cores()
        self.session_threads = session_threads
        self.model: SolveModel = open_model(bundle, label=bundle.name, threads=session_threads)
        self.inverse = self.model.inverse
        self.forward = self.model.forward
        self._cutter = subset_graph
        self._subsets: dict[int, tuple[FitSubset, ort.InferenceSession | None]] = {}
        self.neutral_stable = np.asarray(bundle.neutral[bundle.stable_indices], np.float64)

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
                    session = open_session(graph, threads=self.session_threads)
            log.info("fit-error subset: %d of %d vertices, %s forward graph",
                     subset.indices.shape[0], b.vertex_count, "cut" if session else "full")
            self._subsets[sample] = (subset, session)
        return self._subsets[sample]

    def solve(self, vertices: np.ndarray, times_s: np.ndarray,
              options: SolveOptions | None = None) -> BatchSolve:
        """vertices (T, V, 3), times_s (T,) increasing seconds -> BatchSolve.

        Chunks of ``batch_size`` frames are stabilised, solved and fitted on a thread pool (numpy
        and onnxruntime release the GIL), or in order on this thread when ``threads`` is 1 or
        there is one chunk; the causal filter runs over each chunk in frame order on this thread
        as they finish. The fit error uses the solved controls before the filter, as the live
        server does: the filter's lag on fast motion is not a property of the mesh. numpy's
        OpenBLAS is held at one thread meanwhile (``blas_threads``: the pool fills the cores;
        the same bits, 50 us less CPU a frame on the demo face, two cores).
        """
        with held_blas_threads(1):
            return self._solve(vertices, times_s, options)

    def _solve(self, vertices: np.ndarray, times_s: np.ndarray,
               options: SolveOptions | None) -> BatchSolve:
        opts = options or SolveOptions()
        settings = opts.settings
        # Sessions and the fit-error subset are set up once per solver, outside the timing.
        subset, cut = (self._subset(opts.fit_sample) if opts.fit_error_scope == "subset"
                       else (None, None))
        fitting = opts.fit_error_scope != "off"
        stabilise = stabilise_for(settings.stabilise, self.bundle, f"solve {self.bundle.name}")
        causal = opts.filter == "causal" and not settings.passthrough
        filt = build_filter(settings, self.bundle.schema) if causal else None
        start = time.perf_counter()
        verts, times = self._check(vertices, times_s)
        t, c, bs = verts.shape[0], self.bundle.control_count, opts.batch_size
        raw = np.empty((t, c), np.float32)
        align_rms = np.zeros(t, np.float32)
        fits = (RigidBatch(np.empty((t, 3, 3)), np.empty((t, 3)), np.empty(t), np.empty(t))
                if stabilise else None)
        fit_rms = np.full(t, np.nan, np.float32)
        fit_max = np.full(t, np.nan, np.float32)
        model = self.model
        passes = settings.realign

        def solve_chunk(i0: int) -> None:
            """Stabilise, solve and fit frames i0 .. i0 + bs - 1 (one job on the pool: a chunk's
            frames stay in this thread's cache from the solve to the fit error)."""
            i1 = min(i0 + bs, t)
            chunk = verts[i0:i1]
            c0 = time.thread_time()
            _check_finite(chunk, i0)
            inputs, rigid = self._stabilise(chunk, stabilise, settings.stabilise_scale)
            c1 = time.thread_time()
            try:
                solved, rigid = solve_points(model, chunk, inputs, rigid, passes=passes,
                                             scale=settings.stabilise_scale, first_frame=i0)
            except FloatingPointError as exc:
                raise BatchError(str(exc)) from None
            raw[i0:i1] = solved
            if rigid is not None and fits is not None:
                align_rms[i0:i1] = rigid.rms
                for mine, part in zip((fits.rotation, fits.translation, fits.scale, fits.mse),
                                      (rigid.rotation, rigid.translation, rigid.scale, rigid.mse),
                                      strict=True):
                    mine[i0:i1] = part
            c2 = c3 = time.thread_time()
            if fitting:
                fit_chunk(i0, i1, rigid)
                c3 = time.thread_time()
            cpu.append((c1 - c0, c2 - c1, c3 - c2, 0.0))  # one append: no lock needed

        def predict(controls: np.ndarray) -> np.ndarray:
            """controls (n, C) -> the subset's (n, M, 3), or every vertex (n, V, 3)."""
            if cut is not None:
                out: np.ndarray = cut.run([FORWARD_OUTPUT], {FORWARD_INPUT: controls})[0]
                return out
            full = model.forward.evaluate(controls)
            return full if subset is None else np.take(full, subset.indices, axis=1)

        def fit_chunk(i0: int, i1: int, rigid: RigidBatch | None) -> None:
            # In slices of FIT_SLICE frames: the forward model's output then stays in cache
            # while the fit error reads it back.
            for j0 in range(i0, i1, FIT_SLICE):
                j1 = min(j0 + FIT_SLICE, i1)
                obs = verts[j0:j1] if subset is None else np.take(verts[j0:j1], subset.indices,
                                                                    axis=1)
                part = rigid.frames(j0 - i0, j1 - i0) if rigid is not None else None
                try:
                    fit_rms[j0:j1], fit_max[j0:j1] = frame_fit_error(
                        predict, raw[j0:j1], obs, part, subset.weights if subset else None)
                except FloatingPointError as exc:
                    raise BatchError(f"frames {j0}-{j1 - 1}: {exc}") from None

        controls = np.empty((t, c), np.float32)
        t_ns = np.round(times * 1e9).astype(np.int64)
        numbers = np.arange(t, dtype=np.int64)
        starts = range(0, t, bs)
        causal_in_order = opts.filter != "smooth"
        cpu: list[tuple[float, float, float, float]] = []  # per chunk, as STAGES

        def run_filter(i0: int) -> None:
            c0 = time.thread_time()
            self._filter(filt, raw, t_ns, numbers, controls, i0, min(i0 + bs, t))
            cpu.append((0.0, 0.0, 0.0, time.thread_time() - c0))

        if self.threads == 1 or len(starts) == 1:
            for i0 in starts:  # the one-thread path: the pool's work, in order, here
                solve_chunk(i0)
                if causal_in_order:
                    run_filter(i0)
        else:
            with ThreadPoolExecutor(max_workers=self.threads) as pool:
                jobs = [pool.submit(solve_chunk, i0) for i0 in starts]
                try:
                    # The causal filter runs here, chunk after chunk in frame order, while the
                    # pool solves the chunks after them.
                    for i0, job in zip(starts, jobs, strict=True):
                        job.result()
                        if causal_in_order:
                            run_filter(i0)
                except BaseException:
                    pool.shutdown(wait=True, cancel_futures=True)  # a bad frame: skip the rest
                    raise
        if opts.filter == "smooth":
            c0 = time.thread_time()
            filter_and_clamp(model, None, zero_phase_smooth(raw, times, opts.smooth_hz),
                             t_ns, None, controls)
            cpu.append((0.0, 0.0, 0.0, time.thread_time() - c0))
        thresholds, off = self._off_manifold(fit_rms, fit_max, opts)
        seconds = time.perf_counter() - start
        log.info("batch solve: %d frames in %.3f s (%.0f frames/s), fit error %s",
                 t, seconds, t / seconds, opts.fit_error_scope)
        fit_vertices = (0 if opts.fit_error_scope == "off" else subset.indices.shape[0]
                        if subset is not None else self.bundle.vertex_count)
        stage_cpu = dict(zip(STAGES, (float(x) for x in np.sum(cpu, axis=0)), strict=True))
        return BatchSolve(controls, fit_rms, fit_max, off, thresholds, align_rms, seconds,
                          t / seconds, opts.fit_error_scope, fit_vertices, fits, stage_cpu)

    def _stabilise(self, chunk: np.ndarray, stabilise: bool, scale: bool
                   ) -> tuple[np.ndarray, RigidBatch | None]:
        """``solve_core.stabilise_frames`` on a chunk (B, V, 3), in slices of STABILISE_SLICE
        frames: the same bits, but each slice's gathers and float64 copies stay in cache (on the
        demo face 29 against 37 us a frame, one thread)."""
        count = chunk.shape[0]
        points = np.empty((count, self.inverse.point_indices.shape[0], 3), np.float32)
        fits: list[RigidBatch] = []
        for j0 in range(0, count, STABILISE_SLICE):
            j1 = min(j0 + STABILISE_SLICE, count)
            _, rigid = stabilise_frames(self.model, chunk[j0:j1], stabilise=stabilise,
                                        scale=scale, inputs=points[j0:j1])
            if rigid is not None:
                fits.append(rigid)
        if not fits:
            return points, None
        return points, RigidBatch(*(np.concatenate([getattr(f, name) for f in fits])
                                    for name in ("rotation", "translation", "scale", "mse")))

    def _filter(self, filt: OneEuroFilter | None, raw: np.ndarray, t_ns: np.ndarray,
                numbers: np.ndarray, controls: np.ndarray, i0: int, i1: int) -> None:
        """Filter (causal One Euro, or none) and clamp frames i0 .. i1 - 1 into ``controls``;
        the filter's state carries on to the next chunk."""
        filter_and_clamp(self.model, filt, raw[i0:i1], t_ns[i0:i1], numbers[i0:i1],
                         controls[i0:i1])

    def _off_manifold(self, fit_rms: np.ndarray, fit_max: np.ndarray, opts: SolveOptions
                      ) -> tuple[np.ndarray, np.ndarray]:
        """As the live server rules: a fixed threshold on the frame's fit RMS, else the adaptive
        one on its worst vertex."""
        if opts.fit_error_scope == "off":
            return np.full(fit_max.shape, np.nan), np.zeros(fit_max.shape, bool)
        fixed = opts.settings.off_manifold_threshold
        if fixed is not None:
            with np.errstate(invalid="ignore"):
                return np.full(fit_max.shape, fixed), np.asarray(fit_rms > fixed)
        config = opts.manifold or ManifoldConfig(floor=self.model.floor)
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
    # One pass, each frame's coordinates summed: NaN and Inf carry through a sum (IEEE 754), so
    # finite sums clear the chunk; a sum that overflowed on finite values only sends the chunk
    # to the exact test below. numpy's own sum, not a product with ones: OpenBLAS runs a product
    # this large on threads of its own, which spin (3x the CPU time on two cores).
    flat = chunk.reshape(chunk.shape[0], -1)
    with np.errstate(over="ignore", invalid="ignore"):
        sums = flat.sum(axis=1)
    if np.isfinite(sums).all():
        return
    finite = np.isfinite(flat).all(axis=1)
    if finite.all():
        return
    raise BatchError(f"frame {first_frame + int(np.argmin(finite))} has NaN or Inf vertices")


def solve_take(bundle: Bundle, vertices: np.ndarray, times_s: np.ndarray,
               options: SolveOptions | None = None, *, threads: int | None = None,
               subset_graph: GraphCutter | None = None) -> BatchSolve:
    """One-shot batch solve; see ``BatchSolver``. ``threads`` defaults to all cores."""
    solver = BatchSolver(bundle, threads=threads, subset_graph=subset_graph)
    return solver.solve(vertices, times_s, options)
