"""Measuring the live path end to end: an echo process (the transport floor) and a sender that
times each frame from send to its controls arriving. Used by `rigcast latency-check` and by
bench/latency.py, so both measure the same way.

- ``echo_main``: receive meshes on a ROUTER, publish same-size controls on a PUB, no other work;
  the same sockets and message sizes as the server, so its latency is the floor the transport
  allows.
- ``Client``: a DEALER for meshes and a SUB for controls and telemetry. ``paced`` sends at a
  frame rate and times each frame (both ends are ``perf_counter_ns`` in this process, so no
  cross-process clock is involved); ``lockstep`` sends the next frame when the previous
  controls arrive (the largest rate with one frame in flight); ``blast`` sends flat out.

- ``client_main``: the measuring client as a process of its own (``--role client``), pinned by
  whoever starts it: meshes from an .npy file, handshake, the paced run after the warm-up, then
  lockstep (and, against a server, a telemetry message of the paced window); the samples go to a
  JSON file. The command and the bench both measure from such a third process, so the sender
  never shares a process (or a core) with the one orchestrating the run.
- ``pose_meshes``: the frames, a rig's poses with sensor noise and a little rigid head motion,
  one recipe for both.

Run as ``python -m rigcast.live.latency_probe --ready FILE`` it is the echo process.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.sockets import bind_pub, bind_router, bound_endpoint, wait_for_input
from rigcast.runtime.trust.keys import ClientCurve, load_secret_key

log = logging.getLogger(__name__)

STREAM = "bench"
CONTROLS = 50
WARMUP_S = 3.0
#: the frames' sensor noise, per coordinate, as a share of the pose's bounding-box diagonal
#: (issue 12's noisy takes: 0.1-0.2 % of D; the build's inverse trains with 0.15 %)
NOISE_FRAC = 0.0015


def curve_server(keys: Path | None) -> Callable[[zmq.Socket], None] | None:
    """A ``prepare`` that makes a socket a CURVE server with ``keys/server.key_secret``, or
    None without keys."""
    if keys is None:
        return None
    public, secret = load_secret_key(keys / "server.key_secret")

    def prepare(sock: zmq.Socket) -> None:
        sock.setsockopt(zmq.CURVE_SERVER, 1)
        sock.setsockopt(zmq.CURVE_SECRETKEY, secret)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, public)

    return prepare


def echo_main(ready: Path, spin_ns: int, keys: Path | None, *, stream: str = STREAM,
              controls: int = CONTROLS, host: str = "127.0.0.1") -> None:
    """Receive meshes on a ROUTER, publish same-size controls on a PUB; no other work. Writes
    ``ready`` ({"input", "output", "pid"}) once bound; ends on a message that is not a mesh."""
    ctx = zmq.Context()
    router = bind_router(ctx, f"tcp://{host}:*", rcvhwm=32, sndhwm=1000, linger_ms=0,
                         max_message_bytes=16 << 20, prepare=curve_server(keys))
    pub = bind_pub(ctx, f"tcp://{host}:*", sndhwm=1000, linger_ms=0,
                   prepare=curve_server(keys))
    tmp = ready.with_suffix(".tmp")
    tmp.write_text(json.dumps({"input": bound_endpoint(router), "output": bound_endpoint(pub),
                               "pid": os.getpid()}))
    tmp.replace(ready)
    values = np.zeros(controls, np.float32)
    poller = zmq.Poller()
    poller.register(router, zmq.POLLIN)
    spin = 0
    try:
        while True:
            if not wait_for_input(poller, 100, spin):
                spin = 0
                continue
            spin = spin_ns  # spin only after a message, as the server does after a drain
            msg = router.recv_multipart(copy=False)
            header = protocol.decode_header(msg[1].buffer)
            if header.get("type") != "mesh":
                break
            t = time.time_ns()
            pub.send_multipart(protocol.encode_controls(stream, header["frame"],
                                                        header["t_send_ns"], t, t, values, 0))
    finally:
        router.close(linger=0)
        pub.close(linger=0)
        ctx.term()


class Client:
    """The sender side of a latency run: meshes out on a DEALER, controls in on a SUB."""

    def __init__(self, endpoints: dict[str, str], meshes: Sequence[np.ndarray], spin_ns: int = 0,
                 curve: ClientCurve | None = None, stream: str = STREAM) -> None:
        self.spin_ns = spin_ns
        self.stream = stream
        self.ctx = zmq.Context()
        self.dealer = self.ctx.socket(zmq.DEALER)
        self.dealer.setsockopt(zmq.SNDHWM, 16)
        self.dealer.setsockopt(zmq.LINGER, 0)
        if curve is not None:
            curve.apply(self.dealer)
        self.dealer.connect(endpoints["input"])
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.RCVHWM, 10000)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.SUBSCRIBE, protocol.TOPIC_CONTROLS + stream.encode())
        self.sub.setsockopt(zmq.SUBSCRIBE, protocol.TOPIC_TELEMETRY + stream.encode())
        if curve is not None:
            curve.apply(self.sub)
        self.sub.connect(endpoints["output"])
        self.poller = zmq.Poller()
        self.poller.register(self.sub, zmq.POLLIN)
        self.meshes = list(meshes)
        self.frame = 0
        self.telemetry: dict[str, Any] | None = None

    def send(self, block: bool = True) -> bool:
        self.frame += 1
        frames = protocol.encode_mesh(self.stream, self.frame, time.time_ns(),
                                      self.meshes[self.frame % len(self.meshes)])
        try:
            self.dealer.send_multipart(frames, 0 if block else zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return False
        return True

    def recv_controls(self, frame: int | None, timeout_ms: int) -> int | None:
        """perf_counter_ns at the arrival of controls for ``frame`` (any frame if None)."""
        deadline = time.perf_counter_ns() + timeout_ms * 1_000_000
        spin = self.spin_ns
        while (left := deadline - time.perf_counter_ns()) > 0:
            if not wait_for_input(self.poller, max(left // 1_000_000, 1), spin):
                continue
            frames = self.sub.recv_multipart()
            now = time.perf_counter_ns()
            if frames[0].startswith(protocol.TOPIC_TELEMETRY):
                try:
                    header = protocol.decode_header(frames[1])
                except protocol.FrameError:
                    continue  # a message type this version does not know: no sample
                if header.get("type") == "telemetry":
                    self.telemetry = header
                continue
            msg = protocol.decode_controls(frames)
            if frame is None or msg.frame == frame:
                return now
        return None

    def handshake(self, tries: int = 200) -> None:
        """Round trips until one comes back: both sockets are connected and subscribed."""
        for _ in range(tries):
            self.send()
            if self.recv_controls(self.frame, 50) is not None:
                return
        raise TimeoutError("no controls from the server")

    def paced(self, seconds: float, fps: float, warm_marker: Path | None = None,
              warmup_s: float = WARMUP_S,
              sent_at: list[int] | None = None) -> tuple[list[int], int]:
        """Latencies (ns) of the frames after the warm-up, and how many got no controls.
        ``warm_marker`` is written when the warm-up ends (bench/latency.py reads the server's
        RSS then); ``sent_at`` collects each timed frame's send time (perf_counter_ns)."""
        period = int(1e9 / fps)
        start = time.perf_counter_ns()
        warm_end = start + int(warmup_s * 1e9)
        next_t = start
        lat: list[int] = []
        lost = 0
        while next_t < start + int((seconds + warmup_s) * 1e9):
            while (wait := next_t - time.perf_counter_ns()) > 0:
                time.sleep(wait / 1e9 if wait > 2_000_000 else 0)
            t0 = time.perf_counter_ns()
            if t0 >= warm_end and warm_marker is not None and not warm_marker.exists():
                warm_marker.write_text("warm")
                t0 = time.perf_counter_ns()
            self.send()
            t1 = self.recv_controls(self.frame, 1000)
            if t0 >= warm_end:
                if t1 is None:
                    lost += 1
                else:
                    lat.append(t1 - t0)
                    if sent_at is not None:
                        sent_at.append(t0)
            next_t += period
        if lost:
            log.warning("%d frames got no controls", lost)
        return lat, lost

    def lockstep(self, seconds: float) -> float:
        """Frames answered per second when the next goes as the previous controls arrive."""
        end = time.perf_counter() + seconds
        done = 0
        t0 = time.perf_counter()
        while time.perf_counter() < end:
            self.send()
            if self.recv_controls(self.frame, 1000) is not None:
                done += 1
        return done / (time.perf_counter() - t0)

    def fresh_telemetry(self, timeout_s: float = 1.0) -> dict[str, Any]:
        """The next telemetry message (its counters are cumulative)."""
        self.telemetry = None
        deadline = time.perf_counter() + timeout_s
        while self.telemetry is None and time.perf_counter() < deadline:
            self.recv_controls(-1, 50)  # frame -1 never matches: read until telemetry comes
        if self.telemetry is None:
            raise TimeoutError("no telemetry from the server")
        return self.telemetry

    def blast(self, seconds: float) -> dict[str, float]:
        """Send flat out for ``seconds``; what was sent, received by the server and published."""
        before = self.fresh_telemetry()
        end = time.perf_counter() + seconds
        sent = published = 0
        t0 = time.perf_counter()
        while time.perf_counter() < end:
            if self.send(block=False):
                sent += 1
            while self.sub.poll(0):
                frames = self.sub.recv_multipart()
                if frames[0].startswith(protocol.TOPIC_CONTROLS):
                    published += 1
        elapsed = time.perf_counter() - t0
        while self.recv_controls(None, 300) is not None:  # let the server drain
            published += 1
        after = self.fresh_telemetry()
        counts = {k: int(after[k]) - int(before[k]) for k in ("processed", "dropped", "stale")}
        received = sum(counts.values())
        return {"sent_fps": sent / elapsed, "published_fps": published / elapsed,
                "server_received_fps": received / elapsed, "sent": sent,
                "server_received": received, **{f"server_{k}": v for k, v in counts.items()},
                "published": published}

    def close(self) -> None:
        self.dealer.close(linger=0)
        self.sub.close(linger=0)
        self.ctx.term()


