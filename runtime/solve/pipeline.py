"""One live stream: the solve core (runtime/solve/solve_core.py) on a batch of one frame, then publish.

:class:`StreamState` holds what persists between frames of a stream (filter state, buffers,
counters); the model (``solve_core.SolveModel``) comes from a bundle, so a reload swaps one
object. Timings are ``time.perf_counter_ns`` around each stage.

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
from typing import Any

import numpy as np
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.messages import PublishedMesh
from rigcast.runtime.serve.bundle_quality import bundle_quality
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.serve.telemetry import StreamTelemetry
from rigcast.runtime.solve.align import RigidBatch, RigidTransform
from rigcast.runtime.solve.head_pose import HeadPose, rotation_to_quaternion
from rigcast.runtime.solve.manifold import ManifoldConfig, ManifoldTracker
from rigcast.runtime.solve.solve_core import (
    SolveModel,
    build_filter,
    check_compatible,
    filter_and_clamp,
    frame_fit_error,
    load_stream_model,
    rms_or_nan,
    solve_points,
    stabilise_for,
    stabilise_frames,
)
from rigcast.runtime.solve.stages import ease_towards

log = logging.getLogger(__name__)

# The names the server and the reloader use for a stream's model.
StreamModel = SolveModel
__all__ = ["FrameResult", "PendingFrame", "StreamModel", "StreamState", "check_compatible",
           "load_stream_model", "rotation_to_quaternion"]


@dataclass(frozen=True, slots=True)
class PendingFrame:
    """A stream's newest valid mesh of one drain, waiting to be processed (runtime/serve/server.py).

    t_recv_ns: wall clock at receipt; perf_recv_ns: perf_counter_ns at receipt; decode_ns: its
    decode time; keep: the received ZeroMQ frames, which ``mesh.vertices`` views without a copy,
    held until the frame's fit error has run."""

    identity: bytes
    mesh: protocol.MeshFrame
    t_recv_ns: int
    perf_recv_ns: int
    decode_ns: int
    keep: Any


@dataclass(frozen=True)
class FrameResult:
    """What happened to one published frame. stage_ns follows telemetry.STAGES."""

    stream: str
    frame: int
    t_send_ns: int
    t_recv_ns: int
    t_pub_ns: int
    controls: np.ndarray  # (C,) float32, as published
    solved: np.ndarray  # (1, C) float32, the inverse's output before the filter
    flags: int
    stage_ns: tuple[int, int, int, int, int, int]
    rigid: RigidBatch | None  # the frame's stabilising fit (a batch of one), None when off
    head_pose: HeadPose | None  # the head motion the fit removed, as published
    unheld: np.ndarray | None = None  # (C,) the filter's controls when held or eased (FLAG_HELD)

    @property
    def pose(self) -> RigidTransform | None:
        return None if self.rigid is None else self.rigid.pose(0)

    @property
    def stabilise_rms(self) -> float:
        return rms_or_nan(self.rigid)


