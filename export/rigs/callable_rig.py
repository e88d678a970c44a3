"""A Python function as a rig: ``module:function`` plus a schema file.

``module`` is an importable dotted name (``mypkg.face``) or a path to a ``.py`` file
(``examples/rig_callable.py``). The function maps controls ``(B, C)`` float64 to vertices
``(B, V, 3)``. The neutral mesh is the function at the schema's defaults. The schema file is
``{"controls": [...], "faces": [[i, j, k], ...]?}`` (``ControlSchema.from_dict`` plus optional
faces).
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import logging
import sys
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.rigs.rig import Rig, RigError
from rigcast.runtime.schema import ControlSchema, SchemaError

log = logging.getLogger(__name__)


def read_schema_file(source: str | Path | Mapping[str, Any], where: str) -> dict[str, Any]:
    """A schema mapping from a JSON file path or a mapping; errors name ``where``."""
    if isinstance(source, Mapping):
        return dict(source)
    path = Path(source)
    if not path.is_file():
        raise RigError(f"{where}: schema file {path} does not exist")
    try:
        data = json.loads(path.read_text())
    except json.JSONDecodeError as e:
        raise RigError(f"{where}: schema file {path} is not valid JSON: {e}") from None
    if not isinstance(data, dict):
        raise RigError(f"{where}: schema file {path} must hold a JSON object")
    return data


def parse_schema(data: Mapping[str, Any], where: str) -> tuple[ControlSchema, np.ndarray]:
    """(schema, faces (F, 3) int32) from ``{"controls": [...], "faces"?: [...]}``."""
    try:
        schema = ControlSchema.from_dict(data)
    except SchemaError as e:
        raise RigError(f"{where}: bad schema: {e}") from None
    faces = np.asarray(data.get("faces", np.zeros((0, 3))), dtype=np.int64)
    if faces.size == 0:
        faces = faces.reshape(0, 3)
    if faces.ndim != 2 or faces.shape[1] != 3 or (faces.size and faces.min() < 0):
        raise RigError(f"{where}: schema 'faces' must be a list of [i, j, k] non-negative triples")
    return schema, faces.astype(np.int32)


def resolve_function(spec: str) -> Callable[[np.ndarray], Any]:
    """``module:function`` or ``path/to/file.py:function`` to the function object."""
    module_name, sep, func_name = spec.rpartition(":")
    if not sep or not module_name or not func_name:
        raise RigError(f"python rig {spec!r} must be 'module:function' or 'file.py:function'")
    try:
        if module_name.endswith(".py"):
            path = Path(module_name).resolve()
            if not path.is_file():
                raise RigError(f"python rig {spec!r}: file {path} does not exist")
            key = f"rigcast_user_rig_{abs(hash(str(path)))}"
            module = sys.modules.get(key)
            if module is None:
                loader_spec = importlib.util.spec_from_file_location(key, path)
                if loader_spec is None or loader_spec.loader is None:
                    raise RigError(f"python rig {spec!r}: cannot load {path}")
                module = importlib.util.module_from_spec(loader_spec)
                sys.modules[key] = module
                try:
                    loader_spec.loader.exec_module(module)
                except BaseException:
                    del sys.modules[key]
                    raise
        else:
            module = importlib.import_module(module_name)
    except RigError:
        raise
    except Exception as e:  # the user's module may raise anything while importing
        raise RigError(f"python rig {spec!r}: import failed: {type(e).__name__}: {e}") from None
    func = getattr(module, func_name, None)
    if not callable(func):
        raise RigError(f"python rig {spec!r}: {module_name} has no function {func_name!r}")
    return func


class CallableRig(Rig):
    """Wraps ``function(controls (B, C)) -> (B, V, 3)``. Pickles by spec, not by function, so a
    worker process re-imports the module (a file path is stored absolute)."""

    def __init__(self, spec: str, schema: str | Path | Mapping[str, Any]) -> None:
        module_name, _, func_name = spec.rpartition(":")
        if module_name.endswith(".py"):
            spec = f"{Path(module_name).resolve()}:{func_name}"
        self.spec = spec
        self.name = f"py:{Path(module_name).stem if module_name.endswith('.py') else spec}"
        self._schema_data = read_schema_file(schema, f"python rig {spec!r}")
        self.schema, self.faces = parse_schema(self._schema_data, f"python rig {spec!r}")
        self._func: Callable[[np.ndarray], Any] | None = resolve_function(spec)
        rest = self._call(self.schema.defaults[None].astype(np.float64))
        if rest.ndim != 3 or rest.shape[0] != 1 or rest.shape[2] != 3:
            raise RigError(f"python rig {spec!r} returned shape {rest.shape} for one pose; "
                           "expected (1, V, 3)")
        self.neutral = rest[0].astype(np.float32)
        if self.faces.size and self.faces.max() >= self.vertex_count:
            raise RigError(f"python rig {spec!r}: schema faces index vertex "
                           f"{int(self.faces.max())}, the rig has {self.vertex_count}")

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        state["_func"] = None
        return state

    def _call(self, controls: np.ndarray) -> np.ndarray:
        if self._func is None:
            self._func = resolve_function(self.spec)
        try:
            out = self._func(controls.copy())
        except Exception as e:  # the user's function may raise anything
            raise RigError(f"python rig {self.spec!r} raised {type(e).__name__}: {e}") from None
        try:
            return np.asarray(out, dtype=np.float64)
        except (TypeError, ValueError) as e:
            raise RigError(f"python rig {self.spec!r} returned {type(out).__name__}, "
                           f"not an array: {e}") from None

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        out = self._call(controls)
        expected = (controls.shape[0], self.vertex_count, 3)
        if out.shape != expected:
            raise RigError(f"python rig {self.spec!r} returned shape {out.shape}, "
                           f"expected {expected}")
        return out
