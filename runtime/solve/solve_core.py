"""The solve core: stabilise -> infer -> filter -> clamp -> fit error, for a batch of frames.

One path for one and for many: the live server (runtime/solve/pipeline.py) solves a batch of one frame,
``rigcast solve`` (runtime/solve/batch.py) batches of many, through the same functions here, so offline
and live agree by construction and a speed-up lands in both. Each stage is written once:

- stabilise: ``align.fit_rigid_batch`` (Umeyama 1991) of the frames' stable vertices onto the
  neutral's, applied to the K input vertices only (``stages.gather_inputs``); whether to
  stabilise follows :func:`stabilise_for`, one rule for live and batch;
- infer: ``inference.InverseModel`` (the inverse graph, then the bundle's refinement steps);
- filter: the causal One Euro filter (``one_euro.OneEuroFilter``) made by :func:`build_filter`
  from the same per-stream settings ``serve`` takes (``config.StreamConfig``: per-group
  parameters, d_cutoff, the reset gap, pass-through);
- clamp: ``stages.clamp`` to the schema's bounds;
- fit error: ``stages.fit_error`` of the forward model's mesh for the solved controls (before the
  filter: the filter's lag on fast motion is not a property of the mesh) against the stabilised
  input.
"""

from __future__ import annotations

import copy
import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from rigcast.runtime.bundle import Bundle, BundleError, load_bundle
from rigcast.runtime.schema import ControlSchema
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.solve.align import (
    RigidBatch,
    StableTarget,
    fit_rigid_batch,
    fit_rigid_pairs,
    stable_target,
)
from rigcast.runtime.solve.inference import ForwardModel, InverseModel, SolvePass
from rigcast.runtime.solve.manifold import floor_for_bundle, training_fit_error
from rigcast.runtime.solve.moments import (
    compose,
    moved_state,
    projection_state,
    realign_fit,
    uncentre,
)
from rigcast.runtime.solve.one_euro import OneEuroFilter, OneEuroParams
from rigcast.runtime.solve.refine import Refiner
from rigcast.runtime.solve.stages import clamp, fit_error, gather_inputs

log = logging.getLogger(__name__)

#: Gauss-Newton steps of the first solve when a realignment follows: that solve only sets the
#: realignment's target (the forward model's mesh, for a rigid fit on thousands of vertices),
#: and the solve from the moved frame takes the refinement's full steps. Two of five left the
#: noisy takes' mean error against the clean mesh within 0.2 % on the demo face, the linear face
#: and two zoo rigs (stabilisation forced), four takes each, with or without head motion, with
#: the fixed curvature and the current point's (our measurement, see ``solve_points``).
ROUGH_STEPS = 2


class RoughRefiner:
    """The first solve's refiner when a realignment follows: a copy of the bundle's with at most
    ``ROUGH_STEPS`` steps, remade whenever the bundle's settings change (``Refiner.settings`` is
    settable: the quality bench swaps it). The batch pool's threads share it: a race only makes
    the same copy twice."""

    def __init__(self, inverse: InverseModel) -> None:
        self.inverse = inverse
        self._made: tuple[object, Refiner] | None = None

    def get(self) -> Refiner | None:
        full = self.inverse.refiner
        if full is None:
            return None
        made = self._made
        if made is not None and made[0] is full.settings:
            return made[1]
        rough = copy.copy(full)  # its own cached factors: the settings setter renews them
        rough.settings = replace(full.settings, steps=min(full.settings.steps, ROUGH_STEPS))
        self._made = (full.settings, rough)
        return rough


@dataclass(frozen=True)
class SolveModel:
    """A loaded bundle with its sessions and precomputed arrays; immutable, swapped whole."""

    label: str
    bundle: Bundle
    inverse: InverseModel
    forward: ForwardModel
    stable_target: StableTarget  # the neutral's stable vertices, prepared for fit_rigid_batch
    lower: np.ndarray  # (C,) float32
    upper: np.ndarray  # (C,) float32
    floor: float  # the adaptive off-manifold rule's floor (mesh units)
    fixed_threshold: float | None = None  # a fixed RMS limit instead of the adaptive rule
    rough: RoughRefiner | None = None  # the first solve's refiner when a realignment follows

    @property
    def vertex_count(self) -> int:
        return self.bundle.vertex_count


