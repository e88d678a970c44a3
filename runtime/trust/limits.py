"""Bounds on what one peer can make the server hold: message parts and size, read part by part,
and rate-limited logs of repeated rejects.

libzmq hands a multipart message to the application only once its last part has arrived, and
ZMQ_MAXMSGSIZE (set in runtime/messaging/sockets.py) bounds each part, not the message. So the server reads
a message one part at a time: it keeps at most ``MAX_REQUEST_PARTS`` parts and at most
``max_header_bytes + max_payload_bytes`` bytes, and from the first part past either cap it keeps
nothing more, releasing every part as soon as it is read. A refused message is answered like any
other bad message (``malformed`` for too many parts, ``oversize`` for too many bytes).
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from typing import Any

import zmq
from rigcast.runtime.messaging import protocol

log = logging.getLogger(__name__)

MAX_REQUEST_PARTS = 2  # after the identity: [header] or [header, payload] (docs/protocol.md §3)


@dataclass(frozen=True)
class ReadLimits:
    """How much of one message the server keeps."""

    max_header_bytes: int
    max_payload_bytes: int
    max_parts: int = MAX_REQUEST_PARTS

    @property
    def max_total_bytes(self) -> int:
        return self.max_header_bytes + self.max_payload_bytes


@dataclass(frozen=True)
class Incoming:
    """One message as read: the ROUTER identity, the parts kept, the first part (for its
    properties, e.g. the ZAP User-Id), and the refusal when a cap was passed."""

    identity: bytes
    parts: list[zmq.Frame]
    first: zmq.Frame | None
    refusal: protocol.FrameError | None
    part_count: int
    size: int


def read_message(sock: zmq.Socket, limits: ReadLimits) -> Incoming:
    """Read one whole message from a ROUTER without blocking (zmq.Again when none waits).

    Parts past the caps are read and released at once (about 1 µs each), never kept.
    """
    head = sock.recv(zmq.NOBLOCK, copy=False)
    identity = head.bytes
    parts: list[zmq.Frame] = []
    first: zmq.Frame | None = None
    refusal: protocol.FrameError | None = None
    count = size = 0
    more = head.more
    while more:
        part = sock.recv(copy=False)  # the rest of a message is already queued: no wait
        more = part.more
        count += 1
        size += len(part)
        if first is None:
            first = part
        if refusal is not None:
            continue
        if count > limits.max_parts:
            refusal = protocol.FrameError("malformed", f"a request has 1 to {limits.max_parts} "
                                          "frames; this one has more")
            parts = []
        elif size > limits.max_total_bytes:
            refusal = protocol.FrameError("oversize", f"message is over {size} bytes, limit "
                                          f"{limits.max_total_bytes}")
            parts = []
        else:
            parts.append(part)
    if refusal is not None and refusal.reason == "malformed":
        refusal = protocol.FrameError("malformed", f"a request has 1 to {limits.max_parts} "
                                      f"frames, got {count}")
    elif count == 0:
        refusal = protocol.FrameError("malformed", "a request has 1 to "
                                      f"{limits.max_parts} frames, got 0")
    return Incoming(identity, parts, first, refusal, count, size)


def user_id(part: zmq.Frame | None) -> str | None:
    """The ZAP User-Id of the connection a part came from (the client's CURVE public key in Z85
    with our authenticator), or None when the connection has none."""
    if part is None:
        return None
    try:
        value = part.get("User-Id")
    except zmq.ZMQError:
        return None
    return value if isinstance(value, str) and value else None


class RateLimitedLog:
    """Logs at most ``burst`` messages per key per ``interval_s``; the first message after a
    quiet spell reports how many were suppressed. Common practice (as syslog's rate limiting),
    no source: a peer repeating one bad message must not fill the disk with log."""

    def __init__(self, logger: logging.Logger, *, interval_s: float = 10.0, burst: int = 5,
                 max_keys: int = 1024) -> None:
        self.logger = logger
        self.interval_s = interval_s
        self.burst = burst
        self.max_keys = max_keys
        self._windows: dict[str, list[float | int]] = {}  # key -> [window start, sent, dropped]

    def __call__(self, key: str, level: int, msg: str, *args: Any, exc_info: bool = False) -> bool:
        """Log unless the key is over its budget; True when it was logged."""
        now = time.monotonic()
        window = self._windows.get(key)
        if window is None or now - float(window[0]) >= self.interval_s:
            suppressed = int(window[2]) if window is not None else 0
            if window is None and len(self._windows) >= self.max_keys:
                self._windows.clear()
            window = self._windows[key] = [now, 0, 0]
            if suppressed:
                self.logger.log(level, "%d more like %r suppressed in the last %.0f s",
                                suppressed, key, self.interval_s)
        if int(window[1]) >= self.burst:
            window[2] = int(window[2]) + 1
            return False
        window[1] = int(window[1]) + 1
        self.logger.log(level, msg, *args, exc_info=exc_info)
        return True
