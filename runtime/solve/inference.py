"""onnxruntime sessions for a bundle's two graphs, with explicit thread settings.

A live server runs one frame at a time, so each session gets one intra-op thread by default and
sequential execution: extra threads cost more in wake-ups than they save on graphs this small
(common practice for latency-bound single-sample inference). Shapes are checked against the
bundle when the session opens, so a mismatched graph fails at startup, not on the first frame.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import onnxruntime as ort
from rigcast.runtime.bundle import (
    FORWARD_INPUT,
    FORWARD_OUTPUT,
    INVERSE_INPUT,
    INVERSE_OUTPUT,
    PROJECT_CENTRE,
    PROJECT_CONSTANTS,
    PROJECT_MOMENTS,
    PROJECT_NORM,
    PROJECT_POINTS,
    REFINE_CONTROLS,
    REFINE_CURVATURE,
    REFINE_GRADIENT,
    REFINE_MESH,
    REFINE_PROJECTION,
    REFINE_QUAD,
    REFINE_RESIDUAL,
    REFINE_TANGENTS,
    REFINE_WEIGHTS,
    Bundle,
    BundleError,
    RestOfMesh,
)
from rigcast.runtime.solve.moments import (
    BasisConstants,
    FrameMoments,
    moved_state,
    projection_state,
)
from rigcast.runtime.solve.refine import RefineError, Refiner, RefineSettings

log = logging.getLogger(__name__)

# What onnxruntime raises from loading and running a session. Its exception types live in a
# private module, so they are gathered here once, by name.
def _ort_errors() -> tuple[type[BaseException], ...]:
    try:
        from onnxruntime.capi import onnxruntime_pybind11_state as state
    except ImportError:  # pragma: no cover - other onnxruntime builds
        return (RuntimeError,)
    names = ("Fail", "InvalidArgument", "NoSuchFile", "NoModel", "EngineError",
             "RuntimeException", "InvalidProtobuf", "ModelLoaded", "NotImplemented",
             "InvalidGraph", "EPFail")
    found = tuple(getattr(state, n) for n in names if isinstance(getattr(state, n, None), type))
    return found or (RuntimeError,)


ORT_ERRORS: tuple[type[BaseException], ...] = _ort_errors()

#: the run options every call passes, made once: without them onnxruntime's binding makes a
#: default set on each call, about 1 us of a 13 us refinement-graph call (a live frame makes
#: about nine calls). Run reads them and never writes them, so the batch pool's threads share
#: them.
RUN_OPTIONS = ort.RunOptions()
RUN_OPTIONS.log_severity_level = 3


def open_session(onnx_bytes: bytes, *, threads: int) -> ort.InferenceSession:
    """An InferenceSession on the CPU provider with explicit threading; BundleError if invalid."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    # Spinning threads burn the core the other process needs on a 2-core machine.
    opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
    opts.log_severity_level = 3
    try:
        return ort.InferenceSession(onnx_bytes, sess_options=opts,
                                    providers=["CPUExecutionProvider"])
    except ORT_ERRORS as exc:
        raise BundleError(f"onnxruntime cannot load the graph: {exc}") from None


def _check_io(
    sess: ort.InferenceSession, graph: str, in_name: str, in_tail: Sequence[int],
    out_name: str, out_tail: Sequence[int],
) -> None:
    inputs, outputs = sess.get_inputs(), sess.get_outputs()
    if [i.name for i in inputs] != [in_name]:
        raise BundleError(f"{graph} graph must have one input {in_name!r}, "
                          f"has {[i.name for i in inputs]}")
    if out_name not in [o.name for o in outputs]:
        raise BundleError(f"{graph} graph has no output {out_name!r} "
                          f"(outputs: {[o.name for o in outputs]})")
    for label, arg, tail in (("input", inputs[0], in_tail),
                             ("output", next(o for o in outputs if o.name == out_name), out_tail)):
        if arg.type != "tensor(float)":
            raise BundleError(f"{graph} graph {label} {arg.name!r} must be float32, is {arg.type}")
        shape = list(arg.shape)
        if len(shape) != 1 + len(tail):
            raise BundleError(f"{graph} graph {label} {arg.name!r} has shape {shape}, "
                              f"expected (N, {', '.join(map(str, tail))})")
        for got, want in zip(shape[1:], tail, strict=True):
            if isinstance(got, int) and got != want:
                raise BundleError(f"{graph} graph {label} {arg.name!r} has shape {shape}, "
                                  f"expected (N, {', '.join(map(str, tail))})")


