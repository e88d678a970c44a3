"""The wire format between mesh senders, the server and control subscribers (docs/protocol.md).

Pure encode/decode over bytes and buffers; no sockets here. Every message is a msgpack map header
(one ZeroMQ frame) plus, for meshes and controls, one raw little-endian float32 payload frame.
Decoding a mesh never copies the vertex buffer.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

# The one API: the wire's basics (runtime/messaging/wire.py), the server -> client messages
# (runtime/messaging/messages.py) and their decoders (runtime/messaging/protocol_client.py) are re-exported
# here, so ``protocol.FrameError``, ``protocol.encode_event``, ``protocol.decode_controls`` and the rest
# stay where callers find them. Those modules import runtime/messaging/wire.py, never this one.
from rigcast.runtime.messaging.messages import encode_error as encode_error
from rigcast.runtime.messaging.messages import encode_event as encode_event
from rigcast.runtime.messaging.messages import encode_frame_error as encode_frame_error
from rigcast.runtime.messaging.messages import encode_reject_event as encode_reject_event
from rigcast.runtime.messaging.messages import encode_reload_reply as encode_reload_reply
from rigcast.runtime.messaging.messages import encode_schema_reply as encode_schema_reply
from rigcast.runtime.messaging.messages import encode_telemetry as encode_telemetry
from rigcast.runtime.messaging.protocol_client import decode_controls as decode_controls
from rigcast.runtime.messaging.protocol_client import decode_published as decode_published
from rigcast.runtime.messaging.protocol_client import decode_published_mesh as decode_published_mesh
from rigcast.runtime.messaging.protocol_client import decode_reply as decode_reply
from rigcast.runtime.messaging.protocol_client import schema_from_reply as schema_from_reply
from rigcast.runtime.messaging.protocol_client import topic_stream as topic_stream
from rigcast.runtime.messaging.timecode import Timecode, TimecodeError, parse_timecode
from rigcast.runtime.messaging.wire import F32 as _F32
from rigcast.runtime.messaging.wire import FLAG_CLAMPED as FLAG_CLAMPED
from rigcast.runtime.messaging.wire import FLAG_FILTERED as FLAG_FILTERED
from rigcast.runtime.messaging.wire import FLAG_HELD as FLAG_HELD
from rigcast.runtime.messaging.wire import FLAG_OFF_MANIFOLD as FLAG_OFF_MANIFOLD
from rigcast.runtime.messaging.wire import FLAG_STALE as FLAG_STALE
from rigcast.runtime.messaging.wire import FLAGS as FLAGS
from rigcast.runtime.messaging.wire import MAX_HEADER_BYTES as MAX_HEADER_BYTES
from rigcast.runtime.messaging.wire import MAX_HEADER_DEPTH as MAX_HEADER_DEPTH
from rigcast.runtime.messaging.wire import MAX_REPLY_HEADER_BYTES as MAX_REPLY_HEADER_BYTES
from rigcast.runtime.messaging.wire import MAX_STREAM_BYTES as MAX_STREAM_BYTES
from rigcast.runtime.messaging.wire import MESSAGE_TYPES as MESSAGE_TYPES
from rigcast.runtime.messaging.wire import PROTOCOL_VERSION as PROTOCOL_VERSION
from rigcast.runtime.messaging.wire import REASONS as REASONS
from rigcast.runtime.messaging.wire import SUPPORTED_VERSIONS as SUPPORTED_VERSIONS
from rigcast.runtime.messaging.wire import TOPIC_CONTROLS as TOPIC_CONTROLS
from rigcast.runtime.messaging.wire import TOPIC_EVENTS as TOPIC_EVENTS
from rigcast.runtime.messaging.wire import TOPIC_MESHES as TOPIC_MESHES
from rigcast.runtime.messaging.wire import TOPIC_TELEMETRY as TOPIC_TELEMETRY
from rigcast.runtime.messaging.wire import ControlsMessage as ControlsMessage
from rigcast.runtime.messaging.wire import FrameError as FrameError
from rigcast.runtime.messaging.wire import MeshFrame as MeshFrame
from rigcast.runtime.messaging.wire import decode_header as decode_header
from rigcast.runtime.messaging.wire import flag_names as flag_names
from rigcast.runtime.messaging.wire import pack as pack
from rigcast.runtime.messaging.wire import topic_bytes as _topic
from rigcast.runtime.solve.head_pose import HeadPose

log = logging.getLogger(__name__)

# --- encoding ---------------------------------------------------------------------------------

def encode_mesh(
    stream: str, frame: int, t_send_ns: int, vertices: np.ndarray, session: int | None = None,
    timecode: Timecode | None = None,
) -> list[bytes | memoryview]:
    """[header, payload] for a mesh frame. vertices (V, 3); sent without a copy when it is
    already C-contiguous little-endian float32 (send the list with ``copy=False``). ``session``
    (uint64, optional) names the sender's run: a new value restarts the stream's timing
    (docs/protocol.md, the restart rule). ``timecode`` goes in ``timecode`` and ``tc_rate``."""
    v = np.asarray(vertices)
    if v.ndim != 2 or v.shape[1] != 3:
        raise ValueError(f"vertices must be (V, 3), got {v.shape}")
    if v.dtype != _F32 or not v.flags.c_contiguous:
        v = np.ascontiguousarray(v, dtype=_F32)
    fields: dict[str, Any] = {"v": PROTOCOL_VERSION, "type": "mesh", "stream": stream,
                              "frame": int(frame), "t_send_ns": int(t_send_ns),
                              "vertices": int(v.shape[0])}
    if session is not None:
        fields["session"] = int(session)
    if timecode is not None:
        fields["timecode"], fields["tc_rate"] = str(timecode), timecode.rate
    header = pack(fields)
    return [header, v.data.cast("B") if v.size else b""]


def encode_controls(
    stream: str,
    frame: int,
    t_send_ns: int,
    t_recv_ns: int,
    t_pub_ns: int,
    values: np.ndarray,
    flags: int,
    head_pose: HeadPose | None = None,
    timecode: Timecode | None = None,
) -> list[bytes]:
    """[topic, header, payload] for the PUB socket. values (C,) -> C little-endian float32;
    ``head_pose`` goes in the header's versioned ``head_pose`` map (nil when not stabilised);
    the mesh frame's ``timecode``, when it had one, in ``timecode`` and ``tc_rate``."""
    vals = np.ascontiguousarray(values, dtype=_F32).reshape(-1)
    fields: dict[str, Any] = {
        "v": PROTOCOL_VERSION, "type": "controls", "stream": stream, "frame": int(frame),
        "t_send_ns": int(t_send_ns), "t_recv_ns": int(t_recv_ns), "t_pub_ns": int(t_pub_ns),
        "flags": int(flags), "count": int(vals.shape[0]),
        "head_pose": None if head_pose is None else head_pose.to_controls_wire()}
    if timecode is not None:
        fields["timecode"], fields["tc_rate"] = str(timecode), timecode.rate
    return [_topic(TOPIC_CONTROLS, stream), pack(fields), vals.tobytes()]


