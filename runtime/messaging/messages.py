"""Typed server -> client messages and their encoding, in one place (docs/protocol.md §3-§5).

Frozen dataclasses for the replies (error, schema, reload), the events (reject, reload,
off_manifold, processing_error), per-stream telemetry and the heartbeat; each ``encode()`` gives
the ZeroMQ frames. Plain maps exist only at the wire's edge, here. The ``encode_*`` functions
are the same encoders by field, re-exported by runtime/messaging/protocol.py as its API.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.runtime.messaging.wire import (
    PROTOCOL_VERSION,
    REASONS,
    SUPPORTED_VERSIONS,
    TOPIC_EVENTS,
    TOPIC_MESHES,
    TOPIC_TELEMETRY,
    FrameError,
    merge_fields,
    pack,
    topic_bytes,
)
from rigcast.runtime.schema import ControlSchema
from rigcast.runtime.solve.head_pose import HeadPose

log = logging.getLogger(__name__)


# --- replies (ROUTER -> DEALER, one frame) -----------------------------------------------------

@dataclass(frozen=True)
class ErrorReply:
    """A rejected message (§3.4); ``reason`` is one of protocol.REASONS."""

    reason: str
    message: str
    stream: str | None = None
    frame: int | None = None

    def __post_init__(self) -> None:
        if self.reason not in REASONS:
            raise ValueError(f"unknown rejection reason {self.reason!r}")

    def encode(self) -> bytes:
        return pack({"v": PROTOCOL_VERSION, "type": "error", "reason": self.reason,
                     "stream": self.stream, "frame": self.frame, "message": self.message,
                     "versions": list(SUPPORTED_VERSIONS)})


@dataclass(frozen=True)
class SchemaReply:
    """The answer to a schema request (§3.2); ``version`` is the negotiated protocol version."""

    stream: str
    schema: ControlSchema
    bundle: str
    bundle_version: int
    fingerprint: str
    vertices: int
    version: int = PROTOCOL_VERSION

    def encode(self) -> bytes:
        controls = [{"name": c.name, "min": float(c.minimum), "max": float(c.maximum),
                     "default": float(c.default), "group": c.group, "pair": c.pair}
                    for c in self.schema.controls]
        return pack({"v": int(self.version), "type": "schema_reply", "stream": self.stream,
                     "protocol_versions": list(SUPPORTED_VERSIONS), "bundle": self.bundle,
                     "bundle_version": int(self.bundle_version),
                     "fingerprint": self.fingerprint, "vertices": int(self.vertices),
                     "controls": controls})


@dataclass(frozen=True)
class ReloadReply:
    """The answer to a reload request (§3.3): ``bundle`` and ``fingerprint`` when ``ok``."""

    stream: str
    ok: bool
    message: str
    bundle: str | None = None
    fingerprint: str | None = None

    def encode(self) -> bytes:
        header: dict[str, Any] = {"v": PROTOCOL_VERSION, "type": "reload_reply",
                                  "stream": self.stream, "ok": bool(self.ok),
                                  "message": self.message}
        for key in ("bundle", "fingerprint"):
            if getattr(self, key) is not None:
                header[key] = getattr(self, key)
        return pack(header)


# --- events (topic evt) -----------------------------------------------------------------------

def _event(kind: str, stream: str | None, fields: Mapping[str, Any]) -> list[bytes]:
    header: dict[str, Any] = {"v": PROTOCOL_VERSION, "type": "event", "kind": kind,
                              "stream": stream}
    merge_fields(header, fields)
    return [TOPIC_EVENTS, pack(header)]


@dataclass(frozen=True)
class RejectEvent:
    """Every rejected message (§5.3 ``reject``)."""

    stream: str | None
    reason: str
    frame: int | None
    message: str

    def encode(self) -> list[bytes]:
        return _event("reject", self.stream, {"reason": self.reason, "frame": self.frame,
                                              "message": self.message})


@dataclass(frozen=True)
class ReloadEvent:
    """A finished reload (§5.3 ``reload``): ``bundle`` and ``fingerprint`` when ``ok``, else
    ``message``."""

    stream: str
    ok: bool
    bundle: str | None = None
    fingerprint: str | None = None
    message: str | None = None

    def encode(self) -> list[bytes]:
        fields: dict[str, Any] = {"ok": self.ok}
        for key in ("bundle", "fingerprint", "message"):
            if getattr(self, key) is not None:
                fields[key] = getattr(self, key)
        return _event("reload", self.stream, fields)


@dataclass(frozen=True)
class OffManifoldEvent:
    """A frame whose fit error exceeded its threshold (§5.3 ``off_manifold``), mesh units."""

    stream: str
    frame: int
    rms: float
    max: float
    threshold: float
    threshold_on: str = "rms"  # the figure the threshold limits: "rms" or "max" (adaptive)

    def encode(self) -> list[bytes]:
        return _event("off_manifold", self.stream, {"frame": self.frame, "rms": self.rms,
                                                    "max": self.max,
                                                    "threshold": self.threshold,
                                                    "threshold_on": self.threshold_on})


@dataclass(frozen=True)
class ProcessingErrorEvent:
    """Finite input the models could not handle (§5.3 ``processing_error``)."""

    stream: str
    frame: int
    message: str

    def encode(self) -> list[bytes]:
        return _event("processing_error", self.stream, {"frame": self.frame,
                                                        "message": self.message})


# --- telemetry and heartbeat (topic tel.<stream>) ---------------------------------------------

@dataclass(frozen=True)
class LatencyStats:
    """One stage's latency percentiles over the window, ms (None: no data yet)."""

    p50_ms: float | None
    p95_ms: float | None
    p99_ms: float | None


