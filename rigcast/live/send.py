"""Stream a take to a server at a frame rate, with stage-rehearsal spoilers.

A stage rehearsal spoils a clean take the way a stage does: rigid head motion, sensor noise,
frames that never arrive, and frames that arrive corrupt. The spoilers are pure functions of the
take and a seed, so a rehearsal can be repeated exactly.

Corrupt frames come in three kinds, each of which the server must reject with its own reason:

- ``non_finite``:   a valid header, one vertex set to NaN          -> reason ``non_finite``;
- ``vertex_count``: a valid header and payload with one vertex less -> ``bad_vertex_count``;
- ``header``:       a header frame that is not msgpack at all       -> ``malformed``.
"""

from __future__ import annotations

import argparse
import logging
import math
import sys
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

# Loaded with this module, not on stream_take's first np.random call: Cython's memoryview code in
# numpy.random's extension modules registers with collections.abc inside a bare `except: pass`,
# and a Ctrl-C that lands while those modules load runs its handler there and is swallowed. As a
# lazy import that window opened just after "serves ...", when an operator (or a test) presses
# Ctrl-C: `send` then went on streaming (9 of 30 SIGINTs just after it, on a loaded 2-core machine).
import numpy.random

from rigcast.errors import EXIT_OK, MismatchError
from rigcast.runtime.errors import EXIT_USAGE, RigcastError
from rigcast.runtime.messaging.client import MeshSender
from rigcast.runtime.messaging.timecode import RATES, Timecode, frames_to_timecode, parse_timecode

log = logging.getLogger(__name__)

CORRUPTIONS: tuple[str, ...] = ("non_finite", "vertex_count", "header")
SEND, DROP = "send", "drop"
_BAD_HEADER = b"\xc1 this is not msgpack"  # 0xc1 is the one byte msgpack never uses


class RehearsalError(RigcastError, ValueError):
    """A rehearsal option is out of range; the message names it."""

    advice = "choose values in the ranges named above; `rigcast send --help` lists them"
    exit_code = EXIT_USAGE


@dataclass(frozen=True)
class Rehearsal:
    """How to spoil a take. ``noise`` is per-axis Gaussian noise as a fraction of the neutral's
    bounding-box diagonal; the rates are per-frame probabilities."""

    head_motion: bool = False
    noise: float = 0.0
    drop_rate: float = 0.0
    corrupt_rate: float = 0.0
    seed: int = 0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.noise) and 0.0 <= self.noise < 0.5):
            raise RehearsalError(f"noise is a fraction of the mesh size in [0, 0.5), "
                                 f"got {self.noise}")
        for name in ("drop_rate", "corrupt_rate"):
            value = getattr(self, name)
            if not (math.isfinite(value) and 0.0 <= value < 1.0):
                raise RehearsalError(f"{name} must be in [0, 1), got {value}")
        if self.drop_rate + self.corrupt_rate >= 1.0:
            raise RehearsalError(
                f"drop_rate + corrupt_rate must stay below 1, got "
                f"{self.drop_rate + self.corrupt_rate}"
            )


@dataclass
class SendStats:
    """What a send did, as the sender saw it."""

    sent: int = 0
    dropped_on_purpose: int = 0
    dropped_at_hwm: int = 0
    corrupt: Counter[str] = field(default_factory=Counter)
    rejected: Counter[str] = field(default_factory=Counter)
    loops: int = 0
    frames: int = 0
    seconds: float = 0.0
    send_times_ns: dict[int, int] = field(default_factory=dict)

    def line(self) -> str:
        corrupt = ", ".join(f"{k} {v}" for k, v in sorted(self.corrupt.items())) or "none"
        rejected = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        return (f"{self.frames} frames in {self.seconds:.1f} s "
                f"({self.frames / max(self.seconds, 1e-9):.1f} fps): {self.sent} sent, "
                f"dropped on purpose {self.dropped_on_purpose}, at the send queue "
                f"{self.dropped_at_hwm}; corrupt {corrupt}; rejected by the server {rejected}")


def plan_actions(frames: int, rehearsal: Rehearsal, rng: np.random.Generator) -> list[str]:
    """(frames,) one action per frame: "send", "drop" or one of CORRUPTIONS (cycled in turn)."""
    u = rng.random(frames)
    out: list[str] = []
    k = 0
    for x in u:
        if x < rehearsal.drop_rate:
            out.append(DROP)
        elif x < rehearsal.drop_rate + rehearsal.corrupt_rate:
            out.append(CORRUPTIONS[k % len(CORRUPTIONS)])
            k += 1
        else:
            out.append(SEND)
    return out


