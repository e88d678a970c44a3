"""Recordings to files: NPZ (every stream, everything), JSON, or CSV (one file per stream).

Every format keeps, per stream, the sender's frame numbers (not row numbers), the times (from the
sender's timestamps, relative to the stream's first recorded frame), the flag bits and the
controls, and the take's name; NPZ and JSON also keep the server's timestamps and the head-pose
samples the server's telemetry carried (about 10 per second, each with the frame it belongs to).

- ``.npz``: ``take``, ``streams``; per stream ``<s>/names``, ``<s>/frame``, ``<s>/time_s``,
  ``<s>/t_send_ns``, ``<s>/t_recv_ns``, ``<s>/t_pub_ns``, ``<s>/flags``, ``<s>/values`` (T, C),
  ``<s>/pose_frame`` (P,), ``<s>/pose`` (P, 8): tx ty tz qx qy qz qw scale, and
  ``<s>/timecode``, ``<s>/tc_rate`` (T,) str: the sender's SMPTE timecode per frame ("" if none).
- ``.json``: {"take", "streams": {s: {"controls", "frame", "time_s", "flags", "values", "pose",
  "timecode", "tc_rate"}}} (null where a frame had no timecode).
- ``.csv``: ``frame,time_s,<controls...>,off_manifold,clamped,stale`` (the columns
  ``rigcast.writers.animation_out.read_csv`` reads); several streams go to ``<stem>.<stream>.csv``; the
  take's name, the pose samples and the timecodes go beside it in ``<stem>.meta.json``.

With ``rigcast record --meshes`` (a server with ``publish_meshes``) the meshes go beside it in
chunks, ``<stem>.<stream>.meshes.<n>.npz`` (:class:`MeshChunks`), each a take `rigcast solve` reads:
``vertices`` (N, V, 3) float32, ``times`` (N,) seconds from the stream's first recorded frame,
``frame``, ``t_send_ns``, ``timecode``, ``tc_rate`` (N,), ``stream``, ``take``, ``space`` (raw or
stabilised) and ``chunk``. Chunks bound the recorder's memory and keep each file a size a solve
can load; a folder or glob of them is a batch (`rigcast solve BUNDLE 'rec.*.meshes.*.npz'`).
Each chunk is solved as a take of its own: the filter and the adaptive off-manifold rule start
afresh at its first frame, so an off-manifold frame in a chunk's first frames can go unflagged
while the rule warms up (measured on the demo face: a planted bulge 20 frames into a 100-frame
chunk had 18 x the chunk's fit RMS and was not flagged; live, 120 frames in, it was). Keep
chunks long (the default 600 frames is 10 s at 60 fps).
"""

from __future__ import annotations

import csv
import json
import logging
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.runtime.messaging.protocol import FLAG_CLAMPED, FLAG_OFF_MANIFOLD, FLAG_STALE

log = logging.getLogger(__name__)

SUFFIXES = (".npz", ".json", ".csv")
POSE_FIELDS = ("tx", "ty", "tz", "qx", "qy", "qz", "qw", "scale")
_CSV_FLAGS = (("off_manifold", FLAG_OFF_MANIFOLD), ("clamped", FLAG_CLAMPED),
              ("stale", FLAG_STALE))


@dataclass(frozen=True)
class StreamRecording:
    """One stream's frames, sorted by the sender's frame number. frames, t_*_ns, flags (T,)
    int64; values (T, C) float32; names (C,) (``#0``... when no schema was available);
    pose_frame (P,) int64 and pose (P, 8) float64 (POSE_FIELDS) from telemetry."""

    stream: str
    names: tuple[str, ...]
    frames: np.ndarray
    t_send_ns: np.ndarray
    t_recv_ns: np.ndarray
    t_pub_ns: np.ndarray
    flags: np.ndarray
    values: np.ndarray
    pose_frame: np.ndarray
    pose: np.ndarray
    timecode: np.ndarray | None = None  # (T,) str SMPTE timecodes, "" where a frame had none
    tc_rate: np.ndarray | None = None  # (T,) str their rates

    def timecodes(self) -> tuple[list[str | None], list[str | None]]:
        """(timecode per frame, rate per frame), None where a frame had none."""
        def strs(a: np.ndarray | None) -> list[str | None]:
            return [None] * self.count if a is None else [str(x) or None for x in a.tolist()]
        return strs(self.timecode), strs(self.tc_rate)

    @property
    def count(self) -> int:
        return int(self.frames.shape[0])

    def times_s(self) -> np.ndarray:
        """(T,) seconds from the first frame's send time; strictly increasing (equal stamps of a
        coarse sender clock are spread by 1 µs, as writers need increasing times)."""
        if self.count == 0:
            return np.zeros(0)
        t = (self.t_send_ns - self.t_send_ns[0]).astype(np.float64) / 1e9
        for i in range(1, t.shape[0]):
            if t[i] <= t[i - 1]:
                t[i] = t[i - 1] + 1e-6
        return t


def pose_row(pose: Mapping[str, Any]) -> list[float] | None:
    """A telemetry ``pose`` dict (quaternion_wxyz, translation, scale) -> POSE_FIELDS order."""
    try:
        w, x, y, z = (float(v) for v in pose["quaternion_wxyz"])
        tx, ty, tz = (float(v) for v in pose["translation"])
        return [tx, ty, tz, x, y, z, w, float(pose.get("scale", 1.0))]
    except (KeyError, TypeError, ValueError):
        return None


def _safe(stream: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]", "_", stream)


