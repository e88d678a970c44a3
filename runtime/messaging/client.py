"""A small client for the rigcast server, and the reference for clients in other languages.

MeshSender (DEALER) sends mesh frames and requests (schema, reload) to the server's ROUTER;
Subscriber (SUB) reads controls, telemetry and events of one stream, several or all from its PUB
(ControlsSubscriber: one stream); discover_streams names the streams a server publishes. Every
rigcast command that talks to a server goes through these. The wire format is docs/protocol.md.
"""

from __future__ import annotations

import logging
import math
import secrets
import time
from collections import deque
from collections.abc import Sequence
from typing import Any

import numpy as np
import zmq
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.messaging import protocol
from rigcast.runtime.messaging.messages import PublishedMesh
from rigcast.runtime.messaging.timecode import Timecode
from rigcast.runtime.trust.keys import ClientCurve

log = logging.getLogger(__name__)

DEFAULT_INPUT = "tcp://127.0.0.1:5570"
DEFAULT_OUTPUT = "tcp://127.0.0.1:5571"


class ServerError(RigcastError, RuntimeError):
    """The server answered a request with an error reply; ``reply`` is the decoded header."""

    advice = "check --stream and the server's streams (`rigcast watch` lists them)"

    def __init__(self, reply: dict[str, Any]) -> None:
        super().__init__(f"{reply.get('reason')}: {reply.get('message')}")
        self.reason = str(reply.get("reason"))
        self.reply = reply


