"""Write solved controls as animation: CSV, JSON, and glTF 2.0 morph-target weight animation.

Formats (chosen by the output file's extension in ``write_controls``):

- ``.csv``: header ``frame,time_s,<control names...>``, one row per frame.
- ``.json``: ``{"format": "rigcast-controls", "version": 1, "schema": {...}, "fps": float|null,
  "frames": [int...], "times_s": [float...], "controls": {name: [value per frame...]}}``;
  the controls are column-major, one list per control, in schema order.
- ``.gltf`` (JSON with the buffer embedded as a base64 data URI) or ``.glb`` (binary container):
  one mesh whose base POSITION is the rig's neutral and whose morph targets are the deltas of one
  unit of each blendshape control, named in ``mesh.extras.targetNames``, and one animation that
  drives the node's ``weights`` with LINEAR interpolation. This is for blendshape rigs only.

The glTF layout follows the glTF 2.0 specification (sections "Buffers and Buffer Views",
"Accessors", "Morph Targets", "Animations", "GLB File Format Specification").
"""

from __future__ import annotations

import base64
import csv
import json
import logging
import math
import struct
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from rigcast.runtime.bundle import Bundle
from rigcast.runtime.schema import ControlSchema

if TYPE_CHECKING:
    from rigcast.export.rig import Rig

log = logging.getLogger(__name__)

JSON_FORMAT = "rigcast-controls"
JSON_VERSION = 1

# glTF 2.0 enums (spec 5.1 "accessor.componentType", 5.11 "bufferView.target", 5.24 "mode")
_FLOAT = 5126
_UNSIGNED_INT = 5125
_ARRAY_BUFFER = 34962
_ELEMENT_ARRAY_BUFFER = 34963
_TRIANGLES = 4
_POINTS = 0
_GLB_MAGIC = 0x46546C67  # "glTF"
_CHUNK_JSON = 0x4E4F534A  # "JSON"
_CHUNK_BIN = 0x004E4942  # "BIN\0"


class AnimationError(ValueError):
    """Controls or a rig cannot be written in the asked format; the message says why."""


@dataclass(frozen=True)
class MorphBasis:
    """A rig seen as blendshapes: ``mesh = neutral + sum_m w[control_indices[m]] * targets[m]``.

    neutral: (V, 3) float32; faces: (F, 3) int32; targets: (M, V, 3) float32 deltas of one unit
    of weight; names: (M,) target names; control_indices: (M,) column of each target in the
    solved controls; omitted: the controls that are not blendshapes and are left out.
    """

    name: str
    neutral: np.ndarray
    faces: np.ndarray
    targets: np.ndarray
    names: tuple[str, ...]
    control_indices: tuple[int, ...]
    omitted: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not self.control_indices:
            raise AnimationError(f"{self.name}: the rig has no blendshape controls to write "
                                 f"as morph targets (omitted: {list(self.omitted)})")
        for label, a in (("neutral", self.neutral), ("targets", self.targets)):
            if not np.all(np.isfinite(a)):
                raise AnimationError(f"{self.name}: the {label} hold NaN or Inf, which glTF "
                                     "cannot store")


def morph_basis(
    name: str,
    schema: ControlSchema,
    neutral: np.ndarray,
    faces: np.ndarray,
    evaluate: Callable[[np.ndarray], np.ndarray],
    *,
    linearity_tol: float = 1e-3,
) -> MorphBasis:
    """Read a rig's blendshapes off ``evaluate`` by probing unit poses.

    A control counts as a blendshape when its default is 0 and the mesh moves linearly with it:
    the delta at half the probe weight equals half the delta at the probe weight (1, or the
    control's maximum when that is below 1) within ``linearity_tol`` of the delta's size.
    evaluate: (B, C) -> (B, V, 3). Raises AnimationError when no control is a blendshape.
    """
    c = len(schema)
    defaults = schema.defaults.astype(np.float64)
    upper = schema.upper.astype(np.float64)
    probe = np.where(upper >= 1.0, 1.0, upper)
    poses = np.repeat(defaults[None], 2 * c + 1, axis=0)
    poses[1 + np.arange(c), np.arange(c)] = probe
    poses[1 + c + np.arange(c), np.arange(c)] = 0.5 * probe
    meshes = np.asarray(evaluate(poses.astype(np.float32)), dtype=np.float64)
    base = meshes[0]
    full = meshes[1 : 1 + c] - base  # (C, V, 3)
    half = meshes[1 + c :] - base
    keep: list[int] = []
    omitted: list[str] = []
    for i, control in enumerate(schema.controls):
        size = float(np.abs(full[i]).max())
        bend = float(np.abs(half[i] - 0.5 * full[i]).max())
        linear = bend <= linearity_tol * max(size, 1e-12)
        if control.default == 0.0 and probe[i] > 0.0 and linear:
            keep.append(i)
        else:
            omitted.append(control.name)
    if not keep:
        raise AnimationError(
            f"rig {name!r} is not a blendshape rig: no control moves the mesh linearly from a zero "
            "default, so it has no morph targets for glTF; write CSV or JSON instead"
        )
    if omitted:
        log.warning("rig %s: %d non-blendshape controls left out of glTF: %s",
                    name, len(omitted), ", ".join(omitted))
    targets = full[keep] / probe[keep][:, None, None]
    return MorphBasis(
        name=name,
        neutral=np.asarray(neutral, dtype=np.float32),
        faces=np.asarray(faces, dtype=np.int32).reshape(-1, 3),
        targets=targets.astype(np.float32),
        names=tuple(schema.controls[i].name for i in keep),
        control_indices=tuple(keep),
        omitted=tuple(omitted),
    )


