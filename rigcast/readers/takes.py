"""Take readers: a performance as mesh frames (T, V, 3) with their times.

Formats, chosen by the path:

- ``.npy``: an array (T, V, 3); times from ``fps``.
- ``.npz``: key ``vertices`` (T, V, 3), optional key ``times`` (T,) seconds.
- OBJ sequence: a directory of ``.obj`` files or a glob pattern, one file per frame (common
  practice), ordered naturally by the frame number in the name (``f2`` before ``f10``). Only
  ``v`` lines are read; faces are ignored.
- ``.gltf`` / ``.glb``: a glTF 2.0 file's first animation (every channel and interpolation the
  spec allows), evaluated to meshes as a viewer would; see ``rigcast.readers.gltf_take``. Baked keys are
  the frames; sparse keys are sampled at ``fps``, keeping the last key.

Frame rate: the option ``fps`` wins; else the file's own times or keys; else ``DEFAULT_FPS``
(60, the one default of ``send`` and ``solve``), and a warning says that it was assumed.
``Take.fps_source`` records which ("option", "file" or "default").
"""

from __future__ import annotations

import glob
import logging
import re
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.readers.take_common import DEFAULT_FPS, TakeError, rate_of

__all__ = ["DEFAULT_FPS", "Take", "TakeError", "natural_key", "rate_of", "read_obj_vertices",
           "read_take"]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Take:
    """vertices (T, V, 3) float32; times_s (T,) float64 increasing; fps frames per second;
    fps_source "option" (given), "file" (the take's own times) or "default" (DEFAULT_FPS)."""

    vertices: np.ndarray
    times_s: np.ndarray
    source: str
    fps: float
    fps_source: str = "file"

    @property
    def fps_note(self) -> str:
        """``60 fps (default; the take has no times, pass --fps)`` and the like, for messages."""
        why = {"option": "from --fps", "file": "from the take",
               "default": "default; the take carries no rate, pass --fps to change it"}
        return f"{self.fps:g} fps ({why.get(self.fps_source, self.fps_source)})"

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
        from rigcast.readers.gltf_take import read_gltf_take

        verts, times, rate, source = read_gltf_take(p, fps, rig_for_gltf)
        take = _finish(verts, times, text, rate)
        return _announce(Take(take.vertices, take.times_s, text, rate, source))
    raise TakeError(f"{p}: unknown take format {suffix!r}; use .npy, .npz, .obj, .gltf or .glb")


def _load_npy(p: Path) -> np.ndarray:
    # The file is opened here, not by np.load, so it is closed whatever np.load raises.
    with p.open("rb") as fh:
        try:
            arr = np.load(fh, allow_pickle=False)
        except (ValueError, OSError, EOFError) as exc:
            raise TakeError(f"{p}: not a readable NPY array ({exc})") from None
        if not isinstance(arr, np.ndarray):  # np.load reads a ZIP as NpzFile whatever the suffix
            arr.close()
            raise TakeError(f"{p}: is an NPZ archive, not an NPY array; name it .npz")
        return arr


def _load_npz(p: Path) -> tuple[np.ndarray, np.ndarray | None]:
    with p.open("rb") as fh:
        try:
            loaded = np.load(fh, allow_pickle=False)
        except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
            raise TakeError(f"{p}: not a readable NPZ archive ({exc})") from None
        if isinstance(loaded, np.ndarray):
            raise TakeError(f"{p}: is an NPY array, not an NPZ archive; name it .npy")
        try:
            with loaded as npz:
                if "vertices" not in npz.files:
                    raise TakeError(f"{p}: NPZ has no 'vertices' array (has {sorted(npz.files)})")
                verts = npz["vertices"]
                times = npz["times"] if "times" in npz.files else None
        except TakeError:  # a ValueError too: keep its own message
            raise
        except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
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
    origin = "option" if fps else "file"  # where the rate comes from
    if times is None:
        rate = fps or DEFAULT_FPS
        origin = "option" if fps else "default"
        t = np.arange(verts.shape[0], dtype=np.float64) / rate
    else:
        try:
            t = np.asarray(times, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError):
            raise TakeError(f"{source}: times must be numbers, got dtype {times.dtype}") from None
        if t.shape[0] != verts.shape[0]:
            raise TakeError(f"{source}: {t.shape[0]} times for {verts.shape[0]} frames")
        if not np.all(np.isfinite(t)) or (t.shape[0] > 1 and not np.all(np.diff(t) > 0)):
            raise TakeError(f"{source}: times must be finite and strictly increasing")
        if not fps and t.shape[0] < 2:
            origin = "default"
        rate = fps or (rate_of(np.diff(t)) if t.shape[0] > 1 else DEFAULT_FPS)
    return _announce(Take(np.ascontiguousarray(verts, dtype=np.float32), t, source, float(rate),
                          origin))


def _announce(take: Take) -> Take:
    """Warn when the rate was assumed: every command that reads a take then says so."""
    if take.fps_source == "default":
        log.warning("%s carries no frame rate; assuming %s fps (the default; pass --fps to "
                    "change it)", take.source, f"{take.fps:g}")
    return take


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