def _warm_up(graph: str, run: Callable[[np.ndarray], np.ndarray], x: np.ndarray) -> np.ndarray:
    """One run at open: a graph that cannot run (a fixed batch size, a bad kernel) fails here as
    BundleError, at startup or reload, never on the first frame."""
    try:
        return run(x)
    except ORT_ERRORS as exc:
        raise BundleError(f"the {graph} graph does not run on a batch of 1: {exc}") from None


# Forward graphs are trained to reproduce the neutral at the defaults to well under 1% of the
# bounding-box diagonal; 5% tells a graph of another rig with the same sizes from a merely
# imprecise one (a margin of our choosing, no published source).
REST_TOLERANCE_FRACTION = 0.05


def check_forward_rest(rest: np.ndarray, neutral: np.ndarray) -> None:
    """rest (V, 3): the forward graph at the defaults; neutral (V, 3). BundleError when their mean
    vertex distance exceeds REST_TOLERANCE_FRACTION of the neutral's bounding-box diagonal."""
    if not np.isfinite(rest).all():
        raise BundleError("forward graph returns NaN or Inf at the default controls")
    diag = float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0)))
    mean = float(np.linalg.norm(rest.astype(np.float64) - neutral, axis=1).mean())
    if mean > REST_TOLERANCE_FRACTION * diag:
        raise BundleError(f"forward graph at the default controls is {mean:.4g} mesh units from "
                          f"the bundle's neutral on average ({100 * mean / diag:.1f}% of the "
                          f"diagonal, limit {100 * REST_TOLERANCE_FRACTION:.0f}%): the graph "
                          "belongs to another rig, or the rig's neutral is not its pose at the "
                          "defaults")


@dataclass(frozen=True)
class SolvePass:
    """One solve of a batch: controls (N, C) float32, and in the moment form the frames'
    moments (what a realignment reuses; None otherwise)."""

    controls: np.ndarray
    moments: FrameMoments | None = None
    weights: np.ndarray | None = None  # (N, R) z at the controls from the refinement, or None