def _check_take(controls: np.ndarray, times_s: np.ndarray, width: int) -> tuple[np.ndarray, ...]:
    controls = np.asarray(controls, dtype=np.float64)
    times_s = np.asarray(times_s, dtype=np.float64)
    if controls.ndim != 2 or controls.shape[1] != width:
        raise AnimationError(f"controls must be (T, {width}), got {controls.shape}")
    if controls.shape[0] == 0:
        raise AnimationError("controls have no frames")
    if times_s.shape != (controls.shape[0],):
        raise AnimationError(f"times_s must be ({controls.shape[0]},), got {times_s.shape}")
    if not (np.all(np.isfinite(controls)) and np.all(np.isfinite(times_s))):
        raise AnimationError("controls or times contain NaN or Inf")
    if times_s.shape[0] > 1 and not np.all(np.diff(times_s) > 0):
        raise AnimationError("times_s must be strictly increasing")
    return controls, times_s


# ---------------------------------------------------------------------------------------------
# CSV and JSON


def write_csv(path: str | Path, names: Sequence[str], controls: np.ndarray,
              times_s: np.ndarray) -> Path:
    """controls: (T, C) in the order of ``names``; times_s: (T,)."""
    path = Path(path)
    controls, times_s = _check_take(controls, times_s, len(names))
    with path.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["frame", "time_s", *names])
        for f in range(controls.shape[0]):
            writer.writerow([f, repr(float(times_s[f])), *(repr(float(v)) for v in controls[f])])
    return path


def read_csv(path: str | Path) -> tuple[tuple[str, ...], np.ndarray, np.ndarray]:
    """Read a CSV written by ``write_csv``: (names, controls (T, C), times_s (T,))."""
    path = Path(path)
    with path.open(newline="") as fh:
        rows = list(csv.reader(fh))
    if not rows or rows[0][:2] != ["frame", "time_s"]:
        raise AnimationError(f"{path}: header must start with 'frame,time_s'")
    width = len(rows[0])
    short = [i + 2 for i, r in enumerate(rows[1:]) if len(r) != width]
    if short:
        raise AnimationError(f"{path}: line {short[0]} has a different number of fields than "
                             f"the header ({width})")
    try:
        table = np.array([[float(x) for x in r] for r in rows[1:]], dtype=np.float64)
    except ValueError as exc:
        raise AnimationError(f"{path}: {exc}") from None
    table = table.reshape(-1, width)
    return tuple(rows[0][2:]), table[:, 2:], table[:, 1]


def write_json(path: str | Path, schema: ControlSchema, controls: np.ndarray,
               times_s: np.ndarray, *, fps: float | None = None) -> Path:
    """controls: (T, C) in schema order; times_s: (T,). Column-major, see the module docstring."""
    path = Path(path)
    controls, times_s = _check_take(controls, times_s, len(schema))
    doc = {
        "format": JSON_FORMAT,
        "version": JSON_VERSION,
        "schema": schema.to_dict(),
        "fps": None if fps is None else float(fps),
        "frames": list(range(controls.shape[0])),
        "times_s": times_s.tolist(),
        "controls": {n: controls[:, i].tolist() for i, n in enumerate(schema.names)},
    }
    path.write_text(json.dumps(doc))
    return path