def encode_schema_request(stream: str, versions: Sequence[int] = SUPPORTED_VERSIONS) -> bytes:
    return pack({"v": PROTOCOL_VERSION, "type": "schema", "stream": stream,
                 "versions": [int(x) for x in versions]})


def negotiate_version(client_versions: Sequence[int], stream: str | None = None) -> int:
    """Highest version both sides speak; FrameError("unsupported_version") when there is none."""
    common = set(SUPPORTED_VERSIONS) & {int(x) for x in client_versions}
    if not common:
        raise FrameError(
            "unsupported_version",
            f"client speaks protocol versions {list(client_versions)}, server speaks "
            f"{list(SUPPORTED_VERSIONS)}",
            stream=stream,
        )
    return max(common)


def encode_reload_request(stream: str, bundle: str) -> bytes:
    return pack({"v": PROTOCOL_VERSION, "type": "reload", "stream": stream, "bundle": str(bundle)})


# --- decoding ---------------------------------------------------------------------------------

_ZEROS: dict[int, np.ndarray] = {}


def _all_finite(v: np.ndarray) -> bool:
    """True when v (contiguous float32) has no NaN or Inf.

    ``v · 0`` is exactly 0 when every value is finite and NaN otherwise (0 * NaN and 0 * Inf are
    NaN in IEEE 754), and it never overflows. On this machine it measured ~3 µs for 60,000 values
    against ~5 µs for ``isfinite(v).all()`` and ~9 µs for ``v.sum()``.
    """
    flat = v.reshape(-1)
    zeros = _ZEROS.get(flat.shape[0])
    if zeros is None:
        if len(_ZEROS) >= 8:
            _ZEROS.clear()
        zeros = _ZEROS[flat.shape[0]] = np.zeros(flat.shape[0], dtype=np.float32)
    with np.errstate(invalid="ignore"):  # Inf * 0 would warn; the NaN it makes is the answer
        total = float(flat @ zeros)
    return math.isfinite(total)


