"""Relay a server's solved controls to stage tools over OSC 1.0 (UDP), one bundle per frame.

Each controls message of one stream becomes one OSC bundle (OSC 1.0 specification, "OSC
Bundles"), time-tagged with the server's publish time (``t_pub_ns``, Unix time, as an NTP time
tag), holding:

- one message per control, ``<prefix>/<stream>/<control>`` with one float32 argument;
- ``<prefix>/<stream>/frame`` with the frame number and the protocol's flag bits (two int32).

Addresses are made safe as OSC 1.0 requires ("OSC Address Patterns"): each part between slashes
is printable ASCII without space, ``#``, ``*``, ``,``, ``/``, ``?``, ``[``, ``]``, ``{``, ``}``;
any other character becomes ``_`` (an empty part becomes ``_``). Distinct names that end up
equal get ``_2``, ``_3``, ... in schema order.

The subscriber is ``rigcast.runtime.messaging.client.ControlsSubscriber``, used as it is. The head pose is
not in the controls messages yet (a versioned protocol field, planned); it is not relayed.
"""

from __future__ import annotations

import argparse
import logging
import socket
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from rigcast.runtime.errors import RigcastError
from rigcast.runtime.messaging.client import ControlsSubscriber
from rigcast.runtime.messaging.protocol import ControlsMessage

log = logging.getLogger(__name__)

INSTALL_HINT = "pip install 'rigcast[osc]'"
OSC_FORBIDDEN = set(" #*,/?[]{}")  # OSC 1.0, "OSC Address Patterns"
DEFAULT_PREFIX = "/rigcast"


class OscError(RigcastError, ValueError):
    """A bad OSC target, prefix or name; the message names it."""


def safe_part(name: str) -> str:
    """One address part: printable ASCII (33..126) minus the characters OSC 1.0 reserves."""
    out = "".join(ch if 32 < ord(ch) < 127 and ch not in OSC_FORBIDDEN else "_" for ch in name)
    return out or "_"


def stream_head(prefix: str, stream: str) -> str:
    """``<prefix>/<stream>``, every part made safe (empty parts of the prefix dropped)."""
    if not prefix.startswith("/"):
        raise OscError(f"OSC prefix must start with '/', got {prefix!r}")
    parts = [safe_part(p) for p in prefix.split("/") if p] + [safe_part(stream)]
    return "/" + "/".join(parts)


def osc_addresses(prefix: str, stream: str, names: Sequence[str]) -> tuple[str, ...]:
    """``<prefix>/<stream>/<name>`` for every control, safe and unique, in schema order
    (``frame`` is kept for the frame message)."""
    head = stream_head(prefix, stream)
    seen: set[str] = {"frame"}
    out = []
    for name in names:
        part, k = safe_part(name), 1
        while part in seen:
            k += 1
            part = f"{safe_part(name)}_{k}"
        seen.add(part)
        out.append(f"{head}/{part}")
    return tuple(out)


def frame_bundle(msg: ControlsMessage, addresses: Sequence[str], frame_address: str) -> bytes:
    """One controls message -> one OSC 1.0 bundle datagram (see the module docstring)."""
    from pythonosc.osc_bundle_builder import OscBundleBuilder
    from pythonosc.osc_message_builder import OscMessageBuilder

    if len(addresses) != msg.values.shape[0]:
        raise OscError(f"{len(addresses)} addresses for {msg.values.shape[0]} controls")
    bundle = OscBundleBuilder(msg.t_pub_ns / 1e9)
    for address, value in zip(addresses, msg.values.tolist(), strict=True):
        m = OscMessageBuilder(address)
        m.add_arg(float(value), "f")
        bundle.add_content(m.build())
    m = OscMessageBuilder(frame_address)
    m.add_arg(int(msg.frame) & 0x7FFFFFFF, "i")
    m.add_arg(int(msg.flags), "i")
    bundle.add_content(m.build())
    return bytes(bundle.build().dgram)


@dataclass(frozen=True)
class RelayStats:
    """frames relayed, datagrams that failed to send, seconds of the relay."""

    frames: int
    send_errors: int
    seconds: float
    interrupted: bool = False  # ended by Ctrl-C


