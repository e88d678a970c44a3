"""Take readers: a performance as mesh frames (T, V, 3) with their times.

Formats, chosen by the path:

- ``.npy``: an array (T, V, 3); times from ``fps``.
- ``.npz``: key ``vertices`` (T, V, 3), optional key ``times`` (T,) seconds.
- OBJ sequence: a directory of ``.obj`` files or a glob pattern, one file per frame (common
  practice), ordered naturally by the frame number in the name (``f2`` before ``f10``). Only
  ``v`` lines are read; faces are ignored.
- ``.gltf`` / ``.glb``: a glTF 2.0 file whose animation drives morph-target weights or joint
  rotations. The animation is sampled at ``fps`` (glTF 2.0 spec, "Animations": LINEAR
  interpolation for weights and translations, spherical linear for rotations, STEP and
  CUBICSPLINE as defined there) and evaluated to meshes through the glTF rig
  (``rigcast.export.gltf_rig.GltfRig``), the same evaluation the glTF rig source uses.
  ``rig_for_gltf`` may give that rig (for its bounds); by default it is loaded from the file.

Without times in the file, frames are spaced at ``fps`` (30 when not given, common practice).
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
        rate = fps or DEFAULT_FPS
        verts, times = _gltf_take(p, rate, rig_for_gltf)
        return _finish(verts, times, text, rate)
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
    if times is None:
        rate = fps or DEFAULT_FPS
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


# ---------------------------------------------------------------------------------------------
# glTF 2.0 takes


def sample_channel(keys: np.ndarray, values: np.ndarray, times: np.ndarray, interpolation: str,
                   *, rotation: bool = False) -> np.ndarray:
    """Sample one animation sampler at ``times`` (glTF 2.0 spec, "Animations" and Appendix C).

    keys (K,) increasing seconds; values (K, W), or (3K, W) for CUBICSPLINE (in-tangent, value,
    out-tangent per key); times (N,). Outside the keys the first or last value holds.
    rotation: W = 4 unit quaternions (x, y, z, w); LINEAR becomes slerp and results are normalised.
    returns (N, W) float64.
    """
    k = keys.shape[0]
    cubic = interpolation == "CUBICSPLINE"
    vals = values.reshape(k, 3, -1)[:, 1] if cubic else values
    if k == 1:
        return np.repeat(vals[:1], times.shape[0], axis=0).astype(np.float64)
    i = np.clip(np.searchsorted(keys, times, side="right") - 1, 0, k - 2)
    span = keys[i + 1] - keys[i]
    s = np.clip((times - keys[i]) / span, 0.0, 1.0)[:, None]
    v0, v1 = vals[i], vals[i + 1]
    if interpolation == "STEP":
        out = np.where(times[:, None] >= keys[i + 1][:, None], v1, v0)
    elif cubic:
        trip = values.reshape(k, 3, -1)
        b0, a1 = trip[i, 2], trip[i + 1, 0]  # out-tangent of key i, in-tangent of key i + 1
        s2, s3, td = s * s, s * s * s, span[:, None]
        out = ((2 * s3 - 3 * s2 + 1) * v0 + (s3 - 2 * s2 + s) * td * b0
               + (-2 * s3 + 3 * s2) * v1 + (s3 - s2) * td * a1)
    elif interpolation == "LINEAR" and rotation:
        out = slerp(v0, v1, s[:, 0])
    elif interpolation == "LINEAR":
        out = (1.0 - s) * v0 + s * v1
    else:
        raise TakeError(f"unknown animation interpolation {interpolation!r}")
    if rotation:
        out = out / np.linalg.norm(out, axis=1, keepdims=True)
    return np.asarray(out, dtype=np.float64)


def slerp(q0: np.ndarray, q1: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Spherical linear interpolation of unit quaternions (glTF 2.0 spec, Appendix C).

    q0, q1 (N, 4); s (N,) in [0, 1]. Takes the shorter arc; near-equal pairs fall back to lerp.
    """
    dot = np.einsum("ni,ni->n", q0, q1)
    q1 = np.where(dot[:, None] < 0.0, -q1, q1)
    dot = np.abs(dot)
    theta = np.arccos(np.clip(dot, -1.0, 1.0))
    sin = np.sin(theta)
    near = sin < 1e-6
    safe = np.where(near, 1.0, sin)
    w0 = np.where(near, 1.0 - s, np.sin((1.0 - s) * theta) / safe)
    w1 = np.where(near, s, np.sin(s * theta) / safe)
    out = w0[:, None] * q0 + w1[:, None] * q1
    return np.asarray(out / np.linalg.norm(out, axis=1, keepdims=True))


