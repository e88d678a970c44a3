"""Record what a server publishes: the controls of every stream (or the chosen ones) in one
process, with the sender's frame numbers, the flags, the SMPTE timecode the sender stamped, and
the head pose (each controls message's,
from servers that send it; else telemetry's samples, about 10 a second); written
by ``rigcast.live.recording_out`` as NPZ, JSON or CSV with the take's name.

Only the server's publish endpoint is needed. The control names come from the input endpoint
when it answers (``--to``); without it the controls are named by index.

Times in the file are the sender's timestamps, relative to each stream's first recorded frame,
so the recording keeps the take's own timing (and its gaps) rather than the network's.
"""

from __future__ import annotations

import argparse
import logging
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from rigcast.live.connect import fetch_schema
from rigcast.live.recording_out import SUFFIXES, MeshChunks, StreamRecording, pose_row, write_recording
from rigcast.runtime.messaging.client import Subscriber
from rigcast.runtime.messaging.messages import PublishedMesh
from rigcast.runtime.messaging.protocol import ControlsMessage

log = logging.getLogger(__name__)

__all__ = ["Recording", "Session", "collect", "fetch_schema", "record_controls",
           "record_from_args", "record_streams"]


@dataclass(frozen=True)
class Recording:
    """frames (T,) int64; t_send_ns, t_recv_ns, t_pub_ns (T,) int64; flags (T,) int64;
    values (T, C) float32; arrived_ns (T,) int64 when this process received each message."""

    stream: str
    frames: np.ndarray
    t_send_ns: np.ndarray
    t_recv_ns: np.ndarray
    t_pub_ns: np.ndarray
    arrived_ns: np.ndarray
    flags: np.ndarray
    values: np.ndarray
    timecode: np.ndarray | None = None  # (T,) str, the sender's SMPTE timecode ("" if none)
    tc_rate: np.ndarray | None = None  # (T,) str, its rate ("" if none)

    @property
    def count(self) -> int:
        return int(self.frames.shape[0])


def collect(messages: list[ControlsMessage], arrived_ns: list[int], stream: str) -> Recording:
    """Messages in arrival order -> a Recording sorted by frame number (duplicates dropped)."""
    order = sorted(range(len(messages)), key=lambda i: messages[i].frame)
    seen: set[int] = set()
    keep = []
    for i in order:
        if messages[i].frame not in seen:
            seen.add(messages[i].frame)
            keep.append(i)
    c = messages[0].values.shape[0] if messages else 0

    def col(get: Callable[[ControlsMessage], int]) -> np.ndarray:
        return np.array([get(messages[i]) for i in keep], dtype=np.int64)

    values = (np.stack([messages[i].values for i in keep]).astype(np.float32) if keep
              else np.zeros((0, c), np.float32))
    return Recording(
        stream=stream,
        frames=col(lambda m: m.frame),
        t_send_ns=col(lambda m: m.t_send_ns),
        t_recv_ns=col(lambda m: m.t_recv_ns),
        t_pub_ns=col(lambda m: m.t_pub_ns),
        arrived_ns=np.array([arrived_ns[i] for i in keep], dtype=np.int64),
        flags=col(lambda m: m.flags),
        values=values,
        timecode=np.array([getattr(messages[i], "timecode", None) or "" for i in keep], dtype=str),
        tc_rate=np.array([getattr(messages[i], "tc_rate", None) or "" for i in keep], dtype=str),
    )


@dataclass
class _Stream:
    messages: list[ControlsMessage] = field(default_factory=list)
    arrived: list[int] = field(default_factory=list)
    pose: dict[int, list[float]] = field(default_factory=dict)
    pose_per_frame: bool = False


@dataclass(frozen=True)
class Session:
    """What one recording run received, per stream; ``interrupted`` when Ctrl-C ended it."""

    streams: dict[str, Recording]
    poses: dict[str, dict[int, list[float]]]
    interrupted: bool

    def for_file(self, names: dict[str, tuple[str, ...]]) -> list[StreamRecording]:
        """Streams with frames, as the writers take them (controls named by ``names``)."""
        out = []
        for stream, rec in self.streams.items():
            if rec.count == 0:
                continue
            poses = self.poses.get(stream, {})
            width = rec.values.shape[1]
            label = names.get(stream)
            if label is None or len(label) != width:
                label = tuple(f"#{i}" for i in range(width))
            frames = np.array(sorted(poses), dtype=np.int64)
            pose = (np.array([poses[f] for f in frames.tolist()], np.float64) if poses
                    else np.zeros((0, 8)))
            out.append(StreamRecording(stream, label, rec.frames, rec.t_send_ns, rec.t_recv_ns,
                                       rec.t_pub_ns, rec.flags, rec.values, frames, pose,
                                       rec.timecode, rec.tc_rate))
        return out


