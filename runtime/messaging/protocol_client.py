"""The client side of the wire format: decoding what the server publishes and replies
(docs/protocol.md §3.2-§3.4, §5). Re-exported by runtime/messaging/protocol.py; import it from there. It
builds on runtime/messaging/wire.py and runtime/messaging/messages.py, never on protocol.py."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from rigcast.runtime.messaging.messages import PublishedMesh
from rigcast.runtime.messaging.wire import (
    F32,
    MAX_REPLY_HEADER_BYTES,
    TOPIC_CONTROLS,
    TOPIC_EVENTS,
    TOPIC_MESHES,
    TOPIC_TELEMETRY,
    ControlsMessage,
    FrameError,
    decode_header,
    topic_bytes,
)
from rigcast.runtime.schema import ControlSchema
from rigcast.runtime.solve.head_pose import HeadPose


def topic_stream(topic: bytes, prefix: bytes) -> str | None:
    """The stream named by a topic with this exact prefix, or None."""
    if not topic.startswith(prefix):
        return None
    try:
        return topic[len(prefix):].decode("utf-8")
    except UnicodeDecodeError:
        return None


def decode_controls(frames: Sequence[Any]) -> ControlsMessage:
    """[topic, header, payload] from the PUB socket -> ControlsMessage (values copied: C is
    small, and the result outlives the received frames)."""
    if len(frames) != 3:
        raise FrameError("malformed", f"a controls message has 3 frames, got {len(frames)}")
    topic = bytes(frames[0])
    header = decode_header(frames[1], max_header_bytes=MAX_REPLY_HEADER_BYTES)
    if header["type"] != "controls":
        raise FrameError("malformed", f"expected controls, got {header['type']!r}")
    stream = header["stream"]
    if topic != topic_bytes(TOPIC_CONTROLS, stream):
        raise FrameError("malformed", f"topic {topic!r} does not match stream {stream!r}",
                         stream=stream, frame=header["frame"])
    view = memoryview(frames[2]).cast("B")
    if view.nbytes != header["count"] * 4:
        raise FrameError("malformed", f"controls payload is {view.nbytes} bytes, count "
                         f"{header['count']} needs {header['count'] * 4}", stream=stream,
                         frame=header["frame"])
    values = np.frombuffer(view, dtype=F32).copy()
    values.flags.writeable = False
    pose = header.get("head_pose")  # versioned (docs/protocol.md §5.1); absent from old servers
    tc, rate = header.get("timecode"), header.get("tc_rate")  # optional: senders without it
    return ControlsMessage(stream, header["frame"], header["t_send_ns"], header["t_recv_ns"],
                           header["t_pub_ns"], header["flags"], values,
                           HeadPose.from_wire(pose) if isinstance(pose, dict) else None,
                           tc if isinstance(tc, str) else None,
                           rate if isinstance(rate, str) else None)


def decode_published_mesh(frames: Sequence[Any]) -> PublishedMesh:
    """[topic, header, payload] on ``msh.<stream>`` -> PublishedMesh (vertices (V, 3) float32,
    read-only, viewing the received payload)."""
    if len(frames) != 3:
        raise FrameError("malformed", f"a published mesh has 3 frames, got {len(frames)}")
    header = decode_header(frames[1], max_header_bytes=MAX_REPLY_HEADER_BYTES)
    stream, frame, count = header["stream"], header.get("frame"), header.get("vertices")
    if header["type"] != "published_mesh" or bytes(frames[0]) != topic_bytes(TOPIC_MESHES, stream):
        raise FrameError("malformed", f"topic {bytes(frames[0])!r} does not fit a "
                         f"{header['type']!r} message", stream=stream)
    view = memoryview(frames[2]).cast("B")
    if view.nbytes != count * 12:
        raise FrameError("malformed", f"mesh payload is {view.nbytes} bytes, {count} vertices "
                         f"need {count * 12}", stream=stream, frame=frame)
    vertices = np.frombuffer(view, dtype=F32).reshape(count, 3)
    vertices.flags.writeable = False
    tc, rate = header.get("timecode"), header.get("tc_rate")
    return PublishedMesh(stream, frame, header["t_send_ns"], header["space"], vertices,
                         tc if isinstance(tc, str) else None,
                         rate if isinstance(rate, str) else None)


def decode_published(frames: Sequence[Any]) -> ControlsMessage | PublishedMesh | dict[str, Any]:
    """Any PUB message: controls -> ControlsMessage; meshes -> PublishedMesh; telemetry,
    heartbeats and events -> header dict."""
    if len(frames) < 2:
        raise FrameError("malformed", f"a published message has >= 2 frames, got {len(frames)}")
    topic = bytes(frames[0])
    if topic.startswith(TOPIC_CONTROLS):
        return decode_controls(frames)
    if topic.startswith(TOPIC_MESHES):
        return decode_published_mesh(frames)
    if len(frames) != 2:
        raise FrameError("malformed", f"telemetry and events have 2 frames, got {len(frames)}")
    header = decode_header(frames[1], max_header_bytes=MAX_REPLY_HEADER_BYTES)
    expected = {"telemetry": lambda h: topic_bytes(TOPIC_TELEMETRY, h["stream"]),
                "heartbeat": lambda h: TOPIC_TELEMETRY,
                "event": lambda h: TOPIC_EVENTS}.get(header["type"])
    if expected is None or topic != expected(header):
        raise FrameError("malformed", f"topic {topic!r} does not fit a {header['type']!r} message")
    return header


def decode_reply(raw: bytes | memoryview) -> dict[str, Any]:
    """A one-frame reply on the DEALER (schema_reply, reload_reply or error)."""
    header = decode_header(raw, max_header_bytes=MAX_REPLY_HEADER_BYTES)
    if header["type"] not in ("schema_reply", "reload_reply", "error"):
        raise FrameError("malformed", f"expected a reply, got {header['type']!r}")
    return header


def schema_from_reply(reply: Mapping[str, Any]) -> ControlSchema:
    """The ControlSchema carried by a schema reply (raises SchemaError when it is malformed)."""
    return ControlSchema.from_dict({"controls": reply["controls"]})
