"""Take readers: a performance as mesh frames (T, V, 3) with their times.

Formats, chosen by the path:

- ``.npy``: an array (T, V, 3); times from ``fps``.
- ``.npz``: key ``vertices`` (T, V, 3), optional key ``times`` (T,) seconds.
- OBJ sequence: a directory of ``.obj`` files or a glob pattern, one file per frame (common
  practice), ordered naturally by the frame number in the name (``f2`` before ``f10``). Only
  ``v`` lines are read; faces are ignored.
- ``.gltf`` / ``.glb``: a glTF 2.0 file whose animation drives morph-target weights or joint
  rotations; it is sampled at ``fps`` and evaluated to meshes through ``rig_for_gltf`` (see
  ``rigcast.gltf_take``).

Without times in the file, frames are spaced at ``fps`` (30 when not given, common practice).
"""

from __future__ import annotations

import glob
import logging
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

log = logging.getLogger(__name__)

DEFAULT_FPS = 30.0


class TakeError(ValueError):
    """A take cannot be read; the message names the file and the problem."""


@dataclass(frozen=True)
class Take:
    """vertices (T, V, 3) float32; times_s (T,) float64 increasing; fps frames per second."""

    vertices: np.ndarray
    times_s: np.ndarray
    source: str
    fps: float

    @property
    def frame_count(self) -> int:
        return int(self.vertices.shape[0])

    @property
    def vertex_count(self) -> int:
        return int(self.vertices.shape[1])


def read_take(path: str | Path, *, fps: float | None = None, rig_for_gltf: Any = None) -> Take:
    """Read a take from NPY, NPZ, an OBJ sequence (directory or glob), glTF or GLB."""
    text = str(path)
    if fps is not None and not (np.isfinite(fps) and fps > 0):
        raise TakeError(f"{text}: fps must be a positive number, got {fps}")
    if any(ch in text for ch in "*?["):
        return _obj_sequence(sorted(glob.glob(text)), text, fps)
    p = Path(text)
    if not p.exists():
        raise TakeError(f"{p}: no such file or directory")
    if p.is_dir():
        return _obj_sequence([str(f) for f in p.iterdir() if f.suffix.lower() == ".obj"], text, fps)
    suffix = p.suffix.lower()
    if suffix == ".npy":
        return _finish(_load_npy(p), None, text, fps)
    if suffix == ".npz":
        verts, times = _load_npz(p)
        return _finish(verts, times, text, fps)
    if suffix == ".obj":
        return _obj_sequence([text], text, fps)
    if suffix in (".gltf", ".glb"):
        from rigcast.gltf_take import read_gltf_take

        verts, times, rate = read_gltf_take(p, fps=fps or DEFAULT_FPS, rig=rig_for_gltf)
        return _finish(verts, times, text, rate)
    raise TakeError(f"{p}: unknown take format {suffix!r}; use .npy, .npz, .obj, .gltf or .glb")


def _load_npy(p: Path) -> np.ndarray:
    try:
        arr: np.ndarray = np.load(p, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise TakeError(f"{p}: not a readable NPY array ({exc})") from None
    return arr


def _load_npz(p: Path) -> tuple[np.ndarray, np.ndarray | None]:
    try:
        with np.load(p, allow_pickle=False) as npz:
            if "vertices" not in npz.files:
                raise TakeError(f"{p}: NPZ has no 'vertices' array (has {sorted(npz.files)})")
            verts = npz["vertices"]
            times = npz["times"] if "times" in npz.files else None
    except (ValueError, OSError, EOFError) as exc:
        raise TakeError(f"{p}: not a readable NPZ archive ({exc})") from None
    return verts, times


def _finish(verts: np.ndarray, times: np.ndarray | None, source: str, fps: float | None) -> Take:
    if verts.dtype.kind not in "fiu":
        raise TakeError(f"{source}: vertices must be numbers, got dtype {verts.dtype}")
    if verts.ndim != 3 or verts.shape[2] != 3:
        raise TakeError(f"{source}: vertices must be (frames, vertices, 3), got {verts.shape}")
    if verts.shape[0] == 0 or verts.shape[1] == 0:
        raise TakeError(f"{source}: take is empty (shape {verts.shape})")
    finite = np.isfinite(verts.reshape(verts.shape[0], -1)).all(axis=1)
    if not finite.all():
        raise TakeError(f"{source}: frame {int(np.argmin(finite))} has NaN or Inf vertices")
    if times is None:
        rate = fps or DEFAULT_FPS
        t = np.arange(verts.shape[0], dtype=np.float64) / rate
    else:
        t = np.asarray(times, dtype=np.float64).reshape(-1)
        if t.shape[0] != verts.shape[0]:
            raise TakeError(f"{source}: {t.shape[0]} times for {verts.shape[0]} frames")
        if not np.all(np.isfinite(t)) or (t.shape[0] > 1 and not np.all(np.diff(t) > 0)):
            raise TakeError(f"{source}: times must be finite and strictly increasing")
        rate = fps or (1.0 / float(np.median(np.diff(t))) if t.shape[0] > 1 else DEFAULT_FPS)
    return Take(np.ascontiguousarray(verts, dtype=np.float32), t, source, float(rate))


_DIGITS = re.compile(r"(\d+)")


def natural_key(name: str) -> tuple[Any, ...]:
    """Sort key that orders embedded numbers by value: ``f2`` before ``f10``."""
    return tuple(int(s) if s.isdigit() else s.lower() for s in _DIGITS.split(Path(name).name))


def read_obj_vertices(path: str | Path) -> np.ndarray:
    """The ``v x y z`` lines of one OBJ file as (V, 3) float32 (extra w or colour ignored)."""
    rows = []
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            for number, line in enumerate(fh, start=1):
                if line.startswith("v "):
                    parts = line.split()
                    if len(parts) < 4:
                        raise TakeError(f"{path}:{number}: vertex line needs x y z: {line.strip()}")
                    try:
                        rows.append((float(parts[1]), float(parts[2]), float(parts[3])))
                    except ValueError:
                        raise TakeError(f"{path}:{number}: bad vertex {line.strip()!r}") from None
    except OSError as exc:
        raise TakeError(f"{path}: cannot read ({exc})") from None
    if not rows:
        raise TakeError(f"{path}: OBJ file has no vertices")
    return np.array(rows, dtype=np.float32)


def _obj_sequence(files: list[str], source: str, fps: float | None) -> Take:
    files = sorted((f for f in files if f.lower().endswith(".obj")), key=natural_key)
    if not files:
        raise TakeError(f"{source}: no .obj files found")
    first = read_obj_vertices(files[0])
    out = np.empty((len(files), *first.shape), np.float32)
    out[0] = first
    for i, f in enumerate(files[1:], start=1):
        v = read_obj_vertices(f)
        if v.shape != first.shape:
            raise TakeError(
                f"{f}: has {v.shape[0]} vertices, but {files[0]} has {first.shape[0]}; every "
                "frame of an OBJ sequence needs the same vertex count"
            )
        out[i] = v
    log.info("read %d OBJ frames from %s", len(files), source)
    return _finish(out, None, source, fps)