def record_streams(subscriber: Subscriber, *, duration_s: float | None = None,
                   max_frames: int | None = None, idle_timeout_s: float | None = None,
                   should_stop: Callable[[], bool] | None = None,
                   on_mesh: Callable[[PublishedMesh], None] | None = None) -> Session:
    """Receive controls (and telemetry, for the head pose) until ``duration_s``, ``max_frames``
    frames of every stream, ``idle_timeout_s`` without controls, ``should_stop()`` or Ctrl-C;
    published meshes go to ``on_mesh`` (subscribe with ``meshes=True``)."""
    streams: dict[str, _Stream] = {}
    start = last = time.monotonic()
    interrupted = False
    try:
        while True:
            now = time.monotonic()
            if duration_s is not None and now - start >= duration_s:
                break
            if idle_timeout_s is not None and now - last >= idle_timeout_s:
                break
            if should_stop is not None and should_stop():
                break
            if max_frames is not None and streams and all(
                    len(s.messages) >= max_frames for s in streams.values()):
                break
            msg = subscriber.recv(timeout_ms=50)
            if isinstance(msg, ControlsMessage):
                got = streams.setdefault(msg.stream, _Stream())
                if max_frames is None or len(got.messages) < max_frames:
                    got.messages.append(msg)
                    got.arrived.append(time.time_ns())
                    pose = getattr(msg, "head_pose", None)  # per frame, from newer servers
                    row = pose_row(pose.to_wire()) if pose is not None else None
                    if row is not None:
                        if not got.pose_per_frame:  # per-frame poses replace the samples
                            got.pose.clear()
                            got.pose_per_frame = True
                        got.pose[msg.frame] = row
                last = time.monotonic()
            elif isinstance(msg, PublishedMesh):
                if on_mesh is not None:
                    on_mesh(msg)
            elif isinstance(msg, dict) and msg.get("type") == "telemetry":
                # Older servers carry the pose only in telemetry (about 10 a second).
                got = streams.setdefault(str(msg["stream"]), _Stream())
                row = pose_row(msg.get("pose") or {})
                frame = msg.get("last_frame")
                if row is not None and isinstance(frame, int) and not got.pose_per_frame:
                    got.pose[frame] = row
    except KeyboardInterrupt:
        interrupted = True
        log.info("recording stopped by Ctrl-C")
    return Session({name: collect(s.messages, s.arrived, name) for name, s in streams.items()},
                   {name: s.pose for name, s in streams.items()}, interrupted)


def record_controls(subscriber: Subscriber, *, duration_s: float | None = None,
                    max_frames: int | None = None, idle_timeout_s: float | None = None,
                    should_stop: Callable[[], bool] | None = None) -> Recording:
    """One stream's controls (the subscriber's first stream) as a Recording."""
    session = record_streams(subscriber, duration_s=duration_s, max_frames=max_frames,
                             idle_timeout_s=idle_timeout_s, should_stop=should_stop)
    stream = subscriber.streams[0] if subscriber.streams else next(iter(session.streams), "")
    return session.streams.get(stream) or collect([], [], stream)


def record_from_args(args: argparse.Namespace) -> int:
    from rigcast.errors import EXIT_INTERRUPTED, EXIT_OK, NoAnswerError, UserError
    from rigcast.live.connect import curve_from_args, schema_or_none

    suffix = args.out.suffix.lower()
    if suffix not in SUFFIXES:
        raise UserError(f"{args.out}: record writes .npz, .json or .csv, not {suffix!r}",
                        "give an output path ending in .npz, .json or .csv", code=2)
    curve = curve_from_args(args)
    chosen = list(dict.fromkeys(args.stream)) if args.stream else None
    take = args.take or args.out.stem
    if args.mesh_chunk < 1:
        raise UserError(f"--mesh-chunk must be at least 1 frame, got {args.mesh_chunk}", code=2)
    chunks = MeshChunks(args.out, take, args.mesh_chunk) if args.meshes else None
    with Subscriber(args.source, streams=chosen, telemetry=True, curve=curve,
                    meshes=args.meshes) as sub:
        sys.stderr.write(f"recording {', '.join(chosen) if chosen else 'every stream'} from "
                         f"{args.source} as take {take!r}"
                         f"{' with meshes' if args.meshes else ''}; Ctrl-C stops\n")
        sys.stderr.flush()
        try:
            session = record_streams(sub, duration_s=args.duration, max_frames=args.frames,
                                     on_mesh=None if chunks is None else chunks.add)
        finally:
            mesh_files = [] if chunks is None else chunks.close()
    names = {}
    for stream in session.streams:
        schema = schema_or_none(args.to, stream, args.timeout, curve)
        if schema is not None:
            names[stream] = schema.names
    streams = session.for_file(names)
    if not streams:
        if session.interrupted:
            return EXIT_INTERRUPTED
        raise NoAnswerError(f"no controls arrived from {args.source}",
                            "is a sender streaming to the server? (`rigcast send ...`)")
    files = write_recording(args.out, take, streams)
    for s in streams:
        sys.stdout.write(f"recorded {s.count} frames of stream {s.stream!r} (frames "
                         f"{int(s.frames[0])}..{int(s.frames[-1])}, {s.pose.shape[0]} head-pose "
                         f"samples{'' if s.stream in names else ', controls named by index'})\n")
    sys.stdout.write(f"take {take!r} written to {', '.join(str(f) for f in files)}\n")
    if args.meshes:
        sys.stdout.write(f"meshes: {len(mesh_files)} chunk file(s) beside it"
                         f"{'' if mesh_files else ' (none arrived: serve with --publish-meshes)'}"
                         f"; re-solve with `rigcast solve BUNDLE {args.out.stem}.*.meshes.*.npz`\n")
    return EXIT_INTERRUPTED if session.interrupted else EXIT_OK
