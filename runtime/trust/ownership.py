"""Who may send into a stream, and which sender timestamps a stream believes (docs/protocol.md,
"Stream ownership and the restart rule").

- A stream takes frames from one sender at a time: the first peer whose valid frame reaches it
  claims it. A peer is its ZAP User-Id (its CURVE public key) when CURVE is on, else its
  connection (the ROUTER identity). Another peer's frames get ``stream_owned`` until the owner
  has sent nothing for ``owner_timeout_s``; then the next valid frame claims the stream.
- A claim starts a *session*: the offset between the sender's clock and the server's is taken
  from its first frame. A later frame whose offset moved more than ``max_clock_step_s`` (a clock
  stamped far in the future or the past, or a sender that restarted with another clock) gets
  ``bad_timestamp`` and changes nothing. A frame whose header carries another ``session`` than
  the claim's starts a new session: the stream's timing and filter state restart.
- A stream created by ``accept_any_stream`` is removed after ``stream_idle_s`` without frames.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from rigcast.runtime.messaging import protocol

log = logging.getLogger(__name__)


@dataclass
class Claim:
    """The current sender of one stream."""

    peer: str
    session: int | None
    offset_ns: int  # sender clock - server clock, at the session's first frame
    last_seen: float  # monotonic seconds of its last accepted frame


class StreamGuard:
    """Claims, sessions and clock offsets of every stream; the server asks ``admit`` before it
    keeps a valid frame."""

    def __init__(self, *, owner_timeout_s: float, max_clock_step_s: float) -> None:
        self.owner_timeout_s = owner_timeout_s
        self.max_step_ns = int(max_clock_step_s * 1e9)
        self.claims: dict[str, Claim] = {}

    def admit(self, stream: str, frame: int, peer: str, session: int | None, t_send_ns: int,
              t_recv_ns: int, now: float) -> bool:
        """Accept a valid frame's sender and timestamp, or raise FrameError ("stream_owned",
        "bad_timestamp"). True when the frame starts a new session (the caller restarts the
        stream's timing and filter state)."""
        claim = self.claims.get(stream)
        if claim is not None and claim.peer != peer:
            idle = now - claim.last_seen
            if idle < self.owner_timeout_s:
                raise protocol.FrameError(
                    "stream_owned", f"stream {stream!r} takes frames from another sender; it "
                    f"may be claimed after {self.owner_timeout_s:g} s without its frames",
                    stream=stream, frame=frame)
            log.info("stream %s: sender idle %.1f s, claimed by another peer", stream, idle)
            claim = None
        offset = t_send_ns - t_recv_ns
        if claim is None or (session is not None and session != claim.session):
            restarted = claim is not None or stream in self.claims
            self.claims[stream] = Claim(peer, session, offset, now)
            return restarted
        step = offset - claim.offset_ns
        if abs(step) > self.max_step_ns:
            raise protocol.FrameError(
                "bad_timestamp", f"frame {frame} of stream {stream!r}: t_send_ns is "
                f"{step / 1e9:+.3g} s off the sender's clock since its session began (limit "
                f"{self.max_step_ns / 1e9:g} s); a sender whose clock restarted sends a new "
                "'session' in its header", stream=stream, frame=frame)
        claim.last_seen = now
        return False

    def expire(self, now: float, idle_s: float) -> list[str]:
        """Drop the claims idle for ``idle_s``; returns their streams."""
        gone = [s for s, c in self.claims.items() if now - c.last_seen >= idle_s]
        for stream in gone:
            del self.claims[stream]
        return gone


def peer_of(identity: bytes, user: str | None, curve: bool) -> str:
    """The name of the sender of a message: its CURVE key with CURVE on, else its connection."""
    if curve and user:
        return "key:" + user
    return "conn:" + identity.hex()


def session_of(header: dict[str, object]) -> int | None:
    """The optional ``session`` of a mesh header (uint64); FrameError "malformed" when bad."""
    if "session" not in header:
        return None
    value = header["session"]
    if not (isinstance(value, int) and not isinstance(value, bool) and 0 <= value < 2**64):
        raise protocol.FrameError("malformed", "mesh header field 'session' must be a uint64",
                                  stream=header.get("stream"), frame=header.get("frame"))
    return value
