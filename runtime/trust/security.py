"""Who may connect, and how many: CurveZMQ and ZAP on the server's sockets, a handshake timeout
and a connection cap.

- **CurveZMQ** (RFC 26, https://rfc.zeromq.org/spec/26/) encrypts and authenticates every
  connection when the server has a secret key: both sockets are CURVE servers, and a client
  (sender or subscriber) must know the server's public key and hold a key pair of its own.
- **ZAP** (RFC 27, https://rfc.zeromq.org/spec/27/) decides which clients may connect. pyzmq's
  ``zmq.auth.thread.ThreadAuthenticator`` answers it, with the folder of authorised client public
  keys (``configure_curve``). The User-Id it returns for a CURVE client is the client's public key
  in Z85, which the server uses to tell senders apart (runtime/trust/ownership.py).
- Both sockets set a ZAP domain, so every handshake, also without CURVE, goes through the
  authenticator; it refuses a new handshake while a socket holds ``max_connections``
  connections. The count comes from socket monitor events (accepted minus disconnected and
  closed), read on a small thread, so it may trail new connections by a few.
- ``ZMQ_HANDSHAKE_IVL`` closes a connection whose handshake does not finish in time, so a peer
  that connects and says nothing holds a file descriptor only that long.
"""

from __future__ import annotations

import contextlib
import logging
import threading
from pathlib import Path

import zmq
import zmq.auth
from rigcast.runtime.serve.config import ServerConfig, is_loopback
from rigcast.runtime.trust.keys import KeyFileError, load_secret_key, public_key_count
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import parse_monitor_message

log = logging.getLogger(__name__)

ZAP_DOMAIN = "rigcast"
_OPEN = zmq.EVENT_ACCEPTED
_SHUT = zmq.EVENT_DISCONNECTED | zmq.EVENT_CLOSED


class CappedAuthenticator(ThreadAuthenticator):
    """pyzmq's ZAP authenticator, refusing new handshakes while the socket they are for is at
    its connection cap. (libzmq gives the ZAP handler no socket; both of ours share the cap's
    count per socket, so the larger of the two counts is checked.)"""

    def __init__(self, context: zmq.Context, max_connections: int) -> None:
        super().__init__(context, log=logging.getLogger(__name__ + ".zap"))
        self.max_connections = max_connections
        self.counts: dict[int, int] = {}
        self.refused = 0

    async def handle_zap_message(self, msg: list[bytes]) -> None:
        if len(msg) >= 6 and max(self.counts.values(), default=0) > self.max_connections:
            self.refused += 1
            self._send_zap_reply(msg[1], b"400", b"too many connections")
            return
        await super().handle_zap_message(msg)


class ServerSecurity:
    """The security options of one server's sockets; ``prepare`` is called on each socket
    before it binds, ``watch`` after, and ``stop`` at shutdown."""

    def __init__(self, ctx: zmq.Context, config: ServerConfig) -> None:
        self.config = config
        self.curve = config.curve_secret_key is not None
        self._public = b""
        self._secret = b""
        if config.curve_secret_key is not None:
            self._public, self._secret = load_secret_key(config.curve_secret_key)
            assert config.authorized_keys is not None  # ServerConfig checks they go together
            if public_key_count(config.authorized_keys) == 0:
                raise KeyFileError(f"authorized_keys folder {config.authorized_keys} holds no "
                                "public key files (*.key); add the clients' keys")
        for endpoint in (config.input, config.output):
            if not is_loopback(endpoint) and not self.curve:
                log.warning("INSECURE: %s is reachable from the network without CURVE; anyone "
                            "there can send frames, read every stream and ask for reloads",
                            endpoint)
        self.auth = CappedAuthenticator(ctx, config.max_connections)
        self.auth.start()
        if config.authorized_keys is not None:
            self.auth.configure_curve(domain=ZAP_DOMAIN, location=str(config.authorized_keys))
        self._monitors: list[zmq.Socket] = []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def prepare(self, sock: zmq.Socket) -> None:
        sock.setsockopt(zmq.HANDSHAKE_IVL, self.config.handshake_timeout_ms)
        sock.setsockopt_string(zmq.ZAP_DOMAIN, ZAP_DOMAIN)
        if self.curve:
            sock.setsockopt(zmq.CURVE_SERVER, 1)
            sock.setsockopt(zmq.CURVE_SECRETKEY, self._secret)
            sock.setsockopt(zmq.CURVE_PUBLICKEY, self._public)

    def watch(self, *socks: zmq.Socket) -> None:
        """Count each socket's connections from its monitor events, on one thread."""
        for sock in socks:
            self._monitors.append(sock.get_monitor_socket(_OPEN | _SHUT))
        self._thread = threading.Thread(target=self._count, name="conn-monitor", daemon=True)
        self._thread.start()

    def _count(self) -> None:
        poller = zmq.Poller()
        for mon in self._monitors:
            poller.register(mon, zmq.POLLIN)
        open_fds: dict[int, set[int]] = {i: set() for i in range(len(self._monitors))}
        while not self._stop.is_set():
            for mon, _ in poller.poll(100):
                i = self._monitors.index(mon)
                try:
                    event = parse_monitor_message(mon.recv_multipart(zmq.NOBLOCK))
                except (zmq.Again, zmq.ZMQError):
                    continue
                if event["event"] & _OPEN:
                    open_fds[i].add(int(event["value"]))
                elif event["event"] & _SHUT:
                    open_fds[i].discard(int(event["value"]))
                self.auth.counts[i] = len(open_fds[i])

    @property
    def connections(self) -> int:
        return max(self.auth.counts.values(), default=0)

    def stop(self, *socks: zmq.Socket | None) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(1.0)
        for sock in socks:
            if sock is not None and not sock.closed:
                with contextlib.suppress(zmq.ZMQError):
                    sock.disable_monitor()
        for mon in self._monitors:
            mon.close(linger=0)
        self.auth.stop()


def server_public_key_text(path: Path) -> str:
    """The Z85 public key matching a secret key file, for the log line clients need."""
    public, _secret = load_secret_key(path)
    return public.decode("ascii")