def decode_mesh(
    header: Mapping[str, Any],
    payload: Any,
    *,
    expected_vertices: int | None,
    max_bytes: int,
) -> MeshFrame:
    """Validate a mesh frame and view its payload as (V, 3) float32 without copying.

    header: from decode_header (type "mesh"); payload: bytes, memoryview, zmq.Frame or any
    buffer. Raises FrameError "oversize", "bad_vertex_count", "malformed" or "non_finite".
    """
    stream, frame = header["stream"], header["frame"]
    if header.get("type") != "mesh":
        raise FrameError("malformed", f"expected a mesh header, got type {header.get('type')!r}",
                         stream=stream, frame=frame)
    count = header["vertices"]
    try:
        view = memoryview(payload).cast("B")
    except TypeError as exc:
        raise FrameError("malformed", f"mesh payload is not a buffer ({exc})", stream=stream,
                         frame=frame) from None
    size = view.nbytes
    if size > max_bytes or count * 12 > max_bytes:
        raise FrameError("oversize", f"mesh payload of {size} bytes ({count} vertices declared) "
                         f"exceeds the limit of {max_bytes} bytes", stream=stream, frame=frame)
    if expected_vertices is not None and count != expected_vertices:
        raise FrameError("bad_vertex_count", f"stream {stream!r} expects {expected_vertices} "
                         f"vertices, frame {frame} has {count}", stream=stream, frame=frame)
    if size != count * 12:
        raise FrameError("malformed", f"mesh payload is {size} bytes, {count} vertices need "
                         f"{count * 12}", stream=stream, frame=frame)
    vertices = np.frombuffer(view, dtype=_F32).reshape(count, 3)
    vertices.flags.writeable = False
    if not _all_finite(vertices):
        bad = int(np.flatnonzero(~np.isfinite(vertices).all(axis=1))[0])
        raise FrameError("non_finite", f"frame {frame} of stream {stream!r} has NaN or Inf "
                         f"(first at vertex {bad})", stream=stream, frame=frame)
    return MeshFrame(stream, frame, header["t_send_ns"], vertices, mesh_timecode(header))


def mesh_timecode(header: Mapping[str, Any]) -> Timecode | None:
    """The mesh header's optional ``timecode`` with its ``tc_rate`` (both or neither), checked:
    FrameError("malformed") saying what is wrong with it."""
    text, rate = header.get("timecode"), header.get("tc_rate")
    if text is None and rate is None:
        return None
    stream, frame = header.get("stream"), header.get("frame")
    if text is None or rate is None:
        raise FrameError("malformed", f"frame {frame}: timecode and tc_rate go together, got "
                         f"timecode={text!r:.40} tc_rate={rate!r:.40}", stream=stream, frame=frame)
    try:
        return parse_timecode(text, rate)
    except TimecodeError as exc:
        raise FrameError("malformed", f"frame {frame}: {exc}", stream=stream,
                         frame=frame) from None


def decode_request(
    frames: Sequence[Any], *, max_header_bytes: int = MAX_HEADER_BYTES
) -> tuple[dict[str, Any], Any]:
    """Split a request as the ROUTER sees it after the identity frame: [header] or
    [header, payload]. Returns (header, payload or None); a mesh needs its payload."""
    if not 1 <= len(frames) <= 2:
        raise FrameError("malformed", f"a request has 1 or 2 frames, got {len(frames)}")
    header = decode_header(frames[0], max_header_bytes=max_header_bytes)
    payload = frames[1] if len(frames) == 2 else None
    if (header["type"] == "mesh") != (payload is not None):
        raise FrameError("malformed", f"{header['type']} message with {len(frames)} frames",
                         stream=header.get("stream"), frame=header.get("frame"))
    return header, payload