@dataclass(frozen=True)
class FitErrorStats:
    """The stream's fit-error figures (mesh units) and off-manifold counts."""

    frame: int | None
    skipped: int
    rms: float | None
    max: float | None
    rms_mean: float | None
    max_mean: float | None
    off_manifold: int
    last_off_manifold_frame: int | None
    threshold: float | None = None  # the off-manifold threshold in force (None: warming up)
    threshold_on: str = "rms"  # which figure it limits: "rms" (a fixed limit) or "max" (adaptive)


@dataclass(frozen=True)
class ServerStats:
    """Server-wide figures carried by every stream's telemetry."""

    uptime_s: float
    streams: int
    rejected: int
    rejected_by_reason: Mapping[str, int]


@dataclass(frozen=True)
class Telemetry:
    """One stream's telemetry (§5.2); numbers with no data yet are None (nil on the wire)."""

    stream: str
    bundle: str
    t_ns: int
    latency: Mapping[str, LatencyStats]
    window: int
    input_fps: float
    processed: int
    dropped: int
    stale: int
    rejected: int
    rejected_by_reason: Mapping[str, int]
    clamped: int
    filter_resets: int
    last_frame: int | None
    fit_error: FitErrorStats
    pose: HeadPose | None
    stabilise_rms: float | None
    server: ServerStats | None = None
    held: int = 0  # frames published with held or eased controls while off-manifold
    timecode: str | None = None  # the SMPTE timecode of the last processed frame, if it had one
    tc_rate: str | None = None
    bundle_quality: Mapping[str, Any] | None = None  # runtime/serve/bundle_quality.py's verdict

    def to_wire(self) -> dict[str, Any]:
        """The header map's fields after v, type and stream."""
        fields: dict[str, Any] = {
            "bundle": self.bundle, "t_ns": self.t_ns,
            "latency": {k: vars(v) for k, v in self.latency.items()},
            "window": self.window, "input_fps": self.input_fps, "processed": self.processed,
            "dropped": self.dropped, "stale": self.stale, "rejected": self.rejected,
            "rejected_by_reason": dict(self.rejected_by_reason), "clamped": self.clamped,
            "filter_resets": self.filter_resets, "last_frame": self.last_frame,
            "fit_error": vars(self.fit_error),
            "pose": None if self.pose is None else self.pose.to_wire(),
            "stabilise_rms": self.stabilise_rms, "held": self.held,
            "timecode": self.timecode, "tc_rate": self.tc_rate,
            "bundle_quality": None if self.bundle_quality is None else dict(self.bundle_quality),
        }
        if self.server is not None:
            fields["server"] = {**vars(self.server),
                                "rejected_by_reason": dict(self.server.rejected_by_reason)}
        return fields

    def encode(self) -> list[bytes]:
        return encode_telemetry(self.stream, self.to_wire())


