"""Socket helpers: options set before bind, bounded linger on close.

Most ZeroMQ socket options apply only to binds and connects made after they are set, so the
high-water marks and linger are set first, then the socket binds. PUB and ROUTER drop at the
high-water mark instead of blocking, which is what a live server wants.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable

import zmq
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)


Prepare = Callable[[zmq.Socket], None]  # security options (runtime/trust/security.py), set before bind


class BindError(RigcastError, OSError):
    """An endpoint could not be bound (port in use, bad interface); the message names it."""

    advice = ("another process (maybe another rigcast server) holds that port; pick another "
              "port or stop the other process")


def _bind(sock: zmq.Socket, endpoint: str, role: str) -> None:
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        sock.close(linger=0)
        raise BindError(f"cannot bind the {role} socket to {endpoint}: {exc.strerror}") from None


def bind_router(
    ctx: zmq.Context, endpoint: str, *, rcvhwm: int, sndhwm: int, linger_ms: int,
    max_message_bytes: int, prepare: Prepare | None = None,
) -> zmq.Socket:
    """A ROUTER socket for mesh frames and requests, bound to ``endpoint``.

    ``max_message_bytes`` + 64 KiB becomes ZMQ_MAXMSGSIZE, which libzmq applies to each part: a
    peer announcing a larger part is disconnected before its bytes are buffered; a part under
    that but over the payload cap is refused with a reply (runtime/trust/limits.py bounds the parts
    and the whole message). ``prepare`` sets the security options (CURVE, ZAP domain, handshake
    timeout) before the bind.
    """
    sock = ctx.socket(zmq.ROUTER)
    sock.setsockopt(zmq.RCVHWM, rcvhwm)
    sock.setsockopt(zmq.SNDHWM, sndhwm)
    sock.setsockopt(zmq.LINGER, linger_ms)
    sock.setsockopt(zmq.MAXMSGSIZE, max_message_bytes + 65536)
    if prepare is not None:
        prepare(sock)
    _bind(sock, endpoint, "input")
    return sock


def bind_pub(ctx: zmq.Context, endpoint: str, *, sndhwm: int, linger_ms: int,
             prepare: Prepare | None = None) -> zmq.Socket:
    """A PUB socket for controls, telemetry and events, bound to ``endpoint``. Subscribers send
    only subscriptions, so ZMQ_MAXMSGSIZE is small (a topic is at most 4 + 255 bytes)."""
    sock = ctx.socket(zmq.PUB)
    sock.setsockopt(zmq.SNDHWM, sndhwm)
    sock.setsockopt(zmq.LINGER, linger_ms)
    sock.setsockopt(zmq.MAXMSGSIZE, 4096)
    if prepare is not None:
        prepare(sock)
    _bind(sock, endpoint, "output")
    return sock


def bound_endpoint(sock: zmq.Socket) -> str:
    """The endpoint a socket really bound (resolves ``tcp://127.0.0.1:*`` to a port)."""
    value = sock.getsockopt(zmq.LAST_ENDPOINT)
    return value.decode() if isinstance(value, bytes) else str(value)


def close_all(*socks: zmq.Socket | None, linger_ms: int) -> None:
    """Close sockets with a bounded linger, so shutdown never waits on a dead peer."""
    for sock in socks:
        if sock is not None and not sock.closed:
            sock.close(linger=linger_ms)


def wait_for_input(poller: zmq.Poller, timeout_ms: int, spin_ns: int) -> bool:
    """True when the poller's sockets have input; waits up to ``timeout_ms``.

    With ``spin_ns`` > 0 it first polls without blocking for that long, calling sched_yield
    between polls: a spinner that never yields keeps the ZeroMQ I/O thread, which must run to
    deliver the message, off a shared core. Then it blocks in the poller for the rest.
    """
    if spin_ns > 0:
        end = time.perf_counter_ns() + spin_ns
        while True:
            if poller.poll(0):
                return True
            if time.perf_counter_ns() >= end:
                break
            os.sched_yield()
    return bool(poller.poll(timeout_ms))