def relay(subscriber: ControlsSubscriber, names: Sequence[str], host: str, port: int, *,
          prefix: str = DEFAULT_PREFIX, max_frames: int | None = None,
          duration_s: float | None = None, idle_timeout_s: float | None = None,
          should_stop: Callable[[], bool] | None = None) -> RelayStats:
    """Send every controls message of ``subscriber``'s stream to ``host:port`` as a bundle,
    until ``max_frames``, ``duration_s``, ``idle_timeout_s`` without a frame, ``should_stop()``
    or Ctrl-C."""
    try:
        import pythonosc  # noqa: F401  (frame_bundle builds with it)
    except ImportError:
        raise OscError(f"OSC output needs python-osc: {INSTALL_HINT}") from None
    if not 0 < port < 65536:
        raise OscError(f"OSC port must be 1..65535, got {port}")
    try:
        family, kind, proto, _, target = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM)[0]
    except socket.gaierror as exc:
        raise OscError(f"OSC host {host!r} cannot be resolved ({exc})") from None
    addresses = osc_addresses(prefix, subscriber.stream, names)
    frame_address = stream_head(prefix, subscriber.stream) + "/frame"
    if host not in ("127.0.0.1", "localhost", "::1"):
        log.warning("sending OSC to %s:%d, off this machine: OSC has no authentication; use a "
                    "closed stage network", host, port)
    start = time.monotonic()
    with socket.socket(family, kind, proto) as udp:
        frames, errors, interrupted = _relay_loop(subscriber, udp, target, addresses,
                                                  frame_address, max_frames, duration_s,
                                                  idle_timeout_s, should_stop)
    return RelayStats(frames, errors, time.monotonic() - start, interrupted)


def _relay_loop(subscriber: ControlsSubscriber, udp: socket.socket, target: Any,
                addresses: Sequence[str], frame_address: str, max_frames: int | None,
                duration_s: float | None, idle_timeout_s: float | None,
                should_stop: Callable[[], bool] | None) -> tuple[int, int, bool]:
    frames = errors = 0
    start = last = time.monotonic()
    try:
        while max_frames is None or frames < max_frames:
            now = time.monotonic()
            if duration_s is not None and now - start >= duration_s:
                break
            if idle_timeout_s is not None and now - last >= idle_timeout_s:
                break
            if should_stop is not None and should_stop():
                break
            msg = subscriber.recv(timeout_ms=50)
            if not isinstance(msg, ControlsMessage) or msg.stream != subscriber.stream:
                continue
            last = time.monotonic()
            try:
                udp.sendto(frame_bundle(msg, addresses, frame_address), target)
                frames += 1
            except OSError as exc:  # e.g. no listener on a connected port: count, keep going
                errors += 1
                log.debug("OSC send failed for frame %d: %s", msg.frame, exc)
    except KeyboardInterrupt:
        log.info("OSC relay stopped by Ctrl-C after %d frames", frames)
        return frames, errors, True
    return frames, errors, False


def parse_target(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[::1]:PORT`` for IPv6) -> (host, port)."""
    host, sep, port = text.rpartition(":")
    host = host.strip("[]")
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise OscError(f"OSC target must be HOST:PORT with a port 1..65535, got {text!r}")
    return host, int(port)


def osc_from_args(args: argparse.Namespace) -> int:
    """`rigcast osc`: subscribe to one stream's controls and relay them (see the module)."""
    from rigcast.errors import EXIT_INTERRUPTED, EXIT_OK, NoAnswerError, UserError
    from rigcast.live.connect import curve_from_args, fetch_schema, stream_or_discover

    try:
        host, port = parse_target(args.osc)
        stream_head(args.prefix, "x")
    except OscError as exc:
        raise UserError(str(exc), "e.g. --osc 127.0.0.1:9000 --prefix /rigcast", code=2) from None
    curve = curve_from_args(args)
    stream = stream_or_discover(args.stream, args.source, args.timeout, curve)
    schema = fetch_schema(args.to, stream, args.timeout, curve)
    sys.stdout.write(f"relaying stream {stream!r} ({len(schema)} controls) to OSC "
                     f"{host}:{port} under {stream_head(args.prefix, stream)}/...\n")
    sys.stdout.flush()
    with ControlsSubscriber(stream, args.source, curve=curve) as sub:
        stats = relay(sub, schema.names, host, port, prefix=args.prefix, max_frames=args.frames,
                      duration_s=args.duration)
    if stats.frames == 0 and not stats.interrupted:
        raise NoAnswerError(f"no controls arrived for stream {stream!r} from {args.source}",
                            "is a sender streaming to the server? (`rigcast send ...`)")
    sys.stdout.write(f"relayed {stats.frames} frames as OSC bundles in {stats.seconds:.1f} s "
                     f"({stats.send_errors} send errors)\n")
    return EXIT_INTERRUPTED if stats.interrupted else EXIT_OK