@dataclass(frozen=True)
class Heartbeat:
    """The server is alive (§5.4): on the telemetry topic ``tel.`` (no stream) every
    ``period_s`` (0.5 s), whatever ``telemetry_hz`` is, so a monitor sees a dead server within
    2 s; ``streams`` are the stream ids it serves."""

    t_ns: int
    uptime_s: float
    streams: tuple[str, ...]
    period_s: float = 0.5

    def encode(self) -> list[bytes]:
        return [TOPIC_TELEMETRY,
                pack({"v": PROTOCOL_VERSION, "type": "heartbeat", "stream": None,
                      "t_ns": int(self.t_ns), "uptime_s": float(self.uptime_s),
                      "period_s": float(self.period_s), "streams": list(self.streams)})]


@dataclass(frozen=True)
class PublishedMesh:
    """A processed frame's mesh (§5.5, opt-in with ``publish_meshes``): ``vertices`` (V, 3)
    float32 as received (``space`` "raw") or moved by the stream's rigid fit into the bundle's
    neutral frame ("stabilised"), with the frame's number, sender time and timecode."""

    stream: str
    frame: int
    t_send_ns: int
    space: str
    vertices: np.ndarray
    timecode: str | None = None
    tc_rate: str | None = None

    def encode(self) -> list[Any]:
        """[topic, header, payload]; the payload views ``vertices`` (send with copy=False)."""
        v = np.ascontiguousarray(self.vertices, dtype="<f4")
        header: dict[str, Any] = {"v": PROTOCOL_VERSION, "type": "published_mesh",
                                  "stream": self.stream, "frame": int(self.frame),
                                  "t_send_ns": int(self.t_send_ns), "vertices": int(v.shape[0]),
                                  "space": self.space}
        if self.timecode is not None:
            header["timecode"], header["tc_rate"] = self.timecode, self.tc_rate
        return [topic_bytes(TOPIC_MESHES, self.stream), pack(header), v.data.cast("B")]


def number_or_none(x: float) -> float | None:
    """NaN (no data yet) goes out as nil, which every msgpack reader understands."""
    x = float(x)
    return None if math.isnan(x) else x


# --- the encoders by field (protocol.py's API) -------------------------------------------------

def encode_error(
    reason: str, message: str, stream: str | None = None, frame: int | None = None
) -> bytes:
    """One-frame error reply (ROUTER -> DEALER). ``versions`` lists what the server speaks."""
    return ErrorReply(reason, message, stream, frame).encode()


def encode_frame_error(err: FrameError) -> bytes:
    return ErrorReply(err.reason, err.message, err.stream, err.frame).encode()


def encode_schema_reply(stream: str, schema: ControlSchema, *, bundle: str, bundle_version: int,
                        fingerprint: str, vertices: int, version: int = PROTOCOL_VERSION
                        ) -> bytes:
    """Schema reply; ``version`` is the negotiated protocol version (see negotiate_version)."""
    return SchemaReply(stream, schema, bundle, bundle_version, fingerprint, vertices,
                       version).encode()


def encode_reload_reply(stream: str, ok: bool, message: str, *, bundle: str | None = None,
                        fingerprint: str | None = None) -> bytes:
    """Reload reply; ``bundle`` and ``fingerprint`` when the reload was accepted."""
    return ReloadReply(stream, ok, message, bundle, fingerprint).encode()


def encode_telemetry(stream: str, fields: Mapping[str, Any]) -> list[bytes]:
    """[topic, header] telemetry for one stream; ``fields`` are merged into the header map."""
    header: dict[str, Any] = {"v": PROTOCOL_VERSION, "type": "telemetry", "stream": stream}
    merge_fields(header, fields)
    return [topic_bytes(TOPIC_TELEMETRY, stream), pack(header)]


def encode_event(
    kind: str, stream: str | None = None, fields: Mapping[str, Any] | None = None
) -> list[bytes]:
    """[b"evt", header] server event (``kind`` e.g. "reject", "reload"), fields merged in."""
    return _event(kind, stream, fields or {})


def encode_reject_event(err: FrameError) -> list[bytes]:
    return RejectEvent(err.stream, err.reason, err.frame, err.message).encode()
