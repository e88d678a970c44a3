"""Socket helpers: options set before bind, bounded linger on close.

Most ZeroMQ socket options apply only to binds and connects made after they are set, so the
high-water marks and linger are set first, then the socket binds. PUB and ROUTER drop at the
high-water mark instead of blocking, which is what a live server wants.
"""

from __future__ import annotations

import logging

import zmq

log = logging.getLogger(__name__)


class BindError(OSError):
    """An endpoint could not be bound (port in use, bad interface); the message names it."""


def _bind(sock: zmq.Socket, endpoint: str, role: str) -> None:
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        sock.close(linger=0)
        raise BindError(f"cannot bind the {role} socket to {endpoint}: {exc.strerror}") from None


def bind_router(
    ctx: zmq.Context, endpoint: str, *, rcvhwm: int, sndhwm: int, linger_ms: int,
    max_message_bytes: int,
) -> zmq.Socket:
    """A ROUTER socket for mesh frames and requests, bound to ``endpoint``.

    ``max_message_bytes`` becomes ZMQ_MAXMSGSIZE with headroom for the header, so that a peer
    announcing a huge message is disconnected by libzmq before the bytes are buffered; messages
    under that but over the payload cap are rejected by the decoder with a reply.
    """
    sock = ctx.socket(zmq.ROUTER)
    sock.setsockopt(zmq.RCVHWM, rcvhwm)
    sock.setsockopt(zmq.SNDHWM, sndhwm)
    sock.setsockopt(zmq.LINGER, linger_ms)
    sock.setsockopt(zmq.MAXMSGSIZE, 4 * max_message_bytes + 65536)
    _bind(sock, endpoint, "input")
    return sock


def bind_pub(ctx: zmq.Context, endpoint: str, *, sndhwm: int, linger_ms: int) -> zmq.Socket:
    """A PUB socket for controls, telemetry and events, bound to ``endpoint``."""
    sock = ctx.socket(zmq.PUB)
    sock.setsockopt(zmq.SNDHWM, sndhwm)
    sock.setsockopt(zmq.LINGER, linger_ms)
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