class MeshChunks:
    """Writes published meshes (``messages.PublishedMesh``) as they arrive, ``chunk_frames``
    per file per stream, beside ``path`` (see the module docstring); ``close()`` writes the rest
    and returns every file written."""

    def __init__(self, path: Path, take: str, chunk_frames: int = 600) -> None:
        if chunk_frames < 1:
            raise ValueError(f"chunk_frames must be at least 1, got {chunk_frames}")
        self.path, self.take, self.chunk_frames = path, take, chunk_frames
        self.files: list[Path] = []
        self._rows: dict[str, list[Any]] = {}
        self._first_ns: dict[str, int] = {}
        self._chunks: dict[str, int] = {}

    def add(self, mesh: Any) -> None:
        rows = self._rows.setdefault(mesh.stream, [])
        self._first_ns.setdefault(mesh.stream, int(mesh.t_send_ns))
        rows.append((int(mesh.frame), int(mesh.t_send_ns), np.array(mesh.vertices, np.float32),
                     mesh.timecode or "", mesh.tc_rate or "", str(mesh.space)))
        if len(rows) >= self.chunk_frames:
            self._flush(mesh.stream)

    def _flush(self, stream: str) -> None:
        rows = self._rows.pop(stream, [])
        if not rows:
            return
        n = self._chunks.get(stream, 0)
        self._chunks[stream] = n + 1
        frame, t_ns, verts, tc, rate, space = zip(*rows, strict=True)
        t_send = np.array(t_ns, np.int64)
        target = self.path.with_name(f"{self.path.stem}.{_safe(stream)}.meshes.{n:04d}.npz")
        with target.open("wb") as fh:  # uncompressed: the recorder must keep up with the stream
            np.savez(fh, vertices=np.stack(verts), frame=np.array(frame, np.int64),
                     times=(t_send - self._first_ns[stream]).astype(np.float64) / 1e9,
                     t_send_ns=t_send, timecode=np.array(tc, dtype=str),
                     tc_rate=np.array(rate, dtype=str), stream=np.array(stream),
                     take=np.array(self.take), space=np.array(space[-1]), chunk=np.array(n))
        self.files.append(target)

    def close(self) -> list[Path]:
        for stream in list(self._rows):
            self._flush(stream)
        return self.files


def write_recording(path: Path, take: str, streams: Sequence[StreamRecording]) -> list[Path]:
    """Write the streams to ``path`` (format by suffix); returns the files written."""
    suffix = path.suffix.lower()
    if suffix == ".npz":
        return [_write_npz(path, take, streams)]
    if suffix == ".json":
        return [_write_json(path, take, streams)]
    return _write_csvs(path, take, streams)


def _write_npz(path: Path, take: str, streams: Sequence[StreamRecording]) -> Path:
    arrays: dict[str, Any] = {"take": np.array(take), "streams": np.array([s.stream
                                                                           for s in streams])}
    for s in streams:
        arrays.update({f"{s.stream}/names": np.array(s.names), f"{s.stream}/frame": s.frames,
                       f"{s.stream}/time_s": s.times_s(), f"{s.stream}/t_send_ns": s.t_send_ns,
                       f"{s.stream}/t_recv_ns": s.t_recv_ns, f"{s.stream}/t_pub_ns": s.t_pub_ns,
                       f"{s.stream}/flags": s.flags, f"{s.stream}/values": s.values,
                       f"{s.stream}/pose_frame": s.pose_frame, f"{s.stream}/pose": s.pose})
        tc, rate = s.timecodes()
        arrays[f"{s.stream}/timecode"] = np.array([x or "" for x in tc], dtype=str)
        arrays[f"{s.stream}/tc_rate"] = np.array([x or "" for x in rate], dtype=str)
    with path.open("wb") as fh:
        np.savez_compressed(fh, **arrays)
    return path


def _pose_json(s: StreamRecording) -> list[dict[str, Any]]:
    return [{"frame": int(f), **dict(zip(POSE_FIELDS, map(float, row), strict=True))}
            for f, row in zip(s.pose_frame, s.pose, strict=True)]


def _timecode_json(s: StreamRecording) -> dict[str, list[str | None]]:
    tc, rate = s.timecodes()
    return {"timecode": tc, "tc_rate": rate}


def _write_json(path: Path, take: str, streams: Sequence[StreamRecording]) -> Path:
    doc = {"take": take, "streams": {s.stream: {
        "controls": list(s.names), "frame": s.frames.tolist(), "time_s": s.times_s().tolist(),
        "t_send_ns": s.t_send_ns.tolist(), "t_pub_ns": s.t_pub_ns.tolist(),
        "flags": s.flags.tolist(), "values": s.values.astype(float).tolist(),
        "pose": _pose_json(s), **_timecode_json(s)} for s in streams}}
    path.write_text(json.dumps(doc))
    return path


def _write_csvs(path: Path, take: str, streams: Sequence[StreamRecording]) -> list[Path]:
    written = []
    for s in streams:
        target = path if len(streams) == 1 else path.with_name(
            f"{path.stem}.{_safe(s.stream)}{path.suffix}")
        with target.open("w", newline="") as fh:
            writer = csv.writer(fh)
            writer.writerow(["frame", "time_s", *s.names, *(n for n, _ in _CSV_FLAGS)])
            for i, t in enumerate(s.times_s()):
                flags = int(s.flags[i])
                writer.writerow([int(s.frames[i]), repr(float(t)),
                                 *(repr(float(v)) for v in s.values[i]),
                                 *(int(bool(flags & bit)) for _, bit in _CSV_FLAGS)])
        written.append(target)
    meta = path.with_name(f"{path.stem}.meta.json")
    meta.write_text(json.dumps({"take": take, "files": {s.stream: w.name for s, w in
                                                        zip(streams, written, strict=True)},
                                "pose": {s.stream: _pose_json(s) for s in streams},
                                "timecode": {s.stream: _timecode_json(s) for s in streams}}))
    return [*written, meta]
