"""A dataset someone else sampled, as a rig: an ``.npz`` with ``controls`` (N, C) and
``vertices`` (N, V, 3), optional ``faces`` (F, 3), optional ``neutral`` (V, 3), and a schema
(a JSON string ``schema`` inside the npz, or a side file; the side file wins).

It cannot evaluate new poses. ``samples()`` gives the arrays, and the sampling stage
(``export/data/dataset.py``) uses the ``controls`` and ``vertices`` attributes as they are.
``evaluate`` only looks up rows that are in the file, exactly, and raises RigError otherwise.
Neutral: the row whose controls equal the schema defaults; else the ``neutral`` array in the
file or given; else the mean of all rows.
"""

from __future__ import annotations

import json
import logging
import zipfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.rigs.callable_rig import parse_schema, read_schema_file
from rigcast.export.rigs.rig import Rig, RigError

log = logging.getLogger(__name__)


class DatasetRig(Rig):
    """Rows of a pre-sampled dataset; see the module docstring."""

    def __init__(self, path: str | Path, *, schema: str | Path | Mapping[str, Any] | None = None,
                 neutral: np.ndarray | None = None) -> None:
        self.path = Path(path)
        self.name = f"npz:{self.path.name}"
        where = f"dataset rig {self.path}"
        if not self.path.is_file():
            raise RigError(f"dataset file {self.path} does not exist")
        try:
            with np.load(self.path, allow_pickle=False) as data:
                arrays = {k: data[k] for k in data.files}
        except (OSError, ValueError, zipfile.BadZipFile) as e:
            raise RigError(f"{where} could not be read as .npz: {e}") from None
        for key in ("controls", "vertices"):
            if key not in arrays:
                raise RigError(f"{where} has no {key!r} array (it has {sorted(arrays)})")
        if schema is not None:
            schema_data = read_schema_file(schema, where)
        elif "schema" in arrays:
            try:
                schema_data = json.loads(str(arrays["schema"][()]))
            except json.JSONDecodeError as e:
                raise RigError(f"{where}: its 'schema' string is not valid JSON: {e}") from None
        else:
            raise RigError(f"{where} holds no 'schema'; give a schema file")
        self.schema, faces = parse_schema(schema_data, where)
        controls = np.asarray(arrays["controls"], dtype=np.float64)
        vertices = np.asarray(arrays["vertices"], dtype=np.float32)
        if controls.ndim != 2 or controls.shape[1] != len(self.schema):
            raise RigError(f"{where}: controls have shape {controls.shape}, the schema has "
                           f"{len(self.schema)} controls")
        if vertices.ndim != 3 or vertices.shape[2] != 3 or len(vertices) != len(controls):
            raise RigError(f"{where}: vertices have shape {vertices.shape}, expected "
                           f"({len(controls)}, V, 3)")
        if not (np.all(np.isfinite(controls)) and np.all(np.isfinite(vertices))):
            raise RigError(f"{where} holds NaN or Inf values")
        self.controls, self.vertices = controls, vertices
        self.faces = np.asarray(arrays.get("faces", faces), dtype=np.int32).reshape(-1, 3)
        self._rows = {row.tobytes(): i for i, row in enumerate(controls)}
        at_rest = self._rows.get(self.schema.defaults.astype(np.float64).tobytes())
        if at_rest is not None:
            self.neutral = vertices[at_rest].copy()
        elif neutral is not None or "neutral" in arrays:
            given = np.asarray(neutral if neutral is not None else arrays["neutral"], np.float32)
            if given.shape != vertices.shape[1:]:
                raise RigError(f"{where}: neutral has shape {given.shape}, expected "
                               f"{vertices.shape[1:]}")
            self.neutral = given
        else:
            self.neutral = vertices.mean(axis=0)
            log.info("%s: no row at the defaults; neutral is the mean of %d rows", where,
                     len(vertices))

    def samples(self) -> tuple[np.ndarray, np.ndarray]:
        """(controls (N, C) float64, vertices (N, V, 3) float32) as stored."""
        return self.controls, self.vertices

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        idx = []
        for row in controls:
            i = self._rows.get(row.tobytes())
            if i is None:
                raise RigError(f"dataset rig {self.path} holds no sample at controls "
                               f"{np.array2string(row, precision=4, max_line_width=200)}; a "
                               "dataset rig can only return its stored rows")
            idx.append(i)
        return self.vertices[idx]


def write_dataset_npz(path: str | Path, controls: np.ndarray, vertices: np.ndarray,
                      schema: Mapping[str, Any], faces: np.ndarray | None = None) -> Path:
    """Write the .npz layout ``DatasetRig`` reads (schema as a JSON string)."""
    path = Path(path)
    arrays: dict[str, Any] = {
        "controls": np.asarray(controls, np.float64),
        "vertices": np.asarray(vertices, np.float32),
        "schema": np.array(json.dumps(dict(schema))),
    }
    if faces is not None:
        arrays["faces"] = np.asarray(faces, np.int32)
    np.savez(path, **arrays)
    return path