def read_json(path: str | Path) -> tuple[ControlSchema, np.ndarray, np.ndarray]:
    """Read a JSON file written by ``write_json``: (schema, controls (T, C), times_s (T,))."""
    path = Path(path)
    try:
        doc = json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise AnimationError(f"{path}: not valid JSON ({exc})") from None
    if not isinstance(doc, dict) or doc.get("format") != JSON_FORMAT:
        found = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise AnimationError(f"{path}: not a rigcast controls file (format {found!r})")
    try:
        schema = ControlSchema.from_dict(doc["schema"])
        controls = np.array([doc["controls"][n] for n in schema.names], dtype=np.float64).T
        times = np.array(doc["times_s"], dtype=np.float64)
    except (KeyError, TypeError, ValueError) as exc:
        raise AnimationError(f"{path}: malformed controls file ({type(exc).__name__}: "
                             f"{exc})") from None
    return schema, controls.reshape(-1, len(schema)), times


# ---------------------------------------------------------------------------------------------
# glTF 2.0


class _BufferBuilder:
    """Packs arrays into one binary buffer with one bufferView and accessor each."""

    def __init__(self) -> None:
        self.blob = bytearray()
        self.views: list[dict[str, Any]] = []
        self.accessors: list[dict[str, Any]] = []

    def add(self, data: np.ndarray, component: int, kind: str, *, target: int | None = None,
            bounds: bool = False) -> int:
        raw = np.ascontiguousarray(data).tobytes()
        # Every component here is 4 bytes, so 4-byte alignment satisfies spec 3.6.2.4
        # ("offset of an accessor into a bufferView ... must be a multiple of the component size").
        while len(self.blob) % 4:
            self.blob.append(0)
        view: dict[str, Any] = {"buffer": 0, "byteOffset": len(self.blob), "byteLength": len(raw)}
        if target is not None:
            view["target"] = target
        self.blob.extend(raw)
        self.views.append(view)
        width = {"SCALAR": 1, "VEC3": 3}[kind]
        accessor: dict[str, Any] = {
            "bufferView": len(self.views) - 1,
            "componentType": component,
            "count": int(data.size // width),
            "type": kind,
        }
        if bounds:
            # Spec 3.6.2.5: POSITION and animation input accessors MUST carry min and max; the
            # validator compares them with the float32 data exactly.
            rows = data.reshape(-1, width)
            accessor["min"] = [float(v) for v in rows.min(axis=0)]
            accessor["max"] = [float(v) for v in rows.max(axis=0)]
        self.accessors.append(accessor)
        return len(self.accessors) - 1


def gltf_document(basis: MorphBasis, controls: np.ndarray, times_s: np.ndarray
                  ) -> tuple[dict[str, Any], bytes]:
    """Build the glTF JSON (without the buffer's uri) and its binary buffer.

    controls: (T, C) solved controls (all of the rig's controls); times_s: (T,) seconds, >= 0.
    """
    controls = np.asarray(controls, dtype=np.float64)
    if controls.ndim != 2 or controls.shape[1] <= max(basis.control_indices):
        raise AnimationError(
            f"controls must be (T, C) with C > {max(basis.control_indices)}, got {controls.shape}"
        )
    controls, times_s = _check_take(controls, times_s, controls.shape[1])
    times32 = times_s.astype(np.float32)
    if times32[0] < 0.0:
        raise AnimationError(f"glTF animation times must be >= 0, first is {times32[0]}")
    if times32.shape[0] > 1 and not np.all(np.diff(times32) > 0):
        raise AnimationError("times_s are too close to stay increasing in float32")
    weights = controls[:, list(basis.control_indices)].astype(np.float32)  # (T, M)
    buf = _BufferBuilder()
    primitive: dict[str, Any] = {"attributes": {}, "mode": _TRIANGLES}
    if basis.faces.shape[0]:
        idx = buf.add(basis.faces.astype(np.uint32).reshape(-1), _UNSIGNED_INT, "SCALAR",
                      target=_ELEMENT_ARRAY_BUFFER)
        primitive["indices"] = idx
    else:
        primitive["mode"] = _POINTS
    primitive["attributes"]["POSITION"] = buf.add(
        basis.neutral.astype(np.float32), _FLOAT, "VEC3", target=_ARRAY_BUFFER, bounds=True
    )
    primitive["targets"] = [
        {"POSITION": buf.add(t.astype(np.float32), _FLOAT, "VEC3", target=_ARRAY_BUFFER,
                             bounds=True)}
        for t in basis.targets
    ]
    t_in = buf.add(times32, _FLOAT, "SCALAR", bounds=True)
    t_out = buf.add(weights.reshape(-1), _FLOAT, "SCALAR")
    mesh: dict[str, Any] = {
        "name": basis.name or "rig",
        "primitives": [primitive],
        "weights": [0.0] * len(basis.names),
        "extras": {"targetNames": list(basis.names)},
    }
    doc: dict[str, Any] = {
        "asset": {"version": "2.0", "generator": "rigcast"},
        "scene": 0,
        "scenes": [{"nodes": [0]}],
        "nodes": [{"name": basis.name or "rig", "mesh": 0}],
        "meshes": [mesh],
        "animations": [{
            "name": "solve",
            "samplers": [{"input": t_in, "output": t_out, "interpolation": "LINEAR"}],
            "channels": [{"sampler": 0, "target": {"node": 0, "path": "weights"}}],
            "extras": {"omittedControls": list(basis.omitted)},
        }],
        "accessors": buf.accessors,
        "bufferViews": buf.views,
        "buffers": [{"byteLength": len(buf.blob)}],
    }
    return doc, bytes(buf.blob)


def write_gltf(path: str | Path, basis: MorphBasis, controls: np.ndarray,
               times_s: np.ndarray) -> Path:
    """Write ``.gltf`` (embedded base64 buffer) or ``.glb`` (binary), chosen by the extension."""
    path = Path(path)
    doc, blob = gltf_document(basis, controls, times_s)
    suffix = path.suffix.lower()
    if suffix == ".gltf":
        doc["buffers"][0]["uri"] = (
            "data:application/octet-stream;base64," + base64.b64encode(blob).decode("ascii")
        )
        path.write_text(json.dumps(doc))
    elif suffix == ".glb":
        path.write_bytes(_glb(doc, blob))
    else:
        raise AnimationError(f"{path}: glTF output needs a .gltf or .glb extension")
    log.info("wrote %s: %d frames, %d morph targets", path, len(times_s), len(basis.names))
    return path


def _glb(doc: dict[str, Any], blob: bytes) -> bytes:
    """GLB container (spec 4.4): 12-byte header, JSON chunk space-padded, BIN chunk 0-padded."""
    text = json.dumps(doc, separators=(",", ":")).encode("utf-8")
    text += b" " * (-len(text) % 4)
    binary = blob + b"\0" * (-len(blob) % 4)
    total = 12 + 8 + len(text) + 8 + len(binary)
    return b"".join([
        struct.pack("<III", _GLB_MAGIC, 2, total),
        struct.pack("<II", len(text), _CHUNK_JSON), text,
        struct.pack("<II", len(binary), _CHUNK_BIN), binary,
    ])


def write_controls(path: str | Path, schema: ControlSchema, controls: np.ndarray,
                   times_s: np.ndarray, *, fps: float | None = None,
                   basis: MorphBasis | None = None) -> Path:
    """Write by extension: .csv, .json, .gltf or .glb (the glTF forms need ``basis``)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return write_csv(path, schema.names, controls, times_s)
    if suffix == ".json":
        return write_json(path, schema, controls, times_s, fps=fps)
    if suffix in (".gltf", ".glb"):
        if basis is None:
            raise AnimationError(f"{path}: glTF output needs the rig's morph targets")
        return write_gltf(path, basis, controls, times_s)
    raise AnimationError(
        f"{path}: unknown output format {suffix!r}; use .csv, .json, .gltf or .glb"
    )


def default_times(frames: int, fps: float) -> np.ndarray:
    """(T,) times in seconds of ``frames`` frames at ``fps``."""
    if not (math.isfinite(fps) and fps > 0):
        raise AnimationError(f"fps must be a positive number, got {fps}")
    return np.arange(frames, dtype=np.float64) / fps


def morph_basis_from_bundle(bundle: Bundle, *, threads: int = 1,
                            linearity_tol: float = 0.1) -> MorphBasis:
    """Morph targets read off a bundle's forward model (unit poses), for glTF output.

    The forward model is an approximation, so linearity is tested loosely (``linearity_tol``).
    """
    from rigcast.runtime.inference import ForwardModel

    forward = ForwardModel(bundle, threads=threads)
    return morph_basis(bundle.name, bundle.schema, bundle.neutral, bundle.faces,
                       forward.evaluate, linearity_tol=linearity_tol)


def morph_basis_from_rig(rig: Rig) -> MorphBasis:
    """Morph targets read off a rig by evaluating unit poses (exact linearity test)."""
    return morph_basis(rig.name, rig.schema, rig.neutral, rig.faces, rig.evaluate)