def open_model(bundle: Bundle, *, label: str, threads: int, threshold: float | None = None,
               factor: float = 3.0) -> SolveModel:
    """Open a loaded bundle's sessions; BundleError when a graph does not fit the bundle."""
    floor = floor_for_bundle(bundle.manifest, bundle.neutral, factor)
    if threshold is None and training_fit_error(bundle.manifest) is None:
        log.info("bundle %s has no training fit figure; off-manifold floor %.4g "
                 "(0.1%% of the bounding-box diagonal)", label, floor)
    inverse = InverseModel(bundle, threads=threads)
    return SolveModel(
        label=label,
        bundle=bundle,
        inverse=inverse,
        forward=ForwardModel(bundle, threads=threads),
        stable_target=stable_target(bundle.neutral[bundle.stable_indices]),
        lower=bundle.schema.lower,
        upper=bundle.schema.upper,
        floor=float(floor),
        fixed_threshold=None if threshold is None else float(threshold),
        rough=RoughRefiner(inverse),
    )


def load_stream_model(
    path: Path, *, threads: int, threshold: float | None, factor: float
) -> SolveModel:
    """Load, validate and open a bundle; BundleError on any problem (file, graph, shapes)."""
    return open_model(load_bundle(path), label=str(path), threads=threads, threshold=threshold,
                      factor=factor)


def check_compatible(old: SolveModel, new: SolveModel) -> None:
    """A reload keeps the stream's vertex count and control schema, or it is refused: senders and
    subscribers were built against them, and the filter state is per control."""
    if new.vertex_count != old.vertex_count:
        raise BundleError(f"new bundle has {new.vertex_count} vertices, the stream has "
                          f"{old.vertex_count}; start a new stream for a different mesh")
    if new.bundle.schema != old.bundle.schema:
        raise BundleError("new bundle has a different control schema; start a new stream "
                          "for a different rig")


def stabilise_for(requested: bool | None, bundle: Bundle, who: str) -> bool:
    """Whether to stabilise: as requested, else as the build measured (a rigid region or not).
    Logs one line saying which and why; the same rule serves live and batch solves."""
    if requested is not None:
        log.info("%s: stabilisation %s (as requested)", who, "on" if requested else "off")
        return requested
    section = bundle.manifest.get("stabilise")
    moved = section.get("stable_motion_pct_diag") if isinstance(section, dict) else None
    if bundle.rigid_region:
        log.info("%s: stabilisation on (the rig has a rigid region)", who)
    else:
        log.warning("%s: stabilisation off: the rig has no rigid region (its stable vertices "
                    "move %s%% of the diagonal under the controls); force it with --stabilise",
                    who, "?" if moved is None else f"{moved:.3g}")
    return bundle.rigid_region


def filter_params(settings: StreamConfig, schema: ControlSchema) -> OneEuroParams:
    """The One Euro parameters of a stream's settings: per group (or control) where the settings
    name one, else the stream's own; beta per unit of each control's range."""
    default = (settings.min_cutoff, settings.beta, settings.d_cutoff)
    groups = {g.group: (g.min_cutoff, g.beta, g.d_cutoff) for g in settings.groups}
    params = (OneEuroParams.per_group(schema, groups, default) if groups
              else OneEuroParams.uniform(len(schema), *default))
    return params.per_unit_range(schema.upper - schema.lower)


def build_filter(settings: StreamConfig, schema: ControlSchema) -> OneEuroFilter:
    """The one filter builder: a fresh causal One Euro filter for a stream's settings."""
    return OneEuroFilter(filter_params(settings, schema), passthrough=settings.passthrough,
                         gap_ns=round(settings.gap_ms * 1e6))


def stabilise_frames(model: SolveModel, frames: np.ndarray, *, stabilise: bool, scale: bool,
                     inputs: np.ndarray | None = None) -> tuple[np.ndarray, RigidBatch | None]:
    """frames (B, V, 3) float32 -> (the solve points (B, P, 3) float32, the P vertices
    ``model.inverse.point_indices`` (the network's inputs, then those the refinement fits),
    moved into the neutral's frame when ``stabilise``; the frames' rigid fits or None).
    ``inputs`` (B, P, 3) float32, when given, receives the points."""
    bundle = model.bundle
    rigid = (fit_rigid_batch(np.take(frames, bundle.stable_indices, axis=1), model.stable_target,
                             scale=scale) if stabilise else None)
    return gather_inputs(frames, model.inverse.point_indices, rigid, inputs), rigid