def head_poses(vertices: np.ndarray, times_s: np.ndarray, seed: int) -> np.ndarray:
    """vertices (T, V, 3), times (T,) -> (T, 4, 4) smooth rigid head poses about the first
    frame's centre (a few degrees, ~2% of the mesh's size; export.quality.take_synth's generator)."""
    from rigcast.export.quality.take_synth import bbox_diagonal, head_motion_poses

    first = np.asarray(vertices[0], np.float64)
    rng = np.random.default_rng(seed + 1)
    return head_motion_poses(np.asarray(times_s, np.float64), rng, first.mean(axis=0),
                             bbox_diagonal(first))


def spoil_frame(vertices: np.ndarray, pose: np.ndarray | None, noise_abs: float,
                rng: np.random.Generator) -> np.ndarray:
    """vertices (V, 3) -> (V, 3) float32 with the pose (4, 4) applied and Gaussian noise of
    standard deviation ``noise_abs`` (mesh units) added."""
    v = np.asarray(vertices, np.float64)
    if pose is not None:
        v = v @ pose[:3, :3].T + pose[:3, 3]
    if noise_abs > 0:
        v = v + rng.normal(0.0, noise_abs, size=v.shape)
    return np.ascontiguousarray(v, dtype=np.float32)


def corrupt_message(kind: str, stream: str, frame: int, vertices: np.ndarray,
                    t_send_ns: int) -> list[bytes | memoryview]:
    """The multipart message of a corrupt frame of ``kind`` (see module docstring)."""
    from rigcast.runtime.messaging import protocol

    if kind == "non_finite":
        bad = np.array(vertices, dtype=np.float32, copy=True)
        bad[bad.shape[0] // 2, 1] = np.nan
        return protocol.encode_mesh(stream, frame, t_send_ns, bad)
    if kind == "vertex_count":
        return protocol.encode_mesh(stream, frame, t_send_ns, np.array(vertices[:-1], np.float32))
    if kind == "header":
        return [_BAD_HEADER, np.asarray(vertices, np.float32).tobytes()]
    raise RehearsalError(f"unknown corruption {kind!r}; known: {CORRUPTIONS}")


def check_server(sender: MeshSender, stream: str, vertex_count: int, timeout_s: float,
                 endpoint: str) -> dict[str, Any]:
    """Ask for the stream's schema; raise when there is no answer or the rig does not match."""
    from rigcast.live.connect import schema_reply

    reply = schema_reply(endpoint, stream, timeout_s, sender=sender)
    if int(reply["vertices"]) != vertex_count:
        raise MismatchError(
            f"the take has {vertex_count} vertices but stream {stream!r} at {endpoint} serves "
            f"bundle {reply.get('bundle')!r} built for {reply['vertices']}",
            "send a take of the bundle's rig, or serve the bundle built for this take's rig",
        )
    return reply


def stream_take(
    sender: MeshSender,
    vertices: np.ndarray,
    times_s: np.ndarray,
    *,
    stream: str,
    fps: float,
    loop: bool = False,
    duration_s: float | None = None,
    max_frames: int | None = None,
    rehearsal: Rehearsal | None = None,
    corrupt_at: dict[int, str] | None = None,
    on_frame: Callable[[int, str], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
    timecode: Timecode | None = None,
) -> SendStats:
    """Send frames paced at ``fps`` until the take ends (or loops for ``duration_s`` /
    ``max_frames``). ``corrupt_at`` forces a corruption kind at given frame numbers (the demo's
    fixed corrupt frames). Frame numbers keep counting over loops and over dropped frames, so the
    server sees the gaps. Returns the stats; ``send_times_ns`` maps frame -> sender timestamp.
    ``timecode``: frame 0's SMPTE timecode; frame n is stamped n frames later (the timecode
    runs on over loops and over frames not sent, as a camera's does).
    """
    if not (math.isfinite(fps) and fps > 0):
        raise RehearsalError(f"fps must be a positive number, got {fps}")
    r = rehearsal or Rehearsal()
    rng = np.random.default_rng(r.seed)
    take_len = int(vertices.shape[0])
    poses = head_poses(vertices, times_s, r.seed) if r.head_motion else None
    if r.noise > 0:
        from rigcast.export.quality.take_synth import bbox_diagonal

        noise_abs = r.noise * bbox_diagonal(np.asarray(vertices[0]))
    else:
        noise_abs = 0.0
    limit = max_frames if max_frames is not None else (None if loop else take_len)
    actions = plan_actions(take_len, r, rng)
    stats = SendStats()
    start = time.perf_counter()
    frame = 0
    tc0 = None if timecode is None else timecode.to_frames()
    while limit is None or frame < limit:
        elapsed = time.perf_counter() - start
        if duration_s is not None and elapsed >= duration_s:
            break
        if should_stop is not None and should_stop():
            break
        wait = start + frame / fps - time.perf_counter()
        if wait > 0:
            time.sleep(wait)
        i = frame % take_len
        if i == 0 and frame > 0:
            stats.loops += 1
        action = (corrupt_at or {}).get(frame, actions[i])
        if action == DROP:
            stats.dropped_on_purpose += 1
        else:
            verts = spoil_frame(vertices[i], None if poses is None else poses[i], noise_abs, rng)
            t_ns = time.time_ns()
            if action == SEND:
                tc = (None if timecode is None or tc0 is None
                      else frames_to_timecode(tc0 + frame, timecode.rate, timecode.drop_frame))
                if sender.send(stream, frame, verts, t_send_ns=t_ns, timecode=tc):
                    stats.sent += 1
                    stats.send_times_ns[frame] = t_ns
                else:
                    stats.dropped_at_hwm += 1
            else:
                sender.socket.send_multipart(corrupt_message(action, stream, frame, verts, t_ns),
                                             copy=False)
                stats.corrupt[action] += 1
        if on_frame is not None:
            on_frame(frame, action)
        frame += 1
        if frame % 32 == 0:
            for err in sender.poll_errors():
                stats.rejected[str(err.get("reason"))] += 1
    for err in sender.poll_errors(timeout_ms=100):
        stats.rejected[str(err.get("reason"))] += 1
    stats.seconds = time.perf_counter() - start
    stats.frames = frame
    return stats


def send_from_args(args: argparse.Namespace) -> int:
    from rigcast.live.connect import curve_from_args, stream_or_discover
    from rigcast.readers.takes import read_take

    # Every option is checked before the take is read or a server is asked.
    if args.fps is not None and not (math.isfinite(args.fps) and args.fps > 0):
        raise RehearsalError(f"--fps must be a positive number, got {args.fps}")
    rehearsal = Rehearsal(head_motion=args.head_motion, noise=args.noise,
                          drop_rate=args.drop_rate, corrupt_rate=args.corrupt_rate,
                          seed=args.seed)
    take = read_take(args.take, fps=args.fps)
    fps = float(args.fps or take.fps)
    timecode = start_timecode(args.timecode, args.tc_rate, fps)
    curve = curve_from_args(args)
    stream = stream_or_discover(args.stream, args.source, args.timeout, curve)
    with MeshSender(args.to, curve=curve) as sender:
        reply = check_server(sender, stream, take.vertex_count, args.timeout, args.to)
        log.info("server at %s serves %s for stream %s", args.to, reply.get("bundle"), stream)
        stats = stream_take(sender, take.vertices, take.times_s, stream=stream, fps=fps,
                            loop=args.loop, duration_s=args.duration, max_frames=args.frames,
                            rehearsal=rehearsal, timecode=timecode)
    sys.stdout.write(stats.line() + "\n")
    return EXIT_OK


def start_timecode(text: str | None, rate: str | None, fps: float) -> Timecode | None:
    """``--timecode`` at ``--tc-rate`` (default: the rate named like the sending fps, e.g. 24 or
    29.97); TimecodeError (exit 2) naming what is wrong."""
    if text is None:
        if rate is not None:
            raise RehearsalError("--tc-rate goes with --timecode (the first frame's timecode)")
        return None
    if rate is None:
        rate = next((name for name, r in RATES.items() if abs(float(r) - fps) < 5e-4), None)
        if rate is None:
            raise RehearsalError(f"--timecode: {fps:g} fps is not a timecode rate; give "
                                 f"--tc-rate (one of {', '.join(RATES)})")
    return parse_timecode(text, rate)
