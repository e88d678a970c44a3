"""The wire's ground floor (docs/protocol.md §2): versions, flags, reasons, topics and limits,
the rejection error, the decoded message records, msgpack headers and their checked decoding.

runtime/messaging/protocol.py (requests and meshes, and the one API that re-exports all of this),
runtime/messaging/messages.py (server -> client messages) and runtime/messaging/protocol_client.py (their
decoding) build on it; it imports none of them, so the three never import each other in a circle.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.messaging.nesting import nesting_within
from rigcast.runtime.messaging.timecode import Timecode
from rigcast.runtime.solve.head_pose import HeadPose

log = logging.getLogger(__name__)

PROTOCOL_VERSION = 1
SUPPORTED_VERSIONS: tuple[int, ...] = (1,)

FLAG_FILTERED = 1
FLAG_CLAMPED = 2
FLAG_OFF_MANIFOLD = 4
FLAG_STALE = 8
FLAG_HELD = 16
FLAGS = {"filtered": FLAG_FILTERED, "clamped": FLAG_CLAMPED,
         "off_manifold": FLAG_OFF_MANIFOLD, "stale": FLAG_STALE, "held": FLAG_HELD}

REASONS: tuple[str, ...] = (
    "bad_vertex_count",
    "non_finite",
    "malformed",
    "unknown_version",
    "unsupported_version",
    "oversize",
    "unknown_stream",
    "unknown_type",
    "bad_bundle",
    "bad_timestamp",
    "stream_owned",
)

TOPIC_CONTROLS = b"ctl."
TOPIC_TELEMETRY = b"tel."
TOPIC_EVENTS = b"evt"
TOPIC_MESHES = b"msh."  # opt-in: each processed frame's mesh (ServerConfig.publish_meshes)
MAX_STREAM_BYTES = 255
MAX_HEADER_BYTES = 4096
# Our headers nest two deep (a map holding a list); a deeper one is refused before anything walks
# it recursively (repr, logging), which a header ~1,000 deep would take past Python's limit.
MAX_HEADER_DEPTH = 8
# Server -> client headers (schema replies, telemetry) grow with the control count: a schema reply
# for the 46-control demo face is about 4.3 kB. Clients cap them far higher than the server caps
# what it receives.
MAX_REPLY_HEADER_BYTES = 1 << 20
_U64 = 2**64
_I64 = 2**63
F32 = np.dtype("<f4")  # the payloads' dtype: little-endian float32


class FrameError(RigcastError, ValueError):
    """A message that is rejected; ``reason`` is one of REASONS and goes on the wire."""

    def __init__(
        self, reason: str, message: str, *, stream: str | None = None, frame: int | None = None
    ) -> None:
        if reason not in REASONS:
            raise ValueError(f"unknown rejection reason {reason!r}")
        super().__init__(message)
        self.reason = reason
        self.message = message
        # They may come straight from a peer's header: keep only values the wire allows, so an
        # error about a bad message is always safe to count, log and send back.
        self.stream = stream if _stream_ok(stream) else None
        self.frame = frame if _u64(frame) else None


@dataclass(frozen=True)
class MeshFrame:
    """A decoded mesh frame; ``vertices`` (V, 3) float32 is a read-only view on the payload."""

    stream: str
    frame: int
    t_send_ns: int
    vertices: np.ndarray
    timecode: Timecode | None = None  # the sender's SMPTE timecode of the frame, checked


@dataclass(frozen=True)
class ControlsMessage:
    """A decoded controls message; ``values`` (C,) float32 is read-only."""

    stream: str
    frame: int
    t_send_ns: int
    t_recv_ns: int
    t_pub_ns: int
    flags: int
    values: np.ndarray
    head_pose: HeadPose | None = None  # the head motion stabilisation removed; None when off
    timecode: str | None = None  # the mesh frame's SMPTE timecode, echoed (docs/protocol.md §3.1)
    tc_rate: str | None = None  # its rate, e.g. "24" or "29.97"

    def has(self, flag: int) -> bool:
        return bool(self.flags & flag)


def flag_names(flags: int) -> tuple[str, ...]:
    return tuple(name for name, bit in FLAGS.items() if flags & bit)


# --- headers --------------------------------------------------------------------------------

def _plain(obj: Any) -> Any:
    """msgpack ``default`` hook: numpy scalars and arrays become plain Python values."""
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, tuple | set | frozenset):
        return list(obj)
    raise TypeError(f"cannot encode {type(obj).__name__} in a message header")


def pack(header: Mapping[str, Any]) -> bytes:
    """A header map as msgpack bytes (str as UTF-8 str, bin for bytes, ints as ints)."""
    return msgpack.packb(header, use_bin_type=True, default=_plain)


def topic_bytes(prefix: bytes, stream: str) -> bytes:
    return prefix + stream.encode("utf-8")


def merge_fields(header: dict[str, Any], fields: Mapping[str, Any]) -> None:
    clash = set(fields) & set(header)
    if clash:
        raise ValueError(f"fields may not override header keys {sorted(clash)}")
    header.update(fields)


# --- checked decoding -------------------------------------------------------------------------

def _is_int(x: Any) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _stream_ok(x: Any) -> bool:
    return isinstance(x, str) and 0 < len(x.encode("utf-8", "surrogatepass")) <= MAX_STREAM_BYTES


def _u64(x: Any) -> bool:
    return _is_int(x) and 0 <= x < _U64


def _i64(x: Any) -> bool:
    return _is_int(x) and -_I64 <= x < _I64


def _int_list(x: Any) -> bool:
    return isinstance(x, list) and len(x) <= 64 and all(_is_int(i) for i in x)


def _opt_str(x: Any) -> bool:
    return x is None or isinstance(x, str)


def _opt_u64(x: Any) -> bool:
    return x is None or _u64(x)


_FIELDS: dict[str, dict[str, Any]] = {
    "mesh": {"stream": _stream_ok, "frame": _u64, "t_send_ns": _i64, "vertices": _u64},
    "schema": {"stream": _stream_ok, "versions": _int_list},
    "reload": {"stream": _stream_ok, "bundle": lambda x: isinstance(x, str) and x != ""},
    "schema_reply": {"stream": _stream_ok, "protocol_versions": _int_list,
                     "bundle": lambda x: isinstance(x, str), "vertices": _u64,
                     "controls": lambda x: isinstance(x, list)},
    "reload_reply": {"ok": lambda x: isinstance(x, bool), "message": lambda x: isinstance(x, str)},
    "error": {"reason": lambda x: isinstance(x, str), "message": lambda x: isinstance(x, str),
              "stream": _opt_str, "frame": _opt_u64},
    "controls": {"stream": _stream_ok, "frame": _u64, "t_send_ns": _i64, "t_recv_ns": _i64,
                 "t_pub_ns": _i64, "flags": _u64, "count": _u64},
    "telemetry": {"stream": _stream_ok},
    "published_mesh": {"stream": _stream_ok, "frame": _u64, "t_send_ns": _i64, "vertices": _u64,
                       "space": lambda x: x in ("raw", "stabilised")},
    "heartbeat": {"t_ns": _i64, "period_s": lambda x: isinstance(x, float),
                  "streams": lambda x: isinstance(x, list)},
    "event": {"kind": lambda x: isinstance(x, str), "stream": _opt_str},
}
MESSAGE_TYPES: tuple[str, ...] = tuple(_FIELDS)


def decode_header(
    raw: bytes | memoryview, *, max_header_bytes: int = MAX_HEADER_BYTES
) -> dict[str, Any]:
    """Decode and validate a header frame. Raises FrameError ("oversize", "malformed",
    "unknown_version", "unknown_type"); the error carries stream and frame when they parsed."""
    size = memoryview(raw).nbytes
    if size > max_header_bytes:
        raise FrameError("oversize", f"header is {size} bytes, limit {max_header_bytes}")
    try:
        header = msgpack.unpackb(raw, raw=False, strict_map_key=True, use_list=True)
    except (ValueError, TypeError, msgpack.UnpackException, RecursionError) as exc:
        raise FrameError(
            "malformed", f"header is not valid msgpack ({type(exc).__name__}: {exc})"
        ) from None
    if not isinstance(header, dict):
        raise FrameError("malformed", f"header must be a msgpack map, got {type(header).__name__}")
    if not nesting_within(header, MAX_HEADER_DEPTH):
        raise FrameError("malformed", f"header nests deeper than {MAX_HEADER_DEPTH} levels")
    stream = header.get("stream")
    stream = stream if _stream_ok(stream) else None
    frame = header.get("frame")
    frame = frame if _u64(frame) else None
    version = header.get("v")
    if not _is_int(version):
        raise FrameError("malformed", f"header field 'v' must be an int, got {version!r}",
                         stream=stream, frame=frame)
    if version not in SUPPORTED_VERSIONS:
        raise FrameError("unknown_version", f"protocol version {version} is not supported "
                         f"(server speaks {list(SUPPORTED_VERSIONS)})", stream=stream, frame=frame)
    kind = header.get("type")
    if not isinstance(kind, str):
        raise FrameError("malformed", f"header field 'type' must be a str, got {kind!r}",
                         stream=stream, frame=frame)
    fields = _FIELDS.get(kind)
    if fields is None:
        raise FrameError("unknown_type", f"unknown message type {kind!r}", stream=stream,
                         frame=frame)
    for name, check in fields.items():
        if name not in header:
            raise FrameError("malformed", f"{kind} header is missing {name!r}", stream=stream,
                             frame=frame)
        if not check(header[name]):
            raise FrameError("malformed", f"{kind} header field {name!r} has bad value "
                             f"{header[name]!r:.80}", stream=stream, frame=frame)
    return header