def solve_points(model: SolveModel, frames: np.ndarray, points: np.ndarray,
                 rigid: RigidBatch | None, *, passes: int, scale: bool, first_frame: int = 0,
                 inputs: np.ndarray | None = None) -> tuple[np.ndarray, RigidBatch | None]:
    """The infer stage: frames (B, V, 3) float32 as received, points (B, P, 3) their solve
    points from :func:`stabilise_frames`, rigid their rigid fits (None: not stabilised) ->
    (controls (B, C) float32, the frames' rigid fits, realigned when ``passes``).

    Solves, then realigns ``passes`` times: fits, on the vertices the solve reads, the rigid
    motion that maps each frame onto the forward model's mesh for its solved controls (Umeyama
    1991 with a per-frame target), and solves again from the frame moved by it: the deformation
    is now explained, so every vertex the refinement fits steadies the head, not only the
    stable ones. On the demo face with 0.1-0.2 % of D sensor noise one pass took the solve's
    error against the clean mesh from 0.98x to 0.76x that of per-frame non-linear least squares.
    Bundles in the moment form (runtime/solve/moments.py) do this from the first projection's
    moments, on their S refinement vertices and the stable ones, with no new projection and no
    forward model on all V vertices; older bundles fit on all V vertices against the forward
    graph (:func:`realign`). The returned fits keep the stable vertices' residual (``mse``) of
    the first: it measures the stabilisation, as before.

    When a realignment follows (moment form), the first solve only sets the realignment's
    target, so its refinement takes ``ROUGH_STEPS`` steps (``RoughRefiner``), as does every
    solve but the last with more than one pass; the last takes the bundle's. A bound on the
    worst frame more than a saving on the usual one: frames the refinement settles in two
    steps cost the same. Measured on 600-frame noisy takes (0.15 % of D noise, with and
    without head motion, seeds 7, 8, 31, 32), stabilised, with the runtime's default
    refinement: mean error against the clean mesh within 0.2 % of the full first solve's on
    the demo face, the linear face and zoo rigs 269008 and 899926 (within 0.04 % with the
    curvature at the current point, 4234c26); recoverability unchanged; noise-free held-out
    poses of the demo face 0.88e-5 -> 0.94e-5 D (0.95e-5 -> 0.98e-5 D with the current
    point's curvature; 0.005 % of D is the issue's floor). On the latency bench's bundle (an
    untrained network: every step runs) the frame took 3.9 of 13.9 graph evaluations and 14 %
    of its thread time less (current point's curvature); on the demo face 0.4 of 5.8 with
    the fixed curvature, none of 4.9 with the current point's. Two passes with the middle
    solve rough took the noisy takes' error 6-17 % lower on both faces (13.7, 12.8, 13.5,
    12.1 against 16.0, 15.5, 14.4, 13.9 e-5 D on the demo face, fixed curvature), as two full
    passes did, for a frame about 1.2x (bench bundle) and 1.4x (demo face) one pass with a
    full first solve (thread time, one frame at a time)."""
    inverse = model.inverse
    rough = (model.rough.get() if model.rough is not None and rigid is not None and passes > 0
             and inverse.moment_form is not None else None)
    if rough is None:
        first = inverse.solve_pass(points)
    else:  # inverse.solve_pass with the rough refiner: only the realignment reads it
        net = inverse.network(points[:, : inverse.k])
        fm = inverse.moment_form.moments(points[:, inverse.k :])
        solved, z = (rough.solve(net, state=projection_state(fm)) if np.isfinite(net).all()
                     else (net, None))
        first = SolvePass(solved, fm, z)
    _check_finite(first.controls, first_frame)
    if rigid is None or passes <= 0:
        return first.controls, rigid
    if first.moments is None:
        return realign(model, frames, first.controls, rigid, passes=passes, scale=scale,
                       first_frame=first_frame, inputs=inputs)
    return _realign_moments(model, frames, points, first, rigid, passes, scale, first_frame)


def _realign_moments(model: SolveModel, frames: np.ndarray, points: np.ndarray, first: SolvePass,
                     rigid: RigidBatch, passes: int, scale: bool, first_frame: int
                     ) -> tuple[np.ndarray, RigidBatch]:
    inverse = model.inverse
    form = inverse.moment_form
    assert form is not None and first.moments is not None
    stable_home, extra = form.stable_home, form.extra_indices  # made once per bundle
    # the frames' vertices stabilised and centred in one move
    centring = RigidBatch(rigid.rotation, rigid.translation - form.constants.centre,
                          rigid.scale, rigid.mse)
    source = gather_inputs(frames, extra, centring)
    net = points[:, : inverse.k]
    solved = first.controls
    target: np.ndarray = stable_home
    if form.rest is not None:
        target = np.empty((frames.shape[0], extra.size, 3), np.float32)
        target[:, : stable_home.shape[0]] = stable_home
    rough = model.rough.get() if model.rough is not None else None
    made = first.weights  # the basis weights the refinement made at its answer
    for done in range(1, passes + 1):
        z = form.weights_at(solved, made)
        if form.rest is not None:
            form.rest_targets(z, out=target[:, stable_home.shape[0] :])
        fit = realign_fit(first.moments, form.constants, z, extra_source=source,
                          extra_target=target, scale=scale, centred=True)
        linear, shift = uncentre(fit, form.constants.centre)
        moved = (net @ linear.transpose(0, 2, 1) + shift[:, None]).astype(np.float32)
        scaled = linear  # uncentre's L = s R: the centred move's linear part as well
        made = None
        if done == passes or rough is None:
            solved = inverse.solve_moved(moved, first.moments, scaled, fit.translation)
        else:  # inverse.solve_moved with the rough refiner: the next realignment reads it
            solved = inverse.network(moved)
            if np.isfinite(solved).all():
                solved, made = rough.solve(solved, state=moved_state(
                    first.moments, form.constants, scaled, fit.translation))
        _check_finite(solved, first_frame)
    return solved, compose(rigid, linear, shift)


