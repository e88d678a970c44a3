"""Record the controls a server publishes for one stream, and write them as CSV or JSON.

Times in the file are the sender's timestamps, relative to the first recorded frame, so the
recording keeps the take's own timing (and its gaps) rather than the network's.
"""

from __future__ import annotations

import argparse
import logging
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from rigcast.errors import EXIT_OK, NoAnswerError, UserError
from rigcast.runtime.client import ControlsSubscriber, MeshSender, ServerError
from rigcast.runtime.keys import ClientCurve
from rigcast.runtime.protocol import ControlsMessage, schema_from_reply
from rigcast.runtime.schema import ControlSchema
from rigcast.send import request_schema

log = logging.getLogger(__name__)


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

    @property
    def count(self) -> int:
        return int(self.frames.shape[0])

    def times_s(self) -> np.ndarray:
        """(T,) seconds from the first frame's send time; strictly increasing."""
        if self.count == 0:
            return np.zeros(0)
        t = (self.t_send_ns - self.t_send_ns[0]).astype(np.float64) / 1e9
        # Equal timestamps (a coarse sender clock) would break writers that need increasing times.
        for i in range(1, t.shape[0]):
            if t[i] <= t[i - 1]:
                t[i] = t[i - 1] + 1e-6
        return t


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
    )


def record_controls(
    subscriber: ControlsSubscriber,
    *,
    duration_s: float | None = None,
    max_frames: int | None = None,
    idle_timeout_s: float | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> Recording:
    """Receive the subscriber's controls until ``duration_s``, ``max_frames``, Ctrl-C,
    ``should_stop()``, or ``idle_timeout_s`` without a message."""
    messages: list[ControlsMessage] = []
    arrived: list[int] = []
    start = last = time.monotonic()
    try:
        while max_frames is None or len(messages) < max_frames:
            now = time.monotonic()
            if duration_s is not None and now - start >= duration_s:
                break
            if idle_timeout_s is not None and now - last >= idle_timeout_s:
                break
            if should_stop is not None and should_stop():
                break
            msg = subscriber.recv(timeout_ms=50)
            if isinstance(msg, ControlsMessage) and msg.stream == subscriber.stream:
                messages.append(msg)
                arrived.append(time.time_ns())
                last = time.monotonic()
    except KeyboardInterrupt:
        log.info("recording stopped by Ctrl-C after %d frames", len(messages))
    return collect(messages, arrived, subscriber.stream)


def fetch_schema(endpoint: str, stream: str, timeout_s: float,
                 curve: ClientCurve | None = None) -> ControlSchema:
    with MeshSender(endpoint, curve=curve) as sender:
        try:
            reply = request_schema(sender, stream, timeout_s)
        except TimeoutError:
            raise NoAnswerError(
                f"no server answered at {endpoint} within {timeout_s:g} s") from None
        except ServerError as err:
            raise UserError(f"the server at {endpoint} refused stream {stream!r} ({err})",
                            "pass --stream with a stream the server serves") from None
    return schema_from_reply(reply)


def record_from_args(args: argparse.Namespace) -> int:
    from rigcast.animation_out import write_controls
    from rigcast.watch import curve_from_args, stream_or_discover

    if args.out.suffix.lower() not in (".csv", ".json"):
        raise UserError(f"{args.out}: record writes .csv or .json, not {args.out.suffix!r}",
                        "give an output path ending in .csv or .json", code=2)
    curve = curve_from_args(args)
    stream = stream_or_discover(args.stream, args.source, args.timeout, curve)
    schema = fetch_schema(args.to, stream, args.timeout, curve)
    with ControlsSubscriber(stream, args.source, curve=curve) as sub:
        rec = record_controls(sub, duration_s=args.duration, max_frames=args.frames)
    if rec.count == 0:
        raise NoAnswerError(f"no controls arrived for stream {stream!r} from {args.source}",
                            "is a sender streaming to the server? (`rigcast send ...`)")
    write_controls(args.out, schema, rec.values, rec.times_s())
    sys.stdout.write(f"recorded {rec.count} frames of stream {stream!r} "
                     f"(frames {int(rec.frames[0])}..{int(rec.frames[-1])}) to {args.out}\n")
    return EXIT_OK