class MeshSender:
    """Sends mesh frames and requests. ``send`` never blocks: at the high-water mark the frame
    is dropped and counted (the newest frame matters, not a backlog)."""

    def __init__(
        self,
        endpoint: str = DEFAULT_INPUT,
        *,
        context: zmq.Context | None = None,
        sndhwm: int = 16,
        rcvhwm: int = 1000,
        curve: ClientCurve | None = None,
        session: int | None = None,
    ) -> None:
        self.socket = (context or zmq.Context.instance()).socket(zmq.DEALER)
        self.socket.setsockopt(zmq.SNDHWM, sndhwm)
        self.socket.setsockopt(zmq.RCVHWM, rcvhwm)
        self.socket.setsockopt(zmq.LINGER, 0)
        if curve is not None:
            curve.apply(self.socket)
        self.socket.connect(endpoint)
        # A fresh session per sender: when this process restarts, the server restarts the
        # stream's timing instead of refusing the new clock (docs/protocol.md, restart rule).
        self.session = secrets.randbits(63) if session is None else session
        self.dropped = 0
        self._replies: deque[dict[str, Any]] = deque(maxlen=10_000)

    def send(
        self, stream: str, frame: int, vertices: np.ndarray, t_send_ns: int | None = None,
        timecode: Timecode | None = None,
    ) -> bool:
        """Send one mesh frame (V, 3) float32 without copying it, stamped with its SMPTE
        ``timecode`` when given; False when it was dropped."""
        t = time.time_ns() if t_send_ns is None else t_send_ns
        try:
            self.socket.send_multipart(
                protocol.encode_mesh(stream, frame, t, vertices, self.session, timecode),
                zmq.NOBLOCK, copy=False
            )
        except zmq.Again:
            self.dropped += 1
            return False
        return True

    def _receive(self, timeout_ms: int) -> dict[str, Any] | None:
        if not self.socket.poll(max(timeout_ms, 0), zmq.POLLIN):
            return None
        frames = self.socket.recv_multipart()
        try:
            return protocol.decode_reply(frames[0])
        except protocol.FrameError as err:
            log.warning("undecodable reply from the server: %s", err)
            return None

    def _request(self, body: bytes, stream: str, want: str, timeout_s: float) -> dict[str, Any]:
        self.socket.send(body)
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            reply = self._receive(int(left * 1000) + 1)
            if reply is None:
                continue
            if reply.get("stream") == stream and reply["type"] == want:
                return reply
            refused = reply["type"] == "error" and reply["frame"] is None
            if refused and reply.get("stream") == stream:
                raise ServerError(reply)
            self._replies.append(reply)  # an error for an earlier mesh frame: keep it
        raise TimeoutError(f"no {want} for stream {stream!r} within {timeout_s} s")

    def request_schema(self, stream: str, timeout_s: float = 2.0) -> dict[str, Any]:
        """The stream's schema reply (see protocol.schema_from_reply); ServerError on refusal."""
        return self._request(protocol.encode_schema_request(stream), stream, "schema_reply",
                             timeout_s)

    def request_reload(self, stream: str, bundle_path: str, timeout_s: float = 30.0) -> dict:
        """Ask the server to swap the stream's bundle; returns the reload reply (check "ok")."""
        return self._request(protocol.encode_reload_request(stream, str(bundle_path)), stream,
                             "reload_reply", timeout_s)

    def poll_errors(self, timeout_ms: int = 0) -> list[dict[str, Any]]:
        """Error replies received so far (waiting up to timeout_ms for the first one)."""
        out = [r for r in self._replies if r["type"] == "error"]
        self._replies.clear()
        wait = timeout_ms if not out else 0
        while (reply := self._receive(wait)) is not None:
            if reply["type"] == "error":
                out.append(reply)
            wait = 0
        return out

    def close(self) -> None:
        self.socket.close(linger=0)

    def __enter__(self) -> MeshSender:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class Subscriber:
    """A SUB on the server's PUB: controls, telemetry, events and (``meshes``, when the server
    publishes them) meshes of one stream, several, or all of them (``streams=None``), decoded.
    Needs only the publish endpoint, so a monitoring machine never needs the server's input."""

    def __init__(
        self,
        endpoint: str = DEFAULT_OUTPUT,
        *,
        streams: Sequence[str] | None = None,
        controls: bool = True,
        telemetry: bool = False,
        events: bool = False,
        context: zmq.Context | None = None,
        rcvhwm: int = 1000,
        curve: ClientCurve | None = None,
        meshes: bool = False,
    ) -> None:
        self.streams = None if streams is None else tuple(streams)
        prefixes = [p for p, on in ((protocol.TOPIC_CONTROLS, controls),
                                    (protocol.TOPIC_TELEMETRY, telemetry),
                                    (protocol.TOPIC_MESHES, meshes)) if on]
        if self.streams is None:
            subscriptions = list(prefixes)
        else:
            subscriptions = [p + s.encode("utf-8") for p in prefixes for s in self.streams]
        if events:
            subscriptions.append(protocol.TOPIC_EVENTS)
        self.topics: set[bytes] = set(subscriptions)
        self.socket = (context or zmq.Context.instance()).socket(zmq.SUB)
        self.socket.setsockopt(zmq.RCVHWM, rcvhwm)
        self.socket.setsockopt(zmq.LINGER, 0)
        for topic in subscriptions:
            self.socket.setsockopt(zmq.SUBSCRIBE, topic)
        if curve is not None:
            curve.apply(self.socket)
        self.socket.connect(endpoint)
        self.last_heard = -math.inf  # time.monotonic() of the last message of any kind

    def _wanted(self, topic: bytes) -> bool:
        # Subscriptions are prefix matches ("ctl.a" also receives "ctl.ab"): with named streams
        # the topic is compared exactly; with all streams every subscribed prefix is wanted.
        return self.streams is None or topic in self.topics

    def recv(self, timeout_ms: int = 1000
             ) -> protocol.ControlsMessage | PublishedMesh | dict[str, Any] | None:
        """The next wanted message, or None after timeout_ms. Any message the server sends,
        even one this version cannot decode, updates ``last_heard``."""
        deadline = time.monotonic() + timeout_ms / 1000
        while True:
            left = int((deadline - time.monotonic()) * 1000)
            if not self.socket.poll(max(left, 0), zmq.POLLIN):
                return None
            frames = self.socket.recv_multipart()
            self.last_heard = time.monotonic()
            if self._wanted(frames[0]):
                try:
                    return protocol.decode_published(frames)
                except protocol.FrameError as err:
                    log.debug("undecodable message on %r: %s", frames[0], err)
            if time.monotonic() >= deadline:  # other streams' traffic must not hold us past it
                return None

    def close(self) -> None:
        self.socket.close(linger=0)

    def __enter__(self) -> Subscriber:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class ControlsSubscriber(Subscriber):
    """Receives one stream's controls and, if asked, its telemetry and the server's events."""

    def __init__(
        self,
        stream: str,
        endpoint: str = DEFAULT_OUTPUT,
        *,
        controls: bool = True,
        telemetry: bool = False,
        events: bool = False,
        context: zmq.Context | None = None,
        rcvhwm: int = 1000,
        curve: ClientCurve | None = None,
    ) -> None:
        self.stream = stream
        super().__init__(endpoint, streams=(stream,), controls=controls, telemetry=telemetry,
                         events=events, context=context, rcvhwm=rcvhwm, curve=curve)

    def __enter__(self) -> ControlsSubscriber:
        return self


def discover_streams(endpoint: str = DEFAULT_OUTPUT, *, timeout_s: float = 3.0,
                     settle_s: float = 0.3, curve: ClientCurve | None = None,
                     context: zmq.Context | None = None) -> list[str]:
    """The stream ids a server's telemetry names, in the order first heard: waits up to
    ``timeout_s`` for the first, then ``settle_s`` more for the others (every stream's telemetry
    goes out each tick). TimeoutError when none is heard."""
    with Subscriber(endpoint, controls=False, telemetry=True, curve=curve,
                    context=context) as sub:
        found: list[str] = []
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            msg = sub.recv(int(left * 1000) + 1)
            if isinstance(msg, dict) and msg.get("type") == "telemetry":
                if msg["stream"] not in found:
                    found.append(str(msg["stream"]))
                if len(found) == 1:
                    deadline = min(deadline, time.monotonic() + settle_s)
    if not found:
        raise TimeoutError(f"no telemetry from {endpoint} within {timeout_s:g} s to learn the "
                           "stream ids")
    return found
