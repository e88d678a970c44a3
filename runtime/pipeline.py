"""The per-frame stages of one stream: stabilise -> infer -> filter -> clamp -> publish, then fit.

Each stage is a small function over numpy arrays; :class:`StreamState` holds what persists between
frames (filter state, buffers, counters) and :class:`StreamModel` what comes from a bundle, so a
reload swaps one object. Timings are ``time.perf_counter_ns`` around each stage.

The fit error (forward model on the solved controls against the stabilised input) runs after
the publish, so it never delays it. It uses the solved controls before the temporal filter: the
filter's lag on fast motion is not a property of the mesh, and off-manifold is. A frame found
off-manifold therefore cannot carry the flag itself: the OFF_MANIFOLD flag goes on the *next*
published frame of the stream, and the exact frame number goes out at once in an
``off_manifold`` event and in telemetry.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.runtime import protocol
from rigcast.runtime.align import RigidTransform, StableTarget, stabilise_fast, stable_target
from rigcast.runtime.bundle import Bundle, BundleError, load_bundle
from rigcast.runtime.config import StreamConfig
from rigcast.runtime.inference import ForwardModel, InverseModel
from rigcast.runtime.manifold import (
    ManifoldConfig,
    ManifoldTracker,
    floor_for_bundle,
    training_fit_error,
)
from rigcast.runtime.one_euro import OneEuroFilter, OneEuroParams
from rigcast.runtime.telemetry import StreamTelemetry

log = logging.getLogger(__name__)

@dataclass(frozen=True)
class StreamModel:
    """A loaded bundle with its sessions and precomputed arrays; immutable, swapped whole."""

    label: str
    bundle: Bundle
    inverse: InverseModel
    forward: ForwardModel
    neutral_stable: np.ndarray  # (S, 3) float64
    stable_target: StableTarget  # the neutral's stable statistics, for stabilise_fast
    lower: np.ndarray  # (C,) float32
    upper: np.ndarray  # (C,) float32
    floor: float  # the adaptive off-manifold rule's floor (mesh units)
    fixed_threshold: float | None = None  # a fixed RMS limit instead of the adaptive rule

    @property
    def vertex_count(self) -> int:
        return self.bundle.vertex_count


def load_stream_model(
    path: Path, *, threads: int, threshold: float | None, factor: float
) -> StreamModel:
    """Load, validate and open a bundle; BundleError on any problem (file, graph, shapes)."""
    bundle = load_bundle(path)
    neutral_stable = bundle.neutral[bundle.stable_indices].astype(np.float64)
    inverse = InverseModel(bundle, threads=threads)
    forward = ForwardModel(bundle, threads=threads)
    floor = floor_for_bundle(bundle.manifest, bundle.neutral, factor)
    if threshold is None and training_fit_error(bundle.manifest) is None:
        log.info("bundle %s has no training fit figure; off-manifold floor %.4g "
                 "(0.1%% of the bounding-box diagonal)", path, floor)
    return StreamModel(
        label=str(path),
        bundle=bundle,
        inverse=inverse,
        forward=forward,
        neutral_stable=neutral_stable,
        stable_target=stable_target(neutral_stable),
        lower=bundle.schema.lower,
        upper=bundle.schema.upper,
        floor=float(floor),
        fixed_threshold=None if threshold is None else float(threshold),
    )


def check_compatible(old: StreamModel, new: StreamModel) -> None:
    """A reload keeps the stream's vertex count and control schema, or it is refused: senders and
    subscribers were built against them, and the filter state is per control."""
    if new.vertex_count != old.vertex_count:
        raise BundleError(f"new bundle has {new.vertex_count} vertices, the stream has "
                          f"{old.vertex_count}; start a new stream for a different mesh")
    if new.bundle.schema != old.bundle.schema:
        raise BundleError("new bundle has a different control schema; start a new stream "
                          "for a different rig")


@dataclass(frozen=True)
class FrameResult:
    """What happened to one published frame. stage_ns follows telemetry.STAGES."""

    stream: str
    frame: int
    t_send_ns: int
    t_recv_ns: int
    t_pub_ns: int
    controls: np.ndarray  # (C,) float32, as published
    solved: np.ndarray  # (C,) float32, the inverse's output before the filter
    flags: int
    stage_ns: tuple[int, int, int, int, int, int]
    pose: RigidTransform | None
    stabilise_rms: float


def gather(vertices: np.ndarray, indices: np.ndarray, out: np.ndarray) -> np.ndarray:
    """vertices (V, 3), indices (K,), out (K, 3) -> out filled with vertices[indices]."""
    np.take(vertices, indices, axis=0, out=out)
    return out


def transform_subset(vertices: np.ndarray, indices: np.ndarray, pose: RigidTransform,
                     out: np.ndarray) -> np.ndarray:
    """pose.apply(vertices[indices]) into out: vertices (V, 3) float32, indices (K,), out (K, 3)
    float32. Only the K vertices the inverse reads are moved, never all V."""
    np.take(vertices, indices, axis=0, out=out)
    # out[k] = s R out[k] + t, as one (K, 3) @ (3, 3) product in place
    np.matmul(out, (pose.scale * pose.rotation.T).astype(np.float32), out=out)
    out += pose.translation.astype(np.float32)
    return out


def clamp(values: np.ndarray, lower: np.ndarray, upper: np.ndarray,
          out: np.ndarray) -> tuple[np.ndarray, bool]:
    """values (C,), lower/upper (C,) -> (out (C,) float32 in bounds, whether any was clipped)."""
    clipped = bool(np.any(values < lower) or np.any(values > upper))
    np.clip(values, lower, upper, out=out)
    return out, clipped


def fit_error(predicted: np.ndarray, observed: np.ndarray) -> tuple[float, float]:
    """predicted, observed (V, 3) -> (RMS, max) of the per-vertex Euclidean distance."""
    diff = predicted - observed
    # d2[v] = sum_x diff[v, x]^2
    d2 = np.einsum("vx,vx->v", diff, diff)
    return math.sqrt(float(d2.mean())), math.sqrt(float(d2.max()))


def fit_error_posed(
    predicted: np.ndarray, vertices: np.ndarray, pose: RigidTransform | None,
    buf: np.ndarray, d2: np.ndarray,
) -> tuple[float, float]:
    """fit_error(predicted, pose.apply(vertices)) without temporaries, for the server.

    predicted, vertices (V, 3) float32; buf (V, 3) and d2 (V,) float32 scratch buffers.
    """
    if pose is None:
        np.subtract(vertices, predicted, out=buf)
    else:
        # buf[v] = s R vertices[v] + t - predicted[v]
        np.matmul(vertices, (pose.scale * pose.rotation.T).astype(np.float32), out=buf)
        buf += pose.translation.astype(np.float32)
        buf -= predicted
    # d2[v] = sum_x buf[v, x]^2, as in-place square + two strided adds (einsum is 3x slower)
    np.square(buf, out=buf)
    np.add(buf[:, 0], buf[:, 1], out=d2)
    np.add(d2, buf[:, 2], out=d2)
    return math.sqrt(float(d2.mean(dtype=np.float64))), math.sqrt(float(d2.max()))


def fit_error_naive(predicted: np.ndarray, observed: np.ndarray) -> tuple[float, float]:
    """Twin of fit_error with a loop over vertices."""
    dists = [float(np.linalg.norm(np.asarray(p, np.float64) - np.asarray(o, np.float64)))
             for p, o in zip(predicted, observed, strict=True)]
    return math.sqrt(sum(d * d for d in dists) / len(dists)), max(dists)


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


def make_filter(config: StreamConfig, model: StreamModel) -> OneEuroFilter:
    schema = model.bundle.schema
    default = (config.min_cutoff, config.beta, config.d_cutoff)
    groups = {g.group: (g.min_cutoff, g.beta, g.d_cutoff) for g in config.groups}
    params = (OneEuroParams.per_group(schema, groups, default) if groups
              else OneEuroParams.uniform(len(schema), *default))
    params = params.per_unit_range(schema.upper - schema.lower)
    return OneEuroFilter(params, passthrough=config.passthrough,
                         gap_ns=int(config.gap_ms * 1e6))


class StreamState:
    """Everything that persists between frames of one stream."""

    def __init__(self, config: StreamConfig, model: StreamModel, window: int) -> None:
        self.config = config
        self.telemetry = StreamTelemetry(config.stream, window)
        self.filter = make_filter(config, model)
        self.model = model
        self.last_t_send_ns: int | None = None
        self.pending_off_manifold = False
        self.dropped_since_publish = 0
        self.frames_since_fit = 0
        self.last_pose: RigidTransform | None = None
        self.swap(model)

    def swap(self, model: StreamModel) -> None:
        """Install a model between frames; buffers follow its sizes, filter state is kept."""
        self.model = model
        k = model.bundle.input_indices.shape[0]
        self._subset = np.empty((1, k, 3), dtype=np.float32)
        self._controls = np.empty(model.bundle.control_count, dtype=np.float32)
        self._fit_buf = np.empty((model.vertex_count, 3), dtype=np.float32)
        self._fit_d2 = np.empty(model.vertex_count, dtype=np.float32)
        self.telemetry.bundle = model.label
        self.stabilise = stabilise_for(self.config.stabilise, model.bundle, self.config.stream)
        # A new bundle has its own error level: the adaptive detector starts over.
        self.manifold = (ManifoldTracker(ManifoldConfig(floor=model.floor))
                         if model.fixed_threshold is None else None)
        self.last_threshold = (math.inf if model.fixed_threshold is None
                               else model.fixed_threshold)

    def is_stale(self, t_send_ns: int) -> bool:
        """A frame not newer (by the sender's clock) than the last one processed."""
        return self.last_t_send_ns is not None and t_send_ns <= self.last_t_send_ns

    def process(
        self, mesh: protocol.MeshFrame, t_recv_ns: int, recv_perf_ns: int, decode_ns: int,
        send: Callable[[list[bytes]], None],
    ) -> FrameResult:
        """Stabilise, infer, filter, clamp and publish one frame.

        t_recv_ns: wall clock at receipt (goes on the wire); recv_perf_ns: perf_counter_ns at
        receipt (the total runs from it to the send); decode_ns: decode time, timed by the caller.
        """
        model, cfg = self.model, self.config
        t0 = time.perf_counter_ns()
        pose: RigidTransform | None = None
        rms = math.nan
        subset = self._subset
        if self.stabilise:
            pose, rms = stabilise_fast(mesh.vertices, model.bundle.stable_indices,
                                       model.stable_target, scale=cfg.stabilise_scale)
            # Only the K input vertices are moved on the hot path; the fit error moves the rest.
            transform_subset(mesh.vertices, model.bundle.input_indices, pose, subset[0])
        else:
            gather(mesh.vertices, model.bundle.input_indices, subset[0])
        t1 = time.perf_counter_ns()
        raw = model.inverse.solve(subset)[0]
        if not np.isfinite(raw).all():
            # Finite but extreme input can overflow inside the graph; never let it into the
            # filter state, which would stay NaN for the rest of the stream.
            raise FloatingPointError(f"frame {mesh.frame}: the inverse returned NaN or Inf")
        t2 = time.perf_counter_ns()
        filtered = self.filter(raw, mesh.t_send_ns, mesh.frame)
        values, clipped = clamp(filtered, model.lower, model.upper, self._controls)
        t3 = time.perf_counter_ns()
        flags = 0
        if self.filter.filtered:
            flags |= protocol.FLAG_FILTERED
        if clipped:
            flags |= protocol.FLAG_CLAMPED
            self.telemetry.clamped += 1
        if self.pending_off_manifold:
            flags |= protocol.FLAG_OFF_MANIFOLD
            self.pending_off_manifold = False
        if self.dropped_since_publish:
            flags |= protocol.FLAG_STALE
            self.dropped_since_publish = 0
        t_pub = time.time_ns()
        send(protocol.encode_controls(cfg.stream, mesh.frame, mesh.t_send_ns, t_recv_ns, t_pub,
                                      values, flags))
        t4 = time.perf_counter_ns()
        self.last_t_send_ns = mesh.t_send_ns
        self.telemetry.filter_resets = self.filter.resets
        stage_ns = (decode_ns, t1 - t0, t2 - t1, t3 - t2, t4 - t3, t4 - recv_perf_ns)
        return FrameResult(cfg.stream, mesh.frame, mesh.t_send_ns, t_recv_ns, t_pub,
                           values.copy(), raw.copy(), flags, stage_ns, pose, rms)

    def wants_fit(self, mode: str, every: int) -> bool:
        if mode == "off":
            return False
        if mode == "after_publish":
            return True
        self.frames_since_fit += 1
        if self.frames_since_fit >= every:
            self.frames_since_fit = 0
            return True
        return False

    def fit(self, result: FrameResult, vertices: np.ndarray) -> tuple[float, float, bool]:
        """Fit error of a published frame (after its publish); returns (rms, max, off_manifold)."""
        model = self.model
        predicted = model.forward.evaluate(result.solved[None])[0]
        if self._fit_buf.shape != predicted.shape:
            self._fit_buf = np.empty(predicted.shape, np.float32)
            self._fit_d2 = np.empty(predicted.shape[0], np.float32)
        rms, worst = fit_error_posed(predicted, vertices, result.pose, self._fit_buf,
                                     self._fit_d2)
        if not (math.isfinite(rms) and math.isfinite(worst)):
            # Never let NaN into the fit windows or the adaptive detector.
            raise FloatingPointError(f"frame {result.frame}: the forward graph returned NaN or Inf")
        if self.manifold is None:  # a fixed RMS limit (set in swap)
            off = rms > self.last_threshold
        else:  # adaptive, on the worst vertex; nothing is flagged during its warm-up
            off = self.manifold.update(worst)
            self.last_threshold = self.manifold.threshold
        if off:
            self.pending_off_manifold = True
        self.telemetry.record_fit(result.frame, rms, worst, off)
        return rms, worst, off


def rotation_to_quaternion(rotation: np.ndarray) -> np.ndarray:
    """rotation (3, 3) proper rotation -> unit quaternion (4,) as (w, x, y, z), w >= 0.

    Shepperd's method (J. Guidance and Control 1(3), 1978): take the largest of the four squared
    components from the trace and the diagonal, then the others from off-diagonal sums.
    """
    m = np.asarray(rotation, dtype=np.float64)
    tr = m[0, 0] + m[1, 1] + m[2, 2]
    candidates = np.array([tr, m[0, 0], m[1, 1], m[2, 2]])
    i = int(np.argmax(candidates))
    if i == 0:
        s = 2.0 * math.sqrt(1.0 + tr)
        q = [0.25 * s, (m[2, 1] - m[1, 2]) / s, (m[0, 2] - m[2, 0]) / s, (m[1, 0] - m[0, 1]) / s]
    elif i == 1:
        s = 2.0 * math.sqrt(1.0 + m[0, 0] - m[1, 1] - m[2, 2])
        q = [(m[2, 1] - m[1, 2]) / s, 0.25 * s, (m[0, 1] + m[1, 0]) / s, (m[0, 2] + m[2, 0]) / s]
    elif i == 2:
        s = 2.0 * math.sqrt(1.0 + m[1, 1] - m[0, 0] - m[2, 2])
        q = [(m[0, 2] - m[2, 0]) / s, (m[0, 1] + m[1, 0]) / s, 0.25 * s, (m[1, 2] + m[2, 1]) / s]
    else:
        s = 2.0 * math.sqrt(1.0 + m[2, 2] - m[0, 0] - m[1, 1])
        q = [(m[1, 0] - m[0, 1]) / s, (m[0, 2] + m[2, 0]) / s, (m[1, 2] + m[2, 1]) / s, 0.25 * s]
    out = np.array(q)
    out /= np.linalg.norm(out)
    return out if out[0] >= 0 else -out


def head_pose(stabiliser: RigidTransform) -> dict[str, Any]:
    """The head's pose relative to the neutral (the inverse of the stabilising transform)."""
    pose = stabiliser.inverse()
    return {
        "quaternion_wxyz": rotation_to_quaternion(pose.rotation).tolist(),
        "translation": pose.translation.tolist(),
        "scale": float(pose.scale),
        "angle_deg": pose.angle_deg,
    }