def euler_xyz_from_matrix(r: np.ndarray) -> np.ndarray:
    """(N, 3, 3) rotations -> (N, 3) radians (a, b, c) with R = Rx(a) @ Ry(b) @ Rz(c).

    The inverse of ``rigcast.export.gltf_eval.euler_xyz_matrices`` (R[0, 2] = sin b,
    R[0, 0] = cos b cos c, R[0, 1] = -cos b sin c, R[1, 2] = -sin a cos b, R[2, 2] = cos a cos b).
    """
    b = np.arcsin(np.clip(r[:, 0, 2], -1.0, 1.0))
    a = np.arctan2(-r[:, 1, 2], r[:, 2, 2])
    c = np.arctan2(-r[:, 0, 1], r[:, 0, 0])
    return np.stack([a, b, c], axis=1)


def _quat_matrices(q: np.ndarray) -> np.ndarray:
    """(N, 4) unit quaternions (x, y, z, w) -> (N, 3, 3)."""
    from rigcast.export.gltf_eval import quat_xyzw_to_matrix

    return np.array([quat_xyzw_to_matrix(x) for x in q]).reshape(-1, 3, 3)


def _gltf_take(path: Path, fps: float, rig: Any) -> tuple[np.ndarray, np.ndarray]:
    """Sample a glTF file's first animation at ``fps`` and evaluate it through a GltfRig."""
    import pygltflib

    from rigcast.export.gltf_rig import GltfRig, _Reader
    from rigcast.export.rig import RigError

    try:
        gltf = pygltflib.GLTF2().load(str(path))
    except Exception as exc:  # pygltflib raises many kinds on a corrupt file
        raise TakeError(f"{path}: not a readable glTF file ({exc})") from None
    if gltf is None or not gltf.animations:
        raise TakeError(f"{path}: glTF file has no animation")
    reader = _Reader(gltf, path)
    anim = gltf.animations[0]
    channels = []
    try:
        for ch in anim.channels:
            sampler = anim.samplers[ch.sampler]
            keys = reader.read(sampler.input)[:, 0]
            values = reader.read(sampler.output, normalize_ints=True)
            if keys.shape[0] == 0:
                raise TakeError(f"{path}: an animation sampler has no keyframes")
            channels.append((ch.target.node, ch.target.path, keys, values,
                             sampler.interpolation or "LINEAR"))
    except RigError as exc:
        raise TakeError(f"{path}: {exc}") from None
    except TakeError:  # a ValueError too: keep its own message
        raise
    except (IndexError, KeyError, TypeError, ValueError) as exc:
        raise TakeError(f"{path}: malformed animation ({type(exc).__name__}: {exc})") from None
    if not channels:
        raise TakeError(f"{path}: animation 0 has no channels")
    start = min(float(c[2][0]) for c in channels)
    stop = max(float(c[2][-1]) for c in channels)
    times = start + np.arange(int(np.floor((stop - start) * fps + 1e-6)) + 1) / fps
    rotations = {c[0]: c for c in channels if c[1] == "rotation"}
    for node, kind, _, _, _ in channels:
        if kind in ("translation", "scale"):
            raise TakeError(f"{path}: animated {kind} of node {node} is not supported; "
                            "takes may animate morph weights and joint rotations")
    if rig is None:
        names = [gltf.nodes[n].name or f"node_{n}" for n in rotations]
        full = {"x": [-180.0, 180.0], "y": [-90.0, 90.0], "z": [-180.0, 180.0]}
        try:
            rig = GltfRig(path, bounds={"joints": {n: full for n in names}} if names else None)
        except RigError as exc:
            raise TakeError(f"{path}: {exc}") from None
    controls = np.tile(rig.schema.defaults.astype(np.float64), (times.shape[0], 1))
    n_targets = int(rig.targets.shape[0])
    for node, kind, keys, values, interp in channels:
        if kind == "weights":
            if node != rig.mesh_node:
                raise TakeError(f"{path}: weights animation targets node {node}, not the mesh's")
            width = values.shape[0] // keys.shape[0] // (3 if interp == "CUBICSPLINE" else 1)
            if width != n_targets:
                raise TakeError(f"{path}: weights animation has {width} targets per key, "
                                f"the mesh has {n_targets}")
            controls[:, :n_targets] = sample_channel(keys, values.reshape(-1, width), times,
                                                     interp)
    for node, (_, _, keys, values, interp) in rotations.items():
        quat = sample_channel(keys, values, times, interp, rotation=True)
        rest = rig.local_left[node][:3, :3]
        # posed local rotation = R_rest @ E, so E = R_rest^T @ R(q)
        euler = np.degrees(euler_xyz_from_matrix(rest.T[None] @ _quat_matrices(quat)))
        covered = np.zeros(3, bool)
        for k, (jn, axis, _, _) in enumerate(rig.joint_controls):
            if jn == node:
                controls[:, n_targets + k] = euler[:, axis]
                covered[axis] = True
        if np.abs(euler[:, ~covered]).max(initial=0.0) > 1e-3:
            raise TakeError(f"{path}: node {node} rotates about axes the rig has no control for")
    return rig.evaluate(controls), times
