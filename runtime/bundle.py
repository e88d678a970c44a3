"""The bundle: one file that carries everything the runtime needs for one rig.

A bundle is a ZIP archive (stored, not compressed) with these members:

- ``manifest.json``   format tag and version, control schema, sizes, normalisation, training
                      figures, fingerprints, package versions and the SHA-256 of every member;
- ``arrays.npz``      ``neutral`` (V, 3) float32, ``faces`` (F, 3) int32,
                      ``stable_indices`` (S,) int64, ``input_indices`` (K,) int64;
- ``inverse.onnx``    input ``mesh`` float32 (N, K, 3): absolute positions of ``input_indices``
                      in the neutral's frame (after head stabilisation);
                      output ``controls`` float32 (N, C), always within the schema's bounds;
- ``forward.onnx``    input ``controls`` float32 (N, C); output ``vertices`` float32 (N, V, 3);
- ``refine.onnx``     optional, for the Gauss-Newton steps after the network (runtime/solve/refine.py);
                      with it, ``arrays.npz`` holds ``refine_hessian`` (C, C) float64 and the
                      manifest a ``refine`` section. Two forms:
                      * projected (bundles since the all-vertex refinement): ``arrays.npz`` also
                        holds ``refine_indices`` (S,) int64, and ``refine_project.onnx`` maps
                        ``points`` (N, S, 3) to ``moments`` (N, 3, 3R + 4) and ``norm_sq`` (N,)
                        float32, with constant outputs ``moment_constants`` and ``moment_centre``
                        (the moment form, runtime/solve/moments.py; earlier projected bundles:
                        ``projection`` (N, R) and ``norm_sq`` float64); the refinement graph maps
                        ``controls`` (N, C) and ``projection`` (N, R) to ``gradient`` (N, C),
                        ``quad`` (N,) float64 and, in the moment form, ``basis_weights`` (N, R)
                        float64, the z = [u; MLP(u)] whose mesh is offset + A^T z;
                      * input-vertex (older bundles): ``controls`` (N, C) and ``mesh`` (N, K, 3)
                        to ``gradient`` (N, C) and ``residual_sq`` (N,).
                      Moment-form bundles may add ``refine_rest_*`` arrays (``RestOfMesh``):
                      the rest of the mesh, for the realignment's fit.

The manifest's ``stabilise`` section records whether the rig has a rigid region (measured by the
build), which sets whether ``serve`` and ``solve`` stabilise by default.

Normalisation is baked into both graphs; the manifest records it for inspection only.
The writer lives here too, so that the format is defined in one place.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import zipfile
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.schema import ControlSchema, SchemaError

log = logging.getLogger(__name__)

FORMAT_TAG = "rigcast-bundle"
FORMAT_VERSION = 1
INVERSE_INPUT = "mesh"
INVERSE_OUTPUT = "controls"
FORWARD_INPUT = "controls"
FORWARD_OUTPUT = "vertices"
REFINE_CONTROLS = "controls"
REFINE_MESH = "mesh"
REFINE_GRADIENT = "gradient"
REFINE_RESIDUAL = "residual_sq"
REFINE_PROJECTION = "projection"
REFINE_QUAD = "quad"
PROJECT_POINTS = "points"
PROJECT_NORM = "norm_sq"
PROJECT_MOMENTS = "moments"  # the moment form (runtime/solve/moments.py)
PROJECT_CONSTANTS = "moment_constants"
PROJECT_CENTRE = "moment_centre"
REFINE_WEIGHTS = "basis_weights"  # z = [u; MLP(u)] of the projected refinement
REFINE_TANGENTS = "tangents"  # (N, T, C) directions of the curvature at the current point
REFINE_CURVATURE = "curvature"  # (N, T, T) the Gauss-Newton matrix along them
_MEMBERS = ("manifest.json", "arrays.npz", "inverse.onnx", "forward.onnx")
_OPTIONAL = ("refine.onnx", "refine_project.onnx")


class BundleError(RigcastError):
    """A bundle is missing, corrupt, or inconsistent; the message says which part and why."""

    advice = "rebuild the bundle with `rigcast build`, or give the path of a good one"


@dataclass(frozen=True)
class RefineProjection:
    """What the all-vertex refinement reads: the S vertices it fits (indices (S,) int64) and the
    graph that projects them onto the forward model's linear and residual bases (project_onnx:
    points (N, S, 3) -> their moments (runtime/solve/moments.py), or in earlier bundles the
    projection (N, R), R = C + P, and norm_sq (N,), float64; see runtime/solve/refine.py).
    The projection runs in onnxruntime, whose thread count the caller sets: a small product on
    a BLAS thread pool stalled for milliseconds on a busy 2-core machine."""

    indices: np.ndarray
    project_onnx: bytes = field(repr=False)
    rest: RestOfMesh | None = None


@dataclass(frozen=True)
class RestOfMesh:
    """The vertices the realignment also fits that the refinement does not read (neither in
    ``RefineProjection.indices`` nor stable): indices (W,) int64; basis (R, 3W) and offset (3W,)
    float32, so the forward model there is offset + basis^T z for the refinement graph's
    ``basis_weights`` z."""

    indices: np.ndarray
    basis: np.ndarray = field(repr=False)
    offset: np.ndarray = field(repr=False)


@dataclass(frozen=True)
class Bundle:
    """A loaded, validated bundle. Arrays are read-only."""

    path: Path | None
    manifest: Mapping[str, Any]
    schema: ControlSchema
    neutral: np.ndarray  # (V, 3) float32
    faces: np.ndarray  # (F, 3) int32
    stable_indices: np.ndarray  # (S,) int64
    input_indices: np.ndarray  # (K,) int64
    inverse_onnx: bytes = field(repr=False)
    forward_onnx: bytes = field(repr=False)
    refine_onnx: bytes | None = field(default=None, repr=False)
    refine_hessian: np.ndarray | None = field(default=None, repr=False)  # (C, C) float64
    refine_projection: RefineProjection | None = field(default=None, repr=False)

    @property
    def rigid_region(self) -> bool:
        """Whether the build found a rigid region to stabilise on (True for older bundles)."""
        section = self.manifest.get("stabilise")
        return bool(section.get("rigid_region", True)) if isinstance(section, dict) else True

    @property
    def name(self) -> str:
        return str(self.manifest.get("name", ""))

    @property
    def vertex_count(self) -> int:
        return int(self.neutral.shape[0])

    @property
    def control_count(self) -> int:
        return len(self.schema)

    @property
    def fingerprint(self) -> str:
        """One hex digest over the rig and dataset fingerprints and the two graphs."""
        fp = self.manifest.get("fingerprint", {})
        h = hashlib.sha256()
        h.update(json.dumps(fp, sort_keys=True).encode())
        h.update(hashlib.sha256(self.inverse_onnx).digest())
        h.update(hashlib.sha256(self.forward_onnx).digest())
        return h.hexdigest()[:16]


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def write_bundle(
    path: str | Path,
    *,
    name: str,
    schema: ControlSchema,
    neutral: np.ndarray,
    faces: np.ndarray,
    stable_indices: np.ndarray,
    input_indices: np.ndarray,
    inverse_onnx: bytes,
    forward_onnx: bytes,
    extra: Mapping[str, Any] | None = None,
    refine_onnx: bytes | None = None,
    refine_hessian: np.ndarray | None = None,
    refine_projection: RefineProjection | None = None,
) -> Path:
    """Write a bundle atomically (temp file + rename) and return its path.

    ``extra`` is merged into the manifest (training figures, fingerprints, versions, ...); it may
    not override the keys this function owns.
    """
    path = Path(path)
    neutral = np.ascontiguousarray(neutral, dtype=np.float32)
    faces = np.ascontiguousarray(faces, dtype=np.int32).reshape(-1, 3)
    stable = np.ascontiguousarray(stable_indices, dtype=np.int64)
    inputs = np.ascontiguousarray(input_indices, dtype=np.int64)
    if (refine_onnx is None) != (refine_hessian is None):
        raise BundleError("refine_onnx and refine_hessian go together")
    stored: dict[str, Any] = {"neutral": neutral, "faces": faces, "stable_indices": stable,
                              "input_indices": inputs}
    if refine_hessian is not None:
        stored["refine_hessian"] = np.ascontiguousarray(refine_hessian, np.float64)
    if refine_projection is not None:
        if refine_onnx is None:
            raise BundleError("refine_projection needs refine_onnx")
        stored["refine_indices"] = np.ascontiguousarray(refine_projection.indices, np.int64)
        rest = refine_projection.rest
        if rest is not None:
            stored["refine_rest_indices"] = np.ascontiguousarray(rest.indices, np.int64)
            stored["refine_rest_basis"] = np.ascontiguousarray(rest.basis, np.float32)
            stored["refine_rest_offset"] = np.ascontiguousarray(rest.offset, np.float32)
    buf = io.BytesIO()
    np.savez(buf, **stored)
    arrays = buf.getvalue()
    manifest: dict[str, Any] = dict(extra or {})
    owned = {
        "format": FORMAT_TAG,
        "format_version": FORMAT_VERSION,
        "name": name,
        "schema": schema.to_dict(),
        "vertex_count": int(neutral.shape[0]),
        "face_count": int(faces.shape[0]),
        "control_count": len(schema),
        "stable_count": int(stable.shape[0]),
        "input_count": int(inputs.shape[0]),
        "members": {
            "arrays.npz": _sha(arrays),
            "inverse.onnx": _sha(inverse_onnx),
            "forward.onnx": _sha(forward_onnx),
            **({"refine.onnx": _sha(refine_onnx)} if refine_onnx is not None else {}),
            **({"refine_project.onnx": _sha(refine_projection.project_onnx)}
               if refine_projection is not None else {}),
        },
    }
    clash = set(manifest) & set(owned)
    if clash:
        raise BundleError(f"manifest extras may not set {sorted(clash)}")
    manifest.update(owned)
    # Validate before writing, so a bad bundle never reaches disk.
    _check_arrays(manifest, neutral, faces, stable, inputs)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".partial")
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_STORED) as zf:
        zf.writestr("manifest.json", json.dumps(manifest, indent=2, sort_keys=True))
        zf.writestr("arrays.npz", arrays)
        zf.writestr("inverse.onnx", inverse_onnx)
        zf.writestr("forward.onnx", forward_onnx)
        if refine_onnx is not None:
            zf.writestr("refine.onnx", refine_onnx)
        if refine_projection is not None:
            zf.writestr("refine_project.onnx", refine_projection.project_onnx)
    tmp.replace(path)
    log.info("wrote bundle %s (%d vertices, %d controls)", path, neutral.shape[0], len(schema))
    return path


def load_bundle(path: str | Path) -> Bundle:
    """Read and validate a bundle. Raises BundleError naming the file and what is wrong."""
    path = Path(path)
    if not path.exists():
        raise BundleError(f"bundle {path} does not exist")
    if not path.is_file():
        raise BundleError(f"bundle {path} is not a file")
    try:
        with zipfile.ZipFile(path) as zf:
            names = set(zf.namelist())
            missing = [m for m in _MEMBERS if m not in names]
            if missing:
                raise BundleError(f"bundle {path} is missing {', '.join(missing)}")
            blobs = {m: zf.read(m) for m in (*_MEMBERS, *_OPTIONAL) if m in names}
    except zipfile.BadZipFile as exc:
        raise BundleError(f"bundle {path} is not a rigcast bundle (not a ZIP archive: {exc})") from None
    except (OSError, EOFError, zipfile.LargeZipFile) as exc:
        raise BundleError(f"bundle {path} could not be read: {exc}") from None
    except RuntimeError as exc:  # zipfile raises this for encrypted members
        raise BundleError(f"bundle {path} could not be read: {exc}") from None
    except zlib.error as exc:
        raise BundleError(f"bundle {path} is corrupt: {exc}") from None
    return parse_bundle(blobs, path)


def parse_bundle(blobs: Mapping[str, bytes], path: Path | None = None) -> Bundle:
    where = f"bundle {path}" if path else "bundle"
    try:
        manifest = json.loads(blobs["manifest.json"].decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"{where}: manifest.json is not valid JSON ({exc})") from None
    if not isinstance(manifest, dict):
        raise BundleError(f"{where}: manifest.json must be an object")
    if manifest.get("format") != FORMAT_TAG:
        raise BundleError(f"{where}: not a rigcast bundle (format tag {manifest.get('format')!r})")
    version = manifest.get("format_version")
    if version != FORMAT_VERSION:
        raise BundleError(
            f"{where}: format version {version!r} is not supported (this rigcast reads "
            f"{FORMAT_VERSION}); rebuild the bundle with this version"
        )
    members = manifest.get("members")
    if not isinstance(members, dict):
        raise BundleError(f"{where}: manifest has no member checksums")
    for member in ("arrays.npz", "inverse.onnx", "forward.onnx", *_OPTIONAL):
        if member not in blobs and member not in members:
            continue
        if member not in blobs:
            raise BundleError(f"{where}: {member} is listed in the manifest but missing")
        if members.get(member) != _sha(blobs[member]):
            raise BundleError(f"{where}: {member} is corrupt (checksum mismatch)")
    try:
        schema = ControlSchema.from_dict(manifest.get("schema", {}))
    except SchemaError as exc:
        raise BundleError(f"{where}: bad control schema: {exc}") from None
    try:
        with np.load(io.BytesIO(blobs["arrays.npz"]), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in ("neutral", "faces", "stable_indices", "input_indices")}
            hessian = npz["refine_hessian"] if "refine_hessian" in npz.files else None
            refine_idx = npz["refine_indices"] if "refine_indices" in npz.files else None
            rest_parts = [npz[k] if k in npz.files else None for k in _REST_KEYS]
    except (KeyError, ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise BundleError(f"{where}: arrays.npz is unreadable ({exc})") from None
    for name, kinds in (("neutral", "fiu"), ("faces", "iu"), ("stable_indices", "iu"),
                        ("input_indices", "iu")):
        if arrays[name].dtype.kind not in kinds:
            wanted = "numbers" if name == "neutral" else "integers"
            raise BundleError(f"{where}: {name} must hold {wanted}, has dtype {arrays[name].dtype}")
    if arrays["faces"].size and int(arrays["faces"].max()) > np.iinfo(np.int32).max:
        raise BundleError(f"{where}: faces index beyond int32")
    for key in ("fingerprint", "versions"):
        if key in manifest and not isinstance(manifest[key], dict):
            raise BundleError(f"{where}: manifest {key!r} must be an object")
    neutral = arrays["neutral"].astype(np.float32, copy=False)
    faces = arrays["faces"].astype(np.int32, copy=False)
    stable = arrays["stable_indices"].astype(np.int64, copy=False)
    inputs = arrays["input_indices"].astype(np.int64, copy=False)
    if manifest.get("control_count") != len(schema):
        raise BundleError(
            f"{where}: manifest says {manifest.get('control_count')} controls, schema has {len(schema)}"
        )
    _check_arrays(manifest, neutral, faces, stable, inputs, where)
    refine = blobs.get("refine.onnx")
    if (refine is None) != (hessian is None):
        raise BundleError(f"{where}: refine.onnx and refine_hessian must come together")
    if hessian is not None:
        c = len(schema)
        if hessian.shape != (c, c) or hessian.dtype.kind != "f" or not np.isfinite(hessian).all():
            raise BundleError(f"{where}: refine_hessian must be finite ({c}, {c}) floats, got "
                              f"{hessian.shape} {hessian.dtype}")
        hessian = hessian.astype(np.float64, copy=False)
        hessian.setflags(write=False)
    projection = _refine_projection(refine_idx, blobs.get("refine_project.onnx"), hessian,
                                    neutral.shape[0], where)
    if any(a is not None for a in rest_parts):
        if projection is None:
            raise BundleError(f"{where}: refine_rest_* arrays need the projected refinement")
        projection = RefineProjection(projection.indices, projection.project_onnx,
                                      _rest_of_mesh(rest_parts, neutral.shape[0], where))
    for a in (neutral, faces, stable, inputs):
        a.setflags(write=False)
    return Bundle(
        path=path,
        manifest=manifest,
        schema=schema,
        neutral=neutral,
        faces=faces,
        stable_indices=stable,
        input_indices=inputs,
        inverse_onnx=blobs["inverse.onnx"],
        forward_onnx=blobs["forward.onnx"],
        refine_onnx=refine,
        refine_hessian=hessian,
        refine_projection=projection,
    )


def _refine_projection(idx: np.ndarray | None, graph: bytes | None, hessian: np.ndarray | None,
                       vertex_count: int, where: str) -> RefineProjection | None:
    """The projected refinement's parts, checked; None when absent."""
    if idx is None and graph is None:
        return None
    if idx is None or graph is None or hessian is None:
        raise BundleError(f"{where}: refine_indices and refine_project.onnx come together, with "
                          "refine.onnx")
    if idx.ndim != 1 or idx.dtype.kind not in "iu" or not idx.size:
        raise BundleError(f"{where}: refine_indices must be a non-empty list of integers")
    if int(idx.min()) < 0 or int(idx.max()) >= vertex_count:
        raise BundleError(f"{where}: refine_indices out of range 0..{vertex_count - 1}")
    out = RefineProjection(idx.astype(np.int64, copy=False), graph)
    out.indices.setflags(write=False)
    return out


