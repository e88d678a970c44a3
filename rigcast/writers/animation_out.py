"""Write solved controls as animation: CSV and JSON here; glTF 2.0 in ``rigcast.writers.gltf_out``,
OpenUSD in ``rigcast.writers.usd_out``; ``rigcast.writers.controls_out.write_controls`` picks by the output
file's extension (a module of its own, so that the writers do not import each other).

- ``.csv``: header ``frame,time_s,<control names...>`` then, when given, the per-frame quality
  ``fit_rms,fit_max,off_manifold,clamped,stale`` (flags 0/1; an empty fit error was not computed)
  and the head pose ``head_tx,head_ty,head_tz,head_qx,head_qy,head_qz,head_qw,head_scale``
  (``rigcast.writers.frame_info``); one row per frame.
- ``.json``: ``{"format": "rigcast-controls", "version": 2, "schema": {...}, "fps": float|null,
  "frames": [int...], "times_s": [float...], "controls": {name: [value per frame...]},
  "quality"?: {"fit_rms": [float|null...], "fit_max": [...], "flags": {name: [bool...]}},
  "head_pose"?: {"translation": [[x, y, z]...], "rotation_xyzw": [[x, y, z, w]...],
  "scale": [...]}}``; the controls are column-major, one list per control, in schema order.

``MorphBasis`` (a rig seen as blendshapes, for the glTF and USD writers) is read off a rig or a
bundle's forward model by ``morph_basis``.
"""

from __future__ import annotations

import csv
import json
import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from rigcast.runtime.bundle import Bundle
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.schema import ControlSchema
from rigcast.writers.frame_info import FLAG_NAMES, POSE_COLUMNS, FrameQuality, HeadPose

if TYPE_CHECKING:
    from rigcast.export.rigs.rig import Rig

log = logging.getLogger(__name__)

JSON_FORMAT = "rigcast-controls"
JSON_VERSION = 2  # 2 adds "quality" and "head_pose"; readers of 1 ignore them
QUALITY_COLUMNS = ("fit_rms", "fit_max", *FLAG_NAMES)



class AnimationError(RigcastError, ValueError):
    """Controls or a rig cannot be written in the asked format; the message says why."""

    advice = "choose another output path or format; `rigcast solve --help` lists them"