class StreamState:
    """Everything that persists between frames of one stream."""

    def __init__(self, config: StreamConfig, model: SolveModel, window: int) -> None:
        self.config = config
        self.telemetry = StreamTelemetry(config.stream, window)
        self.model = model
        self.filter = build_filter(config, model.bundle.schema)
        self.last_t_send_ns: int | None = None
        self.pending_off_manifold = False
        self.dropped_since_publish = 0
        self.frames_since_fit = 0
        # Hold on flagged frames (config.OffManifoldAction): the last fit's verdict, the
        # controls of the newest frame found on the manifold, and the last published controls.
        self.off_now = False
        self.last_good: np.ndarray | None = None
        self.last_published: np.ndarray | None = None
        self.swap(model)

    def restart_filter(self) -> None:
        """A new sender or session: the filter starts over, and nothing is held from before."""
        self.filter = build_filter(self.config, self.model.bundle.schema)
        self.off_now = False
        self.last_good = None

    def swap(self, model: SolveModel) -> None:
        """Install a model between frames; buffers follow its sizes, filter state is kept."""
        self.model = model
        k = model.inverse.point_indices.shape[0]
        self._inputs = np.empty((1, k, 3), dtype=np.float32)
        self._controls = np.empty((1, model.bundle.control_count), dtype=np.float32)
        self._t = np.zeros(1, np.int64)
        self._frame = np.zeros(1, np.int64)
        self.telemetry.bundle = model.label
        self.telemetry.bundle_quality = bundle_quality(
            model.bundle.manifest, model.bundle.control_count).to_wire()
        self.stabilise = stabilise_for(self.config.stabilise, model.bundle, self.config.stream)
        # A new bundle has its own error level: the adaptive detector starts over.
        self.manifold = (ManifoldTracker(ManifoldConfig(floor=model.floor))
                         if model.fixed_threshold is None else None)
        self.last_threshold = (math.inf if model.fixed_threshold is None
                               else model.fixed_threshold)
        self.telemetry.threshold = model.fixed_threshold  # the adaptive one once warmed up
        self.telemetry.threshold_on = "rms" if model.fixed_threshold is not None else "max"
        self.off_now = False

    def is_stale(self, t_send_ns: int) -> bool:
        """A frame not newer (by the sender's clock) than the last one processed."""
        return self.last_t_send_ns is not None and t_send_ns <= self.last_t_send_ns

    def process(
        self, mesh: protocol.MeshFrame, t_recv_ns: int, recv_perf_ns: int, decode_ns: int,
        send: Callable[[list[bytes]], None],
    ) -> FrameResult:
        """Stabilise, infer, filter, clamp and publish one frame (the solve core on a batch of
        one). t_recv_ns: wall clock at receipt (goes on the wire); recv_perf_ns: perf_counter_ns
        at receipt (the total runs from it to the send); decode_ns: decode time, timed by the
        caller."""
        model, cfg = self.model, self.config
        t0 = time.perf_counter_ns()
        inputs, rigid = stabilise_frames(model, mesh.vertices[None], stabilise=self.stabilise,
                                         scale=cfg.stabilise_scale, inputs=self._inputs)
        t1 = time.perf_counter_ns()
        solved, rigid = solve_points(model, mesh.vertices[None], inputs, rigid,
                                     passes=cfg.realign, scale=cfg.stabilise_scale,
                                     first_frame=mesh.frame, inputs=self._inputs)
        t2 = time.perf_counter_ns()
        self._t[0] = mesh.t_send_ns
        self._frame[0] = mesh.frame
        values, filtered, clipped = filter_and_clamp(model, self.filter, solved, self._t,
                                                     self._frame, self._controls)
        unheld = None
        if self.off_now and cfg.on_off_manifold != "pass" and self.last_good is not None:
            unheld = values[0].copy()
            values[0] = self._held(mesh.t_send_ns)
        t3 = time.perf_counter_ns()
        flags = 0
        if unheld is not None:  # the flag stays set on every held frame
            flags |= protocol.FLAG_HELD | protocol.FLAG_OFF_MANIFOLD
            self.telemetry.held += 1
        if filtered[0]:
            flags |= protocol.FLAG_FILTERED
        if clipped[0]:
            flags |= protocol.FLAG_CLAMPED
            self.telemetry.clamped += 1
        if self.pending_off_manifold:
            flags |= protocol.FLAG_OFF_MANIFOLD
            self.pending_off_manifold = False
        if self.dropped_since_publish:
            flags |= protocol.FLAG_STALE
            self.dropped_since_publish = 0
        head = None if rigid is None else HeadPose.from_stabiliser(rigid.pose(0))
        t_pub = time.time_ns()
        send(protocol.encode_controls(cfg.stream, mesh.frame, mesh.t_send_ns, t_recv_ns, t_pub,
                                      values[0], flags, head, mesh.timecode))
        t4 = time.perf_counter_ns()
        self.last_t_send_ns = mesh.t_send_ns
        self.telemetry.filter_resets = self.filter.resets
        self.telemetry.timecode = mesh.timecode
        stage_ns = (decode_ns, t1 - t0, t2 - t1, t3 - t2, t4 - t3, t4 - recv_perf_ns)
        result = FrameResult(cfg.stream, mesh.frame, mesh.t_send_ns, t_recv_ns, t_pub,
                             values[0].copy(), solved, flags, stage_ns, rigid, head, unheld)
        self.last_published = result.controls
        return result

    def published_mesh(self, mesh: protocol.MeshFrame, result: FrameResult, space: str
                       ) -> list[Any]:
        """The frames of a processed frame's mesh on msh.<stream>: as received ("raw"), or all
        V vertices moved by the frame's rigid fit ("stabilised"; as received when the stream
        does not stabilise)."""
        vertices = mesh.vertices
        if space == "stabilised" and result.rigid is not None:
            vertices = result.rigid.apply(vertices[None])[0]
        tc = mesh.timecode
        return PublishedMesh(mesh.stream, mesh.frame, mesh.t_send_ns, space, vertices,
                             None if tc is None else str(tc),
                             None if tc is None else tc.rate).encode()

    def _held(self, t_send_ns: int) -> np.ndarray:
        """(C,) what a frame published while off-manifold carries: the last good controls
        (hold), or one step from the last published controls towards them (ease), over the
        sender's time since the previous frame. Both stay within bounds (a convex mix)."""
        assert self.last_good is not None
        if self.config.on_off_manifold == "hold" or self.last_published is None:
            return self.last_good
        dt_s = 0.0 if self.last_t_send_ns is None else (t_send_ns - self.last_t_send_ns) / 1e9
        return ease_towards(self.last_published, self.last_good, dt_s,
                            self.config.off_manifold_ease_ms / 1e3)

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
        rms_b, worst_b = frame_fit_error(self.model.forward.evaluate, result.solved,
                                         vertices[None], result.rigid)
        rms, worst = float(rms_b[0]), float(worst_b[0])
        if self.manifold is None:  # a fixed RMS limit (set in swap)
            off = rms > self.last_threshold
        else:  # adaptive, on the worst vertex; nothing is flagged during its warm-up
            off = self.manifold.update(worst)
            self.last_threshold = self.manifold.threshold
            self.telemetry.threshold = (self.last_threshold if math.isfinite(self.last_threshold)
                                        else None)
        if off:
            self.pending_off_manifold = True
        else:  # what a held frame goes back to: this frame's own controls, before any hold
            self.last_good = result.controls if result.unheld is None else result.unheld
        self.off_now = off
        self.telemetry.record_fit(result.frame, rms, worst, off)
        return rms, worst, off