_REST_KEYS = ("refine_rest_indices", "refine_rest_basis", "refine_rest_offset")


def _rest_of_mesh(parts: list[np.ndarray | None], vertex_count: int, where: str) -> RestOfMesh:
    """The realignment's rest-of-mesh arrays, checked."""
    idx, basis, offset = parts
    if idx is None or basis is None or offset is None:
        raise BundleError(f"{where}: {', '.join(_REST_KEYS)} come together")
    if idx.ndim != 1 or idx.dtype.kind not in "iu" or not idx.size:
        raise BundleError(f"{where}: refine_rest_indices must be a non-empty list of integers")
    if int(idx.min()) < 0 or int(idx.max()) >= vertex_count:
        raise BundleError(f"{where}: refine_rest_indices out of range 0..{vertex_count - 1}")
    w = 3 * idx.shape[0]
    if (basis.ndim != 2 or basis.shape[1] != w or basis.dtype.kind != "f"
            or offset.shape != (w,) or offset.dtype.kind != "f"
            or not (np.isfinite(basis).all() and np.isfinite(offset).all())):
        raise BundleError(f"{where}: refine_rest_basis must be finite (R, {w}) and "
                          f"refine_rest_offset ({w},) floats, got {basis.shape} and "
                          f"{offset.shape}")
    out = RestOfMesh(idx.astype(np.int64, copy=False), basis.astype(np.float32, copy=False),
                     offset.astype(np.float32, copy=False))
    for a in (out.indices, out.basis, out.offset):
        a.setflags(write=False)
    return out


