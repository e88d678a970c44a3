"""glTF 2.0 takes: a file's first animation, sampled in time and evaluated to meshes.

Every channel the specification allows is evaluated (glTF 2.0, "Animations"): ``translation``,
``rotation``, ``scale`` and ``weights``, each with LINEAR, STEP or CUBICSPLINE interpolation,
constant (one key, or equal keys) or not. LINEAR rotations are spherical (slerp); CUBICSPLINE is
the Hermite spline of Appendix C, its rotations normalised. Outside its keys a channel holds its
first or last value. The pose of every node is then evaluated as a viewer would
(``GltfRig.pose``): morph targets, the node hierarchy and skinning.

Times: keys evenly spaced at ``BAKED_MIN_FPS`` or more are a baked take, and its own keys are the
frames (rate from their spacing). Otherwise, or when ``fps`` is given, the animation is sampled at
``fps`` (default ``takes.DEFAULT_FPS``) from its first to its last key, and the last key is always
a frame, even when the rate does not divide the duration.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.readers.take_common import DEFAULT_FPS, TakeError, rate_of

log = logging.getLogger(__name__)

BAKED_MIN_FPS = 12.0  # keys this dense and even are frames (common practice, no source)
_PATH_WIDTH = {"translation": 3, "rotation": 4, "scale": 3}
_INTERPOLATIONS = ("LINEAR", "STEP", "CUBICSPLINE")


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
        out1 = np.repeat(vals[:1], times.shape[0], axis=0).astype(np.float64)
        return out1 / np.linalg.norm(out1, axis=1, keepdims=True) if rotation else out1
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


def frame_times(keys: np.ndarray, fps: float | None, stated: float | None = None
                ) -> tuple[np.ndarray, float, str]:
    """The frames to sample: (times (N,), rate, where the rate came from: "file", "option" or
    "default"). keys: every key time of the animation, sorted and unique; stated: the rate the
    file states (``asset.extras.fps``, as rigcast writes it), used for baked keys."""
    start, stop = float(keys[0]), float(keys[-1])
    if fps is None and keys.shape[0] > 2:
        step = np.diff(keys)
        median = float(np.median(step))
        even = float(np.abs(step - median).max()) <= 1e-4 * max(median, 1e-9) + 2e-6
        if even and median > 0 and 1.0 / median >= BAKED_MIN_FPS:
            rate = rate_of(step)
            if stated is not None and abs(stated * median - 1.0) < 1e-4:
                rate = stated  # float32 key times blur the rate the file states
            return keys.astype(np.float64), rate, "file"
    rate = fps if fps is not None else DEFAULT_FPS
    times = start + np.arange(int(np.floor((stop - start) * rate + 1e-6)) + 1) / rate
    if stop - times[-1] > 1e-6:  # the rate does not divide the duration: keep the last key
        times = np.append(times, stop)
    return times, rate, "option" if fps is not None else "default"


def read_gltf_take(path: Path, fps: float | None, rig: Any = None
                   ) -> tuple[np.ndarray, np.ndarray, float, str]:
    """Sample ``path``'s first animation -> (vertices (T, V, 3), times (T,), fps, fps source).

    ``rig``: a ``GltfRig`` of the same file (any bounds); by default one is loaded.
    """
    import pygltflib

    from rigcast.export.rigs.gltf_eval import trs_matrices
    from rigcast.export.rigs.gltf_io import GltfReader
    from rigcast.export.rigs.rig import RigError

    try:
        gltf = pygltflib.GLTF2().load(str(path))
    except Exception as exc:  # pygltflib raises many kinds on a corrupt file
        raise TakeError(f"{path}: not a readable glTF file ({exc})") from None
    if gltf is None or not gltf.animations:
        raise TakeError(f"{path}: glTF file has no animation")
    reader = GltfReader(gltf, path)
    try:
        channels = _channels(gltf, reader, path)
        if rig is None:
            rig = _posable_rig(gltf, path)
    except RigError as exc:
        raise TakeError(f"{path}: {exc}") from None
    keys = np.unique(np.concatenate([c[2] for c in channels]))
    extras = gltf.asset.extras if gltf.asset is not None else None
    stated = extras.get("fps") if isinstance(extras, dict) else None
    stated = float(stated) if isinstance(stated, int | float) and stated > 0 else None
    times, rate, source = frame_times(keys, fps, stated)
    n_nodes, n_targets = len(gltf.nodes), int(rig.targets.shape[0])
    trs = [np.repeat(a[None], times.shape[0], axis=0) for a in rig.node_trs]  # (T, N, 3|4|3)
    weights = np.tile(rig.schema.defaults[:n_targets].astype(np.float64), (times.shape[0], 1))
    for node, kind, k, values, interp in channels:
        if kind == "weights":
            if node != rig.mesh_node:
                raise TakeError(f"{path}: weights animation targets node {node}, not the mesh's")
            width = values.shape[0] // k.shape[0] // (3 if interp == "CUBICSPLINE" else 1)
            if width != n_targets:
                raise TakeError(f"{path}: weights animation has {width} targets per key, "
                                f"the mesh has {n_targets}")
            weights = sample_channel(k, values.reshape(-1, width), times, interp)
            continue
        if rig.node_is_matrix[node]:
            raise TakeError(f"{path}: animation targets node {node}, which has a matrix; the "
                            "glTF 2.0 spec allows animating TRS nodes only")
        slot = ("translation", "rotation", "scale").index(kind)
        trs[slot][:, node] = sample_channel(k, values, times, interp, rotation=kind == "rotation")
    local = trs_matrices(trs[0].reshape(-1, 3), trs[1].reshape(-1, 4), trs[2].reshape(-1, 3))
    local = local.reshape(times.shape[0], n_nodes, 4, 4)
    for n in range(n_nodes):
        if rig.node_is_matrix[n]:
            local[:, n] = rig.local_rest[n]
    log.info("%s: %d channels sampled at %d frames (%.6g fps, %s)", path, len(channels),
             times.shape[0], rate, source)
    return rig.pose(weights, local), times, rate, source


def _channels(gltf: Any, reader: Any, path: Path) -> list[tuple[int, str, np.ndarray, np.ndarray,
                                                                 str]]:
    """(node, path, keys (K,), values (K or 3K, W), interpolation) of animation 0's channels."""
    anim = gltf.animations[0]
    out = []
    try:
        for c, ch in enumerate(anim.channels):
            sampler = anim.samplers[ch.sampler]
            interp = sampler.interpolation or "LINEAR"
            kind = ch.target.path
            where = f"{path}: animation 0 channel {c}"
            if interp not in _INTERPOLATIONS:
                raise TakeError(f"{where}: unknown interpolation {interp!r}; the spec allows "
                                f"{', '.join(_INTERPOLATIONS)}")
            if kind not in ("weights", *_PATH_WIDTH):
                raise TakeError(f"{where}: unknown target path {kind!r}")
            if ch.target.node is None or not 0 <= ch.target.node < len(gltf.nodes):
                raise TakeError(f"{where}: target node {ch.target.node} does not exist")
            keys = reader.read(sampler.input)[:, 0]
            values = reader.read(sampler.output, normalize_ints=True)
            if keys.shape[0] == 0:
                raise TakeError(f"{path}: an animation sampler has no keyframes")
            if keys.shape[0] > 1 and not np.all(np.diff(keys) > 0):
                raise TakeError(f"{where}: key times must increase strictly (spec, "
                                "\"Animations\")")
            rows = keys.shape[0] * (3 if interp == "CUBICSPLINE" else 1)
            if kind in _PATH_WIDTH and values.shape != (rows, _PATH_WIDTH[kind]):
                raise TakeError(f"{where}: {kind} output has shape {values.shape}, expected "
                                f"({rows}, {_PATH_WIDTH[kind]}) for {keys.shape[0]} {interp} keys")
            if kind == "weights" and values.size % rows:
                raise TakeError(f"{where}: {values.size} weights do not divide into {rows} keys")
            out.append((int(ch.target.node), kind, keys, values, interp))
    except TakeError:  # a ValueError too: keep its own message
        raise
    except (IndexError, KeyError, TypeError, ValueError) as exc:
        raise TakeError(f"{path}: malformed animation ({type(exc).__name__}: {exc})") from None
    if not out:
        raise TakeError(f"{path}: animation 0 has no channels")
    return out


def _posable_rig(gltf: Any, path: Path) -> Any:
    """A GltfRig of the file with a control on every axis of every skin joint (so that a
    skin-only file loads); the take evaluates poses, not controls, so the bounds do not matter."""
    from rigcast.export.rigs.gltf_rig import GltfRig

    used = [n.mesh for n in gltf.nodes if n.mesh is not None]
    mesh = used[0] if used else 0
    holders = [n for n in gltf.nodes if n.mesh == mesh]
    skin = holders[0].skin if holders else None
    names: list[str] = []
    if skin is not None and 0 <= skin < len(gltf.skins or []):
        names = [gltf.nodes[j].name or f"node_{j}" for j in gltf.skins[skin].joints]
    full = {"x": [-180.0, 180.0], "y": [-90.0, 90.0], "z": [-180.0, 180.0]}
    return GltfRig(path, bounds={"joints": dict.fromkeys(names, full)} if names else None)
