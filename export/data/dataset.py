"""The sampled dataset: poses and the rig's meshes, written in resumable chunks.

On disk a dataset is a folder::

    manifest.json        format tag and version, rig name and fingerprint, dataset fingerprint,
                         schema, sampling config, source ("sampled" or "arrays"), and one entry
                         per written chunk: index, file, rows, SHA-256 of the file
    neutral.npy          (V, 3) float32
    chunk_00000.npz      controls (rows, C) float32, vertices (rows, V, 3) float32
    ...

Every file is written to a temporary name and renamed into place, so a killed run leaves whole
files only. Chunk ``i``'s controls depend only on (config, i), so a rerun with the same rig and
config verifies the chunks already on disk (checksum, shapes, and controls equal to the ones it
would draw) and evaluates only the rest. A folder that holds another rig's or another config's
dataset is never touched: :class:`DatasetError` says what differs, and the caller picks another
folder or deletes this one.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import os
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Executor, Future, wait
from concurrent.futures.process import BrokenProcessPool
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.data.executor import (
    ExecutorError,
    SerialExecutor,
    evaluate_batch,
    make_executor,
)
from rigcast.export.data.sampling import SamplingConfig, sample_chunk
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.schema import ControlSchema, SchemaError

log = logging.getLogger(__name__)

FORMAT_TAG = "rigcast-dataset"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
NEUTRAL = "neutral.npy"
DEFAULT_IN_FLIGHT = 8

Progress = Callable[[int, int], None]


class DatasetError(RigcastError):
    """A dataset folder or array set is missing, corrupt, or belongs to another rig or config."""

    advice = "give the dataset of this rig, or sample the rig again with `rigcast build`"


@dataclass(frozen=True)
class Dataset:
    """Sampled poses and meshes. Arrays are read-only.

    controls: (N, C) float32; vertices: (N, V, 3) float32; neutral: (V, 3) float32.
    ``fingerprint`` is a digest over the rig fingerprint and the sampling config (or over the
    arrays themselves, for a dataset someone else sampled).
    """

    controls: np.ndarray
    vertices: np.ndarray
    neutral: np.ndarray
    schema: ControlSchema
    fingerprint: str
    path: Path | None = None

    def __len__(self) -> int:
        return int(self.controls.shape[0])

    @property
    def offsets(self) -> np.ndarray:
        """(N, V, 3) float32 vertices minus the neutral."""
        return self.vertices - self.neutral[None]


def dataset_fingerprint(rig_fingerprint: str, config: SamplingConfig) -> str:
    """16 hex digits over the rig fingerprint and the canonical JSON of the config."""
    h = hashlib.sha256(f"{FORMAT_TAG}/{FORMAT_VERSION}/{rig_fingerprint}/".encode())
    h.update(json.dumps(config.to_dict(), sort_keys=True).encode())
    return h.hexdigest()[:16]


def _array_fingerprint(schema: ControlSchema, neutral: np.ndarray, controls: np.ndarray,
                       vertices: np.ndarray) -> str:
    h = hashlib.sha256(f"{FORMAT_TAG}/arrays/".encode())
    h.update(json.dumps(schema.to_dict(), sort_keys=True).encode())
    for a in (neutral, controls, vertices):
        h.update(str(a.shape).encode())
        h.update(np.ascontiguousarray(a, dtype=np.float32).tobytes())
    return h.hexdigest()[:16]


def _readonly(a: np.ndarray) -> np.ndarray:
    a.flags.writeable = False
    return a


def dataset_from_arrays(controls: np.ndarray, vertices: np.ndarray, *, schema: ControlSchema,
                        neutral: np.ndarray, path: Path | None = None) -> Dataset:
    """Validate arrays sampled elsewhere and wrap them as a :class:`Dataset`.

    controls: (N, C) within the schema's bounds; vertices: (N, V, 3); neutral: (V, 3); all finite.
    """
    c = np.array(controls, dtype=np.float32)
    v = np.array(vertices, dtype=np.float32)
    n0 = np.array(neutral, dtype=np.float32)
    if c.ndim != 2 or c.shape[1] != len(schema) or c.shape[0] == 0:
        raise DatasetError(f"controls must have shape (N>0, {len(schema)}), got {c.shape}")
    if n0.ndim != 2 or n0.shape[1] != 3:
        raise DatasetError(f"neutral must have shape (V, 3), got {n0.shape}")
    if v.shape != (c.shape[0], n0.shape[0], 3):
        raise DatasetError(
            f"vertices must have shape {(c.shape[0], n0.shape[0], 3)}, got {v.shape}"
        )
    for name, a in (("controls", c), ("vertices", v), ("neutral", n0)):
        if not np.all(np.isfinite(a)):
            raise DatasetError(f"{name} contain NaN or Inf")
    outside = (c < schema.lower) | (c > schema.upper)
    if outside.any():
        row, col = (int(x[0]) for x in np.nonzero(outside))
        ctl = schema.controls[col]
        raise DatasetError(
            f"control {ctl.name!r} is {c[row, col]} in sample {row}, outside "
            f"[{ctl.minimum}, {ctl.maximum}]"
        )
    return Dataset(
        controls=_readonly(c),
        vertices=_readonly(v),
        neutral=_readonly(n0),
        schema=schema,
        fingerprint=_array_fingerprint(schema, n0, c, v),
        path=path,
    )


# --- files ---------------------------------------------------------------------------------


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def _chunk_name(index: int) -> str:
    return f"chunk_{index:05d}.npz"


def _write_chunk(out_dir: Path, index: int, controls: np.ndarray,
                 vertices: np.ndarray) -> dict[str, Any]:
    buf = io.BytesIO()
    np.savez(buf, controls=controls.astype(np.float32), vertices=vertices.astype(np.float32))
    data = buf.getvalue()
    _write_atomic(out_dir / _chunk_name(index), data)
    return {
        "index": index,
        "file": _chunk_name(index),
        "rows": int(controls.shape[0]),
        "sha256": hashlib.sha256(data).hexdigest(),
    }


def _read_chunk(path: Path, rows: int, c: int, v: int,
                sha256: str | None) -> tuple[np.ndarray, np.ndarray, str]:
    """Load and check one chunk file; raises DatasetError naming the file and the problem."""
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise DatasetError(f"cannot read chunk {path}: {exc}") from None
    digest = hashlib.sha256(data).hexdigest()
    if sha256 is not None and digest != sha256:
        raise DatasetError(f"chunk {path} has SHA-256 {digest[:12]}…, manifest says {sha256[:12]}…")
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as z:
            controls, vertices = z["controls"], z["vertices"]
    except (OSError, ValueError, KeyError) as exc:
        raise DatasetError(f"chunk {path} is not a valid chunk file: {exc}") from None
    for name, a, shape in (("controls", controls, (rows, c)), ("vertices", vertices, (rows, v, 3))):
        if a.dtype != np.float32 or a.shape != shape:
            raise DatasetError(
                f"chunk {path}: {name} is {a.dtype}{a.shape}, expected float32{shape}"
            )
    for name, a in (("controls", controls), ("vertices", vertices)):
        if not np.all(np.isfinite(a)):
            raise DatasetError(f"chunk {path}: {name} contain NaN or Inf")
    return controls, vertices, digest


def _read_manifest(out_dir: Path) -> dict[str, Any]:
    path = out_dir / MANIFEST
    try:
        manifest = json.loads(path.read_text())
    except FileNotFoundError:
        raise DatasetError(f"no dataset at {out_dir}: {MANIFEST} is missing") from None
    except (OSError, ValueError) as exc:
        raise DatasetError(f"cannot read {path}: {exc}") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_TAG:
        raise DatasetError(f"{path} is not a {FORMAT_TAG} manifest")
    if manifest.get("version") != FORMAT_VERSION:
        raise DatasetError(
            f"{path} has format version {manifest.get('version')!r}, expected {FORMAT_VERSION}"
        )
    return manifest


def _write_manifest(out_dir: Path, manifest: dict[str, Any]) -> None:
    manifest["chunks"] = sorted(manifest["chunks"], key=lambda e: e["index"])
    _write_atomic(out_dir / MANIFEST, json.dumps(manifest, indent=1).encode())


def _check_same_run(out_dir: Path, old: dict[str, Any], new: dict[str, Any]) -> None:
    if old.get("rig_fingerprint") != new["rig_fingerprint"]:
        raise DatasetError(
            f"{out_dir} holds a dataset of rig {old.get('rig_name')!r} with fingerprint "
            f"{old.get('rig_fingerprint')!r}, not {new['rig_fingerprint']!r}; "
            "use another folder or delete this one"
        )
    old_cfg, new_cfg = dict(old.get("config", {})), new["config"]
    if old_cfg != new_cfg:
        fields = sorted(k for k in set(old_cfg) | set(new_cfg) if old_cfg.get(k) != new_cfg.get(k))
        diff = ", ".join(f"{k}: {old_cfg.get(k)!r} -> {new_cfg.get(k)!r}" for k in fields)
        raise DatasetError(
            f"{out_dir} holds a dataset sampled with another config ({diff}); "
            "use another folder or delete this one"
        )


# --- sampling ------------------------------------------------------------------------------


def _array_source(rig: Rig) -> tuple[np.ndarray, np.ndarray] | None:
    """The (controls, vertices) of a rig that *is* a dataset (export/rigs/dataset_rig.py), or None."""
    controls, vertices = getattr(rig, "controls", None), getattr(rig, "vertices", None)
    if isinstance(controls, np.ndarray) and isinstance(vertices, np.ndarray):
        return controls, vertices
    return None


def sample_dataset(rig: Rig, out_dir: Path, config: SamplingConfig | None = None, *,
                   executor: Executor | None = None, progress: Progress | None = None,
                   in_flight: int | None = None) -> Dataset:
    """Sample ``rig`` into ``out_dir`` chunk by chunk, resuming a previous run, and load it.

    ``executor`` evaluates chunks (default: ``make_executor()``, local processes, created only
    when chunks remain). At most ``in_flight`` chunks are pending at once (default 1 for a
    :class:`SerialExecutor`, else 8), so an interrupted run loses at most that many evaluations.
    ``progress(done, total)`` is called with sample counts once after the chunks on disk are
    verified and after each chunk is written; an exception it raises stops the run cleanly.
    A rig with ``controls`` and ``vertices`` arrays (a dataset someone else sampled) is written
    as is, without evaluation; ``config`` then only sets the chunk size.
    """
    config = config or SamplingConfig()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    arrays = _array_source(rig)
    if arrays is not None:
        given = dataset_from_arrays(arrays[0], arrays[1], schema=rig.schema, neutral=rig.neutral)
        config = SamplingConfig(count=len(given), chunk_size=config.chunk_size)
        rig_fp = fingerprint = given.fingerprint
        source = "arrays"
    else:
        rig_fp = rig.fingerprint()
        fingerprint = dataset_fingerprint(rig_fp, config)
        source = "sampled"
    c, v = rig.control_count, rig.vertex_count
    manifest: dict[str, Any] = {
        "format": FORMAT_TAG,
        "version": FORMAT_VERSION,
        "source": source,
        "rig_name": rig.name,
        "rig_fingerprint": rig_fp,
        "fingerprint": fingerprint,
        "schema": rig.schema.to_dict(),
        "config": config.to_dict(),
        "control_count": c,
        "vertex_count": v,
        "complete": False,
        "chunks": [],
    }
    if (out_dir / MANIFEST).exists():
        old = _read_manifest(out_dir)
        _check_same_run(out_dir, old, manifest)
        try:
            listed = {int(e["index"]): e for e in old.get("chunks", [])}
        except (KeyError, TypeError, ValueError) as exc:
            raise DatasetError(f"{out_dir / MANIFEST} has a malformed chunk entry ({exc!r}); "
                               "delete the folder to resample") from None
    else:
        listed = {}
    for stray in out_dir.glob("*.tmp-*"):
        stray.unlink()
    _write_atomic(out_dir / NEUTRAL, _npy_bytes(np.asarray(rig.neutral, dtype=np.float32)))

    def expected(i: int) -> np.ndarray:
        if arrays is not None:
            lo = i * config.chunk_size
            return given.controls[lo : lo + config.chunk_rows(i)]
        return sample_chunk(rig.schema, config, i)

    total, done_rows, todo = config.count, 0, []
    for i in range(config.chunk_count):
        path = out_dir / _chunk_name(i)
        if not path.exists():
            todo.append(i)
            continue
        entry = listed.get(i, {})
        try:
            controls, _, digest = _read_chunk(path, config.chunk_rows(i), c, v, entry.get("sha256"))
            if not np.array_equal(controls, expected(i)):
                raise DatasetError(f"chunk {path} holds other controls than this config draws")
        except DatasetError as exc:
            log.warning("redoing chunk %d: %s", i, exc)
            path.unlink()
            todo.append(i)
            continue
        manifest["chunks"].append(
            {"index": i, "file": path.name, "rows": config.chunk_rows(i), "sha256": digest}
        )
        done_rows += config.chunk_rows(i)
    _write_manifest(out_dir, manifest)
    if done_rows:
        log.info("resuming %s: %d of %d samples already on disk", out_dir, done_rows, total)
    if progress is not None:
        progress(done_rows, total)

    def finish(i: int, controls: np.ndarray, vertices: np.ndarray) -> None:
        nonlocal done_rows
        if vertices.shape != (controls.shape[0], v, 3):
            raise DatasetError(f"chunk {i}: rig returned shape {vertices.shape}")
        manifest["chunks"].append(_write_chunk(out_dir, i, controls, vertices))
        _write_manifest(out_dir, manifest)
        done_rows += controls.shape[0]
        log.info("chunk %d/%d written: %d of %d samples", i + 1, config.chunk_count,
                 done_rows, total)
        if progress is not None:
            progress(done_rows, total)

    if arrays is not None:
        for i in todo:
            lo = i * config.chunk_size
            finish(i, expected(i), given.vertices[lo : lo + config.chunk_rows(i)])
    elif todo:
        with ExitStack() as stack:
            if executor is None:
                executor = stack.enter_context(make_executor())
            if in_flight is None:
                in_flight = 1 if isinstance(executor, SerialExecutor) else DEFAULT_IN_FLIGHT
            _run_chunks(rig, executor, todo, expected, finish, max(1, in_flight))
    manifest["complete"] = True
    _write_manifest(out_dir, manifest)
    return load_dataset(out_dir)


def _run_chunks(rig: Rig, executor: Executor, todo: list[int],
                expected: Callable[[int], np.ndarray],
                finish: Callable[[int, np.ndarray, np.ndarray], None], in_flight: int) -> None:
    """Keep up to ``in_flight`` chunks evaluating; write each as it completes."""
    pending: dict[Future[np.ndarray], tuple[int, np.ndarray]] = {}
    queue = iter(todo)
    try:
        while True:
            while len(pending) < in_flight and (i := next(queue, None)) is not None:
                controls = expected(i)
                pending[executor.submit(evaluate_batch, rig, controls)] = (i, controls)
            if not pending:
                return
            ready, _ = wait(pending, return_when=FIRST_COMPLETED)
            for future in sorted(ready, key=lambda f: pending[f][0]):
                i, controls = pending.pop(future)
                finish(i, controls, np.asarray(future.result(), dtype=np.float32))
    except BrokenProcessPool as exc:
        # Under 'spawn' a script that samples at import time (no ``if __name__ == "__main__"``
        # guard) kills its workers this way; so does running out of memory.
        raise ExecutorError(
            f"a worker process died while evaluating rig {rig.name!r} ({exc}); scripts that "
            "sample with local processes need an `if __name__ == \"__main__\":` guard"
        ) from None
    finally:
        for future in pending:
            future.cancel()


def _npy_bytes(a: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, a)
    return buf.getvalue()


def load_dataset(out_dir: Path) -> Dataset:
    """Load a complete dataset folder, checking every chunk against the manifest."""
    out_dir = Path(out_dir)
    manifest = _read_manifest(out_dir)
    try:
        schema = ControlSchema.from_dict(manifest["schema"])
        config = SamplingConfig.from_dict(manifest["config"])
        c, v = int(manifest["control_count"]), int(manifest["vertex_count"])
        chunks = {int(e["index"]): e for e in manifest["chunks"]}
    except (KeyError, TypeError, ValueError, SchemaError) as exc:
        raise DatasetError(f"{out_dir / MANIFEST} is malformed: {exc}") from None
    missing = [i for i in range(config.chunk_count) if i not in chunks]
    if missing or not manifest.get("complete"):
        raise DatasetError(
            f"dataset at {out_dir} is incomplete: {len(missing)} of {config.chunk_count} chunks "
            "missing; rerun sampling with the same rig and config to resume"
        )
    parts = [
        _read_chunk(out_dir / chunks[i]["file"], config.chunk_rows(i), c, v, chunks[i]["sha256"])
        for i in range(config.chunk_count)
    ]
    try:
        neutral = np.load(out_dir / NEUTRAL, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise DatasetError(f"cannot read {out_dir / NEUTRAL}: {exc}") from None
    if neutral.shape != (v, 3):
        raise DatasetError(f"{out_dir / NEUTRAL} has shape {neutral.shape}, expected {(v, 3)}")
    return Dataset(
        controls=_readonly(np.concatenate([p[0] for p in parts])),
        vertices=_readonly(np.concatenate([p[1] for p in parts])),
        neutral=_readonly(neutral.astype(np.float32)),
        schema=schema,
        fingerprint=str(manifest["fingerprint"]),
        path=out_dir,
    )