def ms_percentiles(lat_ns: Sequence[int], qs: Sequence[float] = (50, 95, 99)) -> list[float]:
    """Latencies (n,) in ns -> percentiles in ms (numpy's linear definition)."""
    return [float(x) for x in np.percentile(np.asarray(lat_ns) / 1e6, list(qs))]


def pose_meshes(evaluate: Callable[[np.ndarray], np.ndarray], lower: np.ndarray,
                upper: np.ndarray, count: int = 32, seed: int = 1,
                noise_frac: float = NOISE_FRAC) -> list[np.ndarray]:
    """``count`` meshes (V, 3) float32 of a rig ``evaluate(controls (B, C)) -> (B, V, 3)`` with
    bounds ``lower``, ``upper`` (C,): each control at ``lower + w (upper - lower)``,
    ``w ~ clip(N(0.2, 0.15), 0, 1)`` (every control a little active: the refinement's active
    set is full, the costlier case), with sensor noise (white, per coordinate, of standard
    deviation ``noise_frac`` of the pose's bounding-box diagonal: what a capture gives, and
    what a trained bundle's network and refinement are built for), turned up to 3 degrees
    about y and moved 0.01 i along x, so stabilisation does real work. bench/latency.py's own
    recipe, drawn in the same order (the noise from a generator of its own, ``seed`` + 1, so
    the poses are those drawn before the noise)."""
    lo, hi = np.asarray(lower, np.float64), np.asarray(upper, np.float64)
    rng = np.random.default_rng(seed)
    weights = np.stack([np.clip(rng.normal(0.2, 0.15, lo.shape[0]), 0, 1) for _ in range(count)])
    poses = evaluate(lo + weights * (hi - lo))
    noise = np.random.default_rng(seed + 1)
    out = []
    for i, mesh in enumerate(poses):
        pose = np.asarray(mesh, np.float64)
        diagonal = float(np.linalg.norm(pose.max(axis=0) - pose.min(axis=0)))
        pose = pose + noise.normal(0.0, noise_frac * diagonal, pose.shape)
        a = np.radians(3.0 * np.sin(i / 5))
        rot = np.array([[np.cos(a), 0, np.sin(a)], [0, 1, 0], [-np.sin(a), 0, np.cos(a)]])
        moved = pose @ rot.T + [0.01 * i, 0, 0]
        out.append(np.ascontiguousarray(moved, dtype=np.float32))
    return out