def realign(model: SolveModel, frames: np.ndarray, solved: np.ndarray, rigid: RigidBatch, *,
            passes: int, scale: bool, first_frame: int = 0, inputs: np.ndarray | None = None
            ) -> tuple[np.ndarray, RigidBatch]:
    """The realignment of bundles before the moment form (see :func:`solve_points`): frames
    (B, V, 3) float32 as received; solved (B, C) their controls after a stabilised solve; rigid
    their stabilisation -> (controls (B, C), the frames' rigid fits), fitting on every vertex
    against the forward graph's mesh. ``inputs`` (B, P, 3) float32 receives the last solve
    points."""
    moved = rigid
    for _ in range(passes):
        moved = fit_rigid_pairs(frames, model.forward.evaluate(solved), scale=scale)
        points = gather_inputs(frames, model.inverse.point_indices, moved, inputs)
        solved = infer(model, points, first_frame)
    return solved, RigidBatch(moved.rotation, moved.translation, moved.scale, rigid.mse)


def infer(model: SolveModel, inputs: np.ndarray, first_frame: int = 0) -> np.ndarray:
    """inputs (B, K, 3) float32 -> solved controls (B, C) float32. FloatingPointError naming the
    frame (``first_frame`` + index) when the inverse returns NaN or Inf: finite but extreme input
    can overflow inside the graph, and that must never reach a filter's state."""
    solved = model.inverse.solve(inputs)
    _check_finite(solved, first_frame)
    return solved


def _check_finite(solved: np.ndarray, first_frame: int) -> None:
    finite = np.isfinite(solved)
    if not finite.all():  # the frame only on failure: one reduction on the usual path
        finite = finite.all(axis=1)
        raise FloatingPointError(f"frame {first_frame + int(np.argmin(finite))}: the inverse "
                                 "returned NaN or Inf (the mesh is far outside anything the "
                                 "bundle was trained on)")


def filter_and_clamp(model: SolveModel, filt: OneEuroFilter | None, solved: np.ndarray,
                     t_ns: np.ndarray, frames: np.ndarray | None = None,
                     out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """solved (B, C), t_ns (B,) sender times, frames (B,) frame numbers or None -> (controls
    (B, C) float32 within bounds, filtered (B,) bool, clipped (B,) bool). ``filt`` None: no
    filter. The filter's state carries over to the next call."""
    if filt is None:
        values, filtered = solved, np.zeros(solved.shape[0], bool)
    else:
        values, filtered = filt.run(solved, t_ns, frames)
    controls, clipped = clamp(values, model.lower, model.upper, out)
    return controls, filtered, clipped


Predict = Callable[[np.ndarray], np.ndarray]


def frame_fit_error(predict: Predict, solved: np.ndarray, observed: np.ndarray,
                    rigid: RigidBatch | None, weights: np.ndarray | None = None
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Fit error of solved controls (B, C): ``predict`` maps them to the forward model's (B, M, 3)
    (all V vertices, or the M of a fit subset), against observed (B, M, 3), the same vertices of
    the input frames, moved by their rigid fits. Returns (rms (B,), max (B,)) float64.
    FloatingPointError when the forward graph returned NaN or Inf."""
    rms, worst = fit_error(predict(solved), observed, rigid, weights)
    if not (np.isfinite(rms).all() and np.isfinite(worst).all()):
        bad = int(np.argmin(np.isfinite(rms) & np.isfinite(worst)))
        raise FloatingPointError(f"frame {bad} of the batch: the forward graph returned NaN or Inf")
    return rms, worst


def rms_or_nan(rigid: RigidBatch | None) -> float:
    """The stabilisation residual of a batch of one, NaN when not stabilised."""
    return math.nan if rigid is None else float(rigid.rms[0])