class MomentForm:
    """The moment form's sessions: the projection graph's moments and the refinement graph's
    basis weights z (runtime/solve/moments.py)."""

    def __init__(self, project: ort.InferenceSession, refine: ort.InferenceSession,
                 count: int, rest: RestOfMesh | None = None,
                 stable: np.ndarray | None = None, stable_home: np.ndarray | None = None) -> None:
        self.project, self.refine = project, refine
        self.tangents = REFINE_TANGENTS in {i.name for i in refine.get_inputs()}
        table, centre = project.run([PROJECT_CONSTANTS, PROJECT_CENTRE],
                                    {PROJECT_POINTS: np.zeros((1, count, 3), np.float32)},
                                    RUN_OPTIONS)
        self.constants = BasisConstants.from_outputs(table, centre)
        self._outs = [PROJECT_MOMENTS, PROJECT_NORM]
        r = self.constants.colsum.shape[0]
        if rest is not None and rest.basis.shape[0] != r:
            raise BundleError(f"refine_rest_basis has {rest.basis.shape[0]} rows, the moment "
                              f"graph's basis {r}")
        self.rest = rest
        centre = self.constants.centre.astype(np.float32)
        if rest is not None:  # the offset less the centre, as the realignment's fit reads it
            self._rest_offset = (rest.offset.reshape(-1, 3) - centre).reshape(-1)
        # The realignment's extra pairs, made once: the stable vertices (then the rest of the
        # mesh) it gathers from each frame, and the stable ones' place, less the centre.
        stable = np.zeros(0, np.int64) if stable is None else np.asarray(stable, np.int64)
        self.extra_indices = stable if rest is None else np.concatenate([stable, rest.indices])
        self.stable_home = (np.zeros((0, 3), np.float32) if stable_home is None
                            else (np.asarray(stable_home, np.float32) - centre))

    def rest_targets(self, z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """z (N, R) basis weights -> the forward model on the rest of the mesh less the centre
        (N, W, 3) float32 (offset + basis^T z - centre; ``rest`` must be set), into ``out``
        (N, W, 3) float32 when given (no temporary)."""
        assert self.rest is not None
        n = z.shape[0]
        if out is None:
            out = np.empty((n, self.rest.indices.shape[0], 3), np.float32)
        flat = out.reshape(n, -1)  # a view when out's rows are contiguous, else a copy
        np.matmul(z.astype(np.float32), self.rest.basis, out=flat)
        flat += self._rest_offset
        if not np.may_share_memory(flat, out):  # reshape made a copy: put it back
            out[...] = flat.reshape(out.shape)
        return out

    def moments(self, points: np.ndarray) -> FrameMoments:
        """points (N, S, 3) float32 -> their FrameMoments."""
        mo, norm = self.project.run(self._outs, {PROJECT_POINTS: np.ascontiguousarray(points)},
                                    RUN_OPTIONS)
        return FrameMoments.from_outputs(mo, norm)

    def weights_at(self, controls: np.ndarray, made: np.ndarray | None) -> np.ndarray:
        """:meth:`weights`, taking the rows the refinement already made (``made`` (N, R), from
        ``Refiner.solve``: NaN rows and None are made here): the same numbers, since the graph
        makes z from the controls alone, with one graph evaluation fewer."""
        if made is None:
            return self.weights(controls)
        z = np.array(made, np.float64)  # a copy: the NaN rows are filled in place
        todo = np.isnan(z).any(axis=1)
        if todo.any():
            z[todo] = self.weights(controls[todo])
        return z

    def weights(self, controls: np.ndarray) -> np.ndarray:
        """controls (N, C) float32 -> z (N, R) float64, the forward model on S = offset + A^T z."""
        r = self.constants.colsum.shape[0]
        feed = {REFINE_CONTROLS: controls,
                REFINE_PROJECTION: np.zeros((controls.shape[0], r), np.float32)}
        if self.tangents:
            feed[REFINE_TANGENTS] = np.zeros((controls.shape[0], 0, controls.shape[1]), np.float32)
        z = self.refine.run([REFINE_WEIGHTS], feed, RUN_OPTIONS)[0]
        return np.asarray(z, np.float64)


class InverseModel:
    """The bundle's solve: the frame's solve points (N, len(point_indices), 3) -> controls (N, C).

    The inverse graph on the first K points (the network's input vertices), then, when the
    bundle has a refinement graph and ``refine`` is not ``RefineSettings(steps=0)``, the bounded
    Gauss-Newton steps of ``runtime.solve.refine`` on the vertices the refinement fits: the points
    after the first K for a projected refinement, the K input vertices for an older one.
    ``point_indices``: the vertices a caller gathers (in the neutral's frame) for ``solve``;
    ``moment_form``: set for bundles whose projection is in moment form.
    """

    def __init__(self, bundle: Bundle, *, threads: int = 1,
                 refine: RefineSettings | None = None) -> None:
        self.k = int(bundle.input_indices.shape[0])
        self.c = bundle.control_count
        self.session = open_session(bundle.inverse_onnx, threads=threads)
        _check_io(self.session, "inverse", INVERSE_INPUT, (self.k, 3), INVERSE_OUTPUT, (self.c,))
        self._outputs = [INVERSE_OUTPUT]
        self.refiner: Refiner | None = None
        self.moment_form: MomentForm | None = None
        self.point_indices = np.asarray(bundle.input_indices, np.int64)
        if bundle.refine_onnx is not None and bundle.refine_hessian is not None:
            self.refiner, self.moment_form = _refiner(bundle, threads, refine)
            fit = bundle.manifest.get("fit_rms_train")  # the build's check: the served
            # solve's per-pose RMS fit on held-out clean poses, over all V vertices
            if self.refiner is not None and isinstance(fit, int | float) and fit > 0:
                # its mean square put on the S vertices the refinement reads, per coordinate
                share = bundle.vertex_count / max(self.refiner.coords / 3.0, 1.0)
                self.refiner.model_error = float(fit) ** 2 * max(share, 1.0) / 3.0
            if bundle.refine_projection is not None:
                self.point_indices = np.concatenate([self.point_indices,
                                                     bundle.refine_projection.indices])
        self.point_indices.setflags(write=False)
        out = _warm_up("inverse", self.solve,
                       np.asarray(bundle.neutral[self.point_indices], np.float32)[None])
        if out.shape != (1, self.c):
            raise BundleError(f"inverse graph returned shape {out.shape}, expected (1, {self.c})")
        if not np.isfinite(out).all():
            raise BundleError("inverse graph returns NaN or Inf on the neutral mesh")

    def solve(self, points: np.ndarray) -> np.ndarray:
        """points (N, len(point_indices), 3) float32 -> controls (N, C) float32."""
        return self.solve_pass(points).controls

    def network(self, points: np.ndarray) -> np.ndarray:
        """The inverse graph alone: the K input points (N, K, 3) float32 -> controls (N, C)."""
        out: np.ndarray = self.session.run(self._outputs,
                                           {INVERSE_INPUT: np.ascontiguousarray(points)},
                                           RUN_OPTIONS)[0]
        return out

    def solve_pass(self, points: np.ndarray) -> SolvePass:
        """points (N, len(point_indices), 3) float32 -> SolvePass (controls (N, C) float32)."""
        k = self.k
        if points.ndim != 3 or points.shape[1:] != (self.point_indices.shape[0], 3):
            raise BundleError(f"solve needs the frames' {self.point_indices.shape[0]} solve "
                              f"points (N, {self.point_indices.shape[0]}, 3), got {points.shape}")
        result = self.network(points if points.shape[1] == k else points[:, :k])
        if self.refiner is None or not np.isfinite(result).all():
            return SolvePass(result)
        if self.moment_form is not None:
            fm = self.moment_form.moments(points[:, k:])
            solved, z = self.refiner.solve(result, state=projection_state(fm))
            return SolvePass(solved, fm, z)
        return SolvePass(self.refiner.refine(result, points[:, k:] if points.shape[1] > k
                                             else points))

    def solve_moved(self, inputs: np.ndarray, moments: FrameMoments, linear: np.ndarray,
                    shift: np.ndarray) -> np.ndarray:
        """Solve again after a realignment, in the moment form, without projecting the frames
        again: inputs (N, K, 3) the network's input points already moved; moments the frames'
        first moments; x -> linear x + shift (centred, see ``moments.moved_state``) the move.
        -> controls (N, C) float32."""
        assert self.refiner is not None and self.moment_form is not None
        result = self.network(inputs)
        if not np.isfinite(result).all():
            return result
        state = moved_state(moments, self.moment_form.constants, linear, shift)
        return self.refiner.refine(result, state=state)


def refine_settings(bundle: Bundle) -> RefineSettings:
    """The refinement settings the bundle was built and checked with (defaults if none)."""
    section = bundle.manifest.get("refine")
    if not isinstance(section, dict):
        return RefineSettings()
    try:
        return RefineSettings.from_manifest(section)
    except RefineError as exc:
        raise BundleError(f"bundle manifest 'refine' section is invalid: {exc}") from None


def _refiner(bundle: Bundle, threads: int, settings: RefineSettings | None
             ) -> tuple[Refiner, MomentForm | None]:
    assert bundle.refine_onnx is not None and bundle.refine_hessian is not None
    session = open_session(bundle.refine_onnx, threads=threads)
    projected = bundle.refine_projection
    want_in = [REFINE_CONTROLS, REFINE_MESH if projected is None else REFINE_PROJECTION]
    names = [REFINE_GRADIENT, REFINE_RESIDUAL if projected is None else REFINE_QUAD]
    got_in = sorted(i.name for i in session.get_inputs())
    got_out = {o.name for o in session.get_outputs()}
    # bundles since the curvature at the current point: tangents in, the curvature along them out
    curved = projected is not None and REFINE_TANGENTS in got_in and REFINE_CURVATURE in got_out
    if curved:
        want_in.append(REFINE_TANGENTS)
    if got_in != sorted(want_in) or not set(names) <= got_out:
        raise BundleError(f"refine graph must map {tuple(want_in)} to {tuple(names)}; has "
                          f"{got_in} -> {sorted(got_out)}")
    schema = bundle.schema
    c = int(schema.lower.shape[0])
    chosen = settings or refine_settings(bundle)
    if projected is None:
        def gradient(controls: np.ndarray, mesh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            g, rss = session.run(names, {REFINE_CONTROLS: controls, REFINE_MESH: mesh},
                                 RUN_OPTIONS)
            return g, rss

        return Refiner(gradient, bundle.refine_hessian, schema.lower, schema.upper,
                       schema.defaults, 3 * int(bundle.input_indices.shape[0]), chosen), None
    project = open_session(projected.project_onnx, threads=threads)
    got_in = [i.name for i in project.get_inputs()]
    p_out = {o.name for o in project.get_outputs()}
    moment = {PROJECT_MOMENTS, PROJECT_NORM, PROJECT_CONSTANTS, PROJECT_CENTRE} <= p_out
    if got_in != [PROJECT_POINTS] or not (moment or {REFINE_PROJECTION, PROJECT_NORM} <= p_out):
        raise BundleError(f"refine projection graph must map {PROJECT_POINTS!r} to "
                          f"({PROJECT_MOMENTS!r}, {PROJECT_NORM!r}) or ({REFINE_PROJECTION!r}, "
                          f"{PROJECT_NORM!r}); has {got_in} -> {sorted(p_out)}")
    if moment and REFINE_WEIGHTS not in got_out:
        raise BundleError(f"refine graph of a moment-form bundle lacks output {REFINE_WEIGHTS!r}")
    count = int(projected.indices.shape[0])
    form = (MomentForm(project, session, count, projected.rest, bundle.stable_indices,
                       bundle.neutral[bundle.stable_indices]) if moment else None)
    outs = [REFINE_PROJECTION, PROJECT_NORM]
    # a moment-form graph's basis weights come with every evaluation (the graph makes them on
    # the way to the gradient): the realignment takes those at the refined controls
    extra = [REFINE_WEIGHTS] if moment else []

    def prepare(points: np.ndarray) -> np.ndarray:
        """points (N, S, 3) -> (N, R + 1) float64: the projection, then |y|^2."""
        if form is not None:
            return projection_state(form.moments(points))
        proj, norm = project.run(outs, {PROJECT_POINTS: np.ascontiguousarray(points)},
                                 RUN_OPTIONS)
        return np.concatenate([proj, norm[:, None]], axis=1, dtype=np.float64)

    def gradient_projected(controls: np.ndarray, state: np.ndarray) -> tuple[np.ndarray, ...]:
        return bind(state)(controls)

    def bind(state: np.ndarray) -> Callable[[np.ndarray], tuple[np.ndarray, ...]]:
        """The gradient on fixed frames: their projection in float32 and |y|^2 made once."""
        feed = {REFINE_PROJECTION: state[:, :-1].astype(np.float32)}
        if curved:
            feed[REFINE_TANGENTS] = np.zeros((state.shape[0], 0, c), np.float32)
        norm = state[:, -1]
        wanted = [*names, *extra]

        def run(controls: np.ndarray) -> tuple[np.ndarray, ...]:
            feed[REFINE_CONTROLS] = controls
            g, quad, *z = session.run(wanted, feed, RUN_OPTIONS)
            return g, norm + quad, *z

        return run

    def curvature(controls: np.ndarray, state: np.ndarray, tangents: np.ndarray
                  ) -> tuple[np.ndarray, ...]:
        """The gradient, |r|^2 and the Gauss-Newton matrix along tangents (N, T, C) (and the
        basis weights)."""
        return bind_curvature(state)(controls, tangents)

    def bind_curvature(state: np.ndarray) -> Callable[[np.ndarray, np.ndarray],
                                                      tuple[np.ndarray, ...]]:
        """``curvature`` on fixed frames: their projection and |y|^2 made once."""
        feed = {REFINE_PROJECTION: state[:, :-1].astype(np.float32)}
        norm = state[:, -1]
        wanted = [*names, REFINE_CURVATURE, *extra]

        def run(controls: np.ndarray, tangents: np.ndarray) -> tuple[np.ndarray, ...]:
            feed[REFINE_CONTROLS], feed[REFINE_TANGENTS] = controls, tangents
            g, quad, h, *z = session.run(wanted, feed, RUN_OPTIONS)
            return g, norm + quad, h, *z

        return run

    return Refiner(gradient_projected, bundle.refine_hessian, schema.lower, schema.upper,
                   schema.defaults, 3 * count, chosen, prepare, bind,
                   curvature if curved else None, bind_curvature if curved else None), form


class ForwardModel:
    """The bundle's forward graph: controls (N, C) -> vertices (N, V, 3)."""

    def __init__(self, bundle: Bundle, *, threads: int = 1) -> None:
        self.c = bundle.control_count
        self.v = bundle.vertex_count
        self.session = open_session(bundle.forward_onnx, threads=threads)
        _check_io(self.session, "forward", FORWARD_INPUT, (self.c,), FORWARD_OUTPUT, (self.v, 3))
        self._outputs = [FORWARD_OUTPUT]
        out = _warm_up("forward", self.evaluate, bundle.schema.defaults[None])
        if out.shape != (1, self.v, 3):
            raise BundleError(f"forward graph returned shape {out.shape}, "
                              f"expected (1, {self.v}, 3)")
        check_forward_rest(out[0], bundle.neutral)

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls (N, C) float32 -> vertices (N, V, 3) float32."""
        result: np.ndarray = self.session.run(self._outputs, {FORWARD_INPUT: controls},
                                              RUN_OPTIONS)[0]
        return result