@dataclass(frozen=True)
class MorphBasis:
    """A rig seen as blendshapes: ``mesh = neutral + sum_m w[control_indices[m]] * targets[m]``.

    neutral: (V, 3) float32 the mesh at all blendshape weights 0 (the glTF base POSITION);
    faces: (F, 3) int32; targets: (M, V, 3) float32 deltas of one unit
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
    max_span: float | None = None,
) -> MorphBasis:
    """Read a rig's blendshapes off ``evaluate`` by probing each control over its range.

    A control is a blendshape when the mesh moves linearly with it over its whole range: with
    ``t = (f(hi) - f(lo)) / (hi - lo)`` (f: the mesh with only that control moved from the
    defaults), ``f(x) - f(default) = (x - default) * t`` at x = lo, (lo + hi) / 2 and hi, within
    ``linearity_tol`` of ``|t| * (hi - lo)``. Joint rotations fail this over a wide range (the
    chord bends). Defaults need not be 0: the glTF base is ``neutral - sum_i default_i * t_i``,
    so glTF weights are the control values themselves.
    ``max_span``: controls whose range is wider are not blendshape weights whatever the test says
    (for a learned forward model, which can look linear where the rig is not).
    evaluate: (B, C) -> (B, V, 3). Raises AnimationError when no control is a blendshape.
    """
    c = len(schema)
    defaults = schema.defaults.astype(np.float64)
    lo, hi = schema.lower.astype(np.float64), schema.upper.astype(np.float64)
    poses = np.repeat(defaults[None], 3 * c + 1, axis=0)
    for k, probe in enumerate((lo, 0.5 * (lo + hi), hi)):
        poses[1 + k * c + np.arange(c), np.arange(c)] = probe
    meshes = np.asarray(evaluate(poses.astype(np.float32)), dtype=np.float64)
    deltas = (meshes[1:] - meshes[0]).reshape(3, c, -1, 3)  # (probe, C, V, 3)
    keep: list[int] = []
    omitted: list[str] = []
    units = np.zeros((c, *deltas.shape[2:]))
    for i, control in enumerate(schema.controls):
        span = hi[i] - lo[i]
        units[i] = (deltas[2, i] - deltas[0, i]) / span
        size = float(np.abs(units[i]).max()) * span
        xs = (lo[i] - defaults[i], 0.5 * (lo[i] + hi[i]) - defaults[i], hi[i] - defaults[i])
        bend = max(float(np.abs(deltas[k, i] - x * units[i]).max()) for k, x in enumerate(xs))
        narrow = max_span is None or span <= max_span
        if size > 0.0 and bend <= linearity_tol * size and narrow:
            keep.append(i)
        else:
            omitted.append(control.name)
    if not keep:
        raise AnimationError(
            f"rig {name!r} is not a blendshape rig: no control moves the mesh linearly over its "
            "range, so it has no morph targets; for a skinned rig give the rig with --rig (its "
            "skeleton then goes into glTF and USD), or write CSV or JSON"
        )
    if omitted:
        log.warning("rig %s: %d non-blendshape controls left out of the morph targets: %s",
                    name, len(omitted), ", ".join(omitted))
    targets = units[keep]
    # base[v] = neutral[v] - sum_m default[keep[m]] * targets[m, v]
    base = np.asarray(neutral, np.float64) - np.einsum("m,mvx->vx", defaults[keep], targets)
    return MorphBasis(
        name=name,
        neutral=base.astype(np.float32),
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


def _extra_columns(frames: int, quality: FrameQuality | None, head: HeadPose | None
                   ) -> tuple[list[str], np.ndarray]:
    """Names and (T, K) values of the quality and head-pose columns that follow the controls."""
    names: list[str] = []
    cols: list[np.ndarray] = []
    if quality is not None:
        if quality.frames != frames:
            raise AnimationError(f"quality has {quality.frames} frames, the take {frames}")
        names += list(QUALITY_COLUMNS)
        cols += [quality.fit_rms, quality.fit_max,
                 *(quality.flags(f).astype(np.float64) for f in FLAG_NAMES)]
    if head is not None:
        if head.translation.shape[0] != frames:
            raise AnimationError(f"head pose has {head.translation.shape[0]} frames, the take "
                                 f"{frames}")
        names += list(POSE_COLUMNS)
        cols += list(head.table().T)
    values = np.column_stack(cols) if cols else np.zeros((frames, 0))
    return names, values


def write_csv(path: str | Path, names: Sequence[str], controls: np.ndarray,
              times_s: np.ndarray, *, quality: FrameQuality | None = None,
              head: HeadPose | None = None) -> Path:
    """controls: (T, C) in the order of ``names``; times_s: (T,). Optional columns after the
    controls: QUALITY_COLUMNS (flags as 0/1, fit error empty when not computed), then
    POSE_COLUMNS."""
    path = Path(path)
    controls, times_s = _check_take(controls, times_s, len(names))
    extra_names, extra = _extra_columns(controls.shape[0], quality, head)
    flags = {n for n in extra_names if n in FLAG_NAMES}
    with path.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["frame", "time_s", *names, *extra_names])
        for f in range(controls.shape[0]):
            tail = ["" if not np.isfinite(v) else str(int(v)) if n in flags else repr(float(v))
                    for n, v in zip(extra_names, extra[f], strict=True)]
            writer.writerow([f, repr(float(times_s[f])), *(repr(float(v)) for v in controls[f]),
                             *tail])
    return path


def read_csv_columns(path: str | Path) -> tuple[tuple[str, ...], np.ndarray, np.ndarray,
                                                 dict[str, np.ndarray]]:
    """Read a CSV written by ``write_csv``: (control names, controls (T, C), times_s (T,),
    {quality or head-pose column: (T,)}); an empty fit-error field reads as NaN."""
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
        table = np.array([[float(x) if x != "" else np.nan for x in r] for r in rows[1:]],
                         dtype=np.float64)
    except ValueError as exc:
        raise AnimationError(f"{path}: {exc}") from None
    table = table.reshape(-1, width)
    header = rows[0]
    known = set(QUALITY_COLUMNS) | set(POSE_COLUMNS)
    first_extra = width
    while first_extra > 2 and header[first_extra - 1] in known:
        first_extra -= 1
    extras = {n: table[:, 2 + i + (first_extra - 2)] for i, n in enumerate(header[first_extra:])}
    return tuple(header[2:first_extra]), table[:, 2:first_extra], table[:, 1], extras


def read_csv(path: str | Path) -> tuple[tuple[str, ...], np.ndarray, np.ndarray]:
    """Read a CSV written by ``write_csv``: (names, controls (T, C), times_s (T,))."""
    names, controls, times, _ = read_csv_columns(path)
    return names, controls, times


def _finite_or_none(values: np.ndarray) -> list[float | None]:
    """JSON has no NaN: a fit error that was not computed is null."""
    return [float(v) if np.isfinite(v) else None for v in values]


def write_json(path: str | Path, schema: ControlSchema, controls: np.ndarray,
               times_s: np.ndarray, *, fps: float | None = None,
               quality: FrameQuality | None = None, head: HeadPose | None = None) -> Path:
    """controls: (T, C) in schema order; times_s: (T,). Column-major, see the module docstring."""
    path = Path(path)
    controls, times_s = _check_take(controls, times_s, len(schema))
    _extra_columns(controls.shape[0], quality, head)  # checks the frame counts
    doc: dict[str, Any] = {
        "format": JSON_FORMAT,
        "version": JSON_VERSION,
        "schema": schema.to_dict(),
        "fps": None if fps is None else float(fps),
        "frames": list(range(controls.shape[0])),
        "times_s": times_s.tolist(),
        "controls": {n: controls[:, i].tolist() for i, n in enumerate(schema.names)},
    }
    if quality is not None:
        doc["quality"] = {
            "fit_rms": _finite_or_none(quality.fit_rms),
            "fit_max": _finite_or_none(quality.fit_max),
            "flags": {f: quality.flags(f).tolist() for f in FLAG_NAMES},
        }
    if head is not None:
        doc["head_pose"] = {"translation": head.translation.tolist(),
                            "rotation_xyzw": head.rotation.tolist(),
                            "scale": head.scale.tolist()}
    path.write_text(json.dumps(doc, allow_nan=False))
    return path


def read_json(path: str | Path) -> tuple[ControlSchema, np.ndarray, np.ndarray]:
    """Read a JSON file written by ``write_json``: (schema, controls (T, C), times_s (T,)).
    Its ``quality`` and ``head_pose`` are plain JSON; ``json.loads`` the file for them."""
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
    from rigcast.runtime.solve.inference import ForwardModel

    forward = ForwardModel(bundle, threads=threads)
    return morph_basis(bundle.name, bundle.schema, bundle.neutral, bundle.faces,
                       forward.evaluate, linearity_tol=linearity_tol)


def morph_basis_from_rig(rig: Rig) -> MorphBasis:
    """Morph targets read off a rig by evaluating unit poses (exact linearity test)."""
    return morph_basis(rig.name, rig.schema, rig.neutral, rig.faces, rig.evaluate)