def measure(client: Client, mode: str, seconds: float, fps: float, warmup_s: float,
            flat_seconds: float, marker: Path | None = None) -> dict[str, Any]:
    """One client's measurement: the paced run (after the warm-up), then against a server a
    telemetry message of the paced window, then lockstep. ``marker``: ``.warm`` and ``.paced``
    files beside it are written as the warm-up and the paced run end (for a parent reading the
    server's memory then). Latencies and send times in ns (perf_counter_ns)."""
    client.handshake()
    sent: list[int] = []
    warm = marker.with_suffix(".warm") if marker is not None else None
    lat, lost = client.paced(seconds, fps, warm, warmup_s=warmup_s, sent_at=sent)
    if marker is not None:
        marker.with_suffix(".paced").write_text("done")
    telemetry = None
    if mode == "server":
        try:
            telemetry = client.fresh_telemetry(2.0)
        except TimeoutError:
            log.warning("no telemetry from the server after the paced run")
    return {"latency_ns": lat, "sent_ns": sent, "lost": lost, "telemetry": telemetry,
            "max_sustained_fps": client.lockstep(flat_seconds)}


def client_main(args: argparse.Namespace) -> int:
    """The measuring client as its own process: writes ``args.result`` (JSON: ``measure``'s
    figures, or {"error": ...} with exit code 3 when nothing answers the handshake)."""
    endpoints = json.loads(Path(args.endpoints).read_text())
    meshes = list(np.load(args.meshes))
    curve = (ClientCurve.from_files(args.curve_keys / "server.key",
                                    args.curve_keys / "clients" / "bench.key_secret")
             if args.curve_keys is not None else None)
    client = Client(endpoints, meshes, args.busy_poll_us * 1000, curve, stream=args.stream)
    result = Path(args.result)
    try:
        out = measure(client, args.mode, args.duration, args.fps, args.warmup,
                      args.flat_seconds, result)
    except TimeoutError as exc:
        out, code = {"error": str(exc)}, 3
    else:
        code = 0
    finally:
        client.close()
    tmp = result.with_suffix(".tmp")
    tmp.write_text(json.dumps(out))
    tmp.replace(result)
    return code


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m rigcast.live.latency_probe",
                                     description="The echo or the client process of a latency "
                                                 "run.")
    parser.add_argument("--role", choices=("echo", "client"), default="echo")
    parser.add_argument("--ready", type=Path, help="echo: the file written once bound")
    parser.add_argument("--busy-poll-us", type=int, default=0)
    parser.add_argument("--curve-keys", type=Path, default=None)
    parser.add_argument("--stream", default=STREAM)
    parser.add_argument("--controls", type=int, default=CONTROLS)
    client = parser.add_argument_group("client")
    client.add_argument("--endpoints", type=Path, help="JSON with 'input' and 'output'")
    client.add_argument("--meshes", type=Path, help=".npy of meshes (N, V, 3) float32")
    client.add_argument("--mode", choices=("echo", "server"), default="server")
    client.add_argument("--fps", type=float, default=120.0)
    client.add_argument("--duration", type=float, default=10.0)
    client.add_argument("--warmup", type=float, default=WARMUP_S)
    client.add_argument("--flat-seconds", type=float, default=3.0)
    client.add_argument("--result", type=Path, help="JSON written at the end")
    args = parser.parse_args(argv)
    if args.role == "client":
        missing = [k for k in ("endpoints", "meshes", "result") if getattr(args, k) is None]
        if missing:
            parser.error(f"--role client needs --{', --'.join(missing)}")
        return client_main(args)
    if args.ready is None:
        parser.error("--role echo needs --ready")
    echo_main(args.ready, args.busy_poll_us * 1000, args.curve_keys, stream=args.stream,
              controls=args.controls)
    return 0


if __name__ == "__main__":
    sys.exit(main())