def _check_arrays(
    manifest: Mapping[str, Any],
    neutral: np.ndarray,
    faces: np.ndarray,
    stable: np.ndarray,
    inputs: np.ndarray,
    where: str = "bundle",
) -> None:
    if neutral.ndim != 2 or neutral.shape[1] != 3 or neutral.shape[0] < 3:
        raise BundleError(f"{where}: neutral mesh must be (V, 3) with V >= 3, got {neutral.shape}")
    n_vertices = neutral.shape[0]
    if manifest.get("vertex_count") != n_vertices:
        raise BundleError(
            f"{where}: manifest says {manifest.get('vertex_count')} vertices, neutral has {n_vertices}"
        )
    if not np.all(np.isfinite(neutral)):
        raise BundleError(f"{where}: neutral mesh has NaN or Inf")
    if faces.ndim != 2 or faces.shape[1] != 3:
        raise BundleError(f"{where}: faces must be (F, 3) triangles, got {faces.shape}")
    if faces.size and (faces.min() < 0 or faces.max() >= n_vertices):
        raise BundleError(f"{where}: faces index outside 0..{n_vertices - 1}")
    for key, count in (("face_count", faces.shape[0]), ("stable_count", stable.shape[0]),
                       ("input_count", inputs.shape[0])):
        if key in manifest and manifest[key] != count:
            raise BundleError(f"{where}: manifest says {key} {manifest[key]!r}, arrays have {count}")
    for label, idx, minimum in (("stable_indices", stable, 3), ("input_indices", inputs, 1)):
        if idx.ndim != 1 or idx.shape[0] < minimum:
            raise BundleError(f"{where}: {label} must be 1-D with at least {minimum} entries")
        if idx.min() < 0 or idx.max() >= n_vertices:
            raise BundleError(f"{where}: {label} index outside 0..{n_vertices - 1}")
        if np.unique(idx).shape[0] != idx.shape[0]:
            raise BundleError(f"{where}: {label} has repeated entries")
    _check_stable_spread(neutral[stable], where)


def _check_stable_spread(points: np.ndarray, where: str) -> None:
    """points (S, 3): the stable vertices must span a plane at least, or every frame's rigid
    alignment is undefined (coincident or collinear points leave a rotation free)."""
    centred = points.astype(np.float64) - points.mean(axis=0)
    sv = np.linalg.svd(centred, compute_uv=False)
    if sv[0] == 0.0 or sv[1] < 1e-6 * sv[0]:
        raise BundleError(f"{where}: stable vertices are coincident or collinear; head "
                          "stabilisation needs them spread over a surface")
