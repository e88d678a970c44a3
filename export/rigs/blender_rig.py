"""A Blender `.blend` file as a rig: ``blend:PATH[#OBJECT]`` (or a path ending ``.blend``).

The scene is evaluated by Blender itself, in a worker process that has ``bpy`` (the ``blender``
extra): ``python -m rigcast.blender.blender_scene serve ...`` speaks the external-process protocol of
docs/rig-sources.md, so this is a ``ProcessRig`` whose schema Blender describes first
(``describe``). Each sampling worker (local processes or Dask) starts its own Blender, which loads
the file once. The interpreter is ``$RIGCAST_BPY_PYTHON`` when set (a Python whose environment has
bpy), else this one.

``bounds``: ``{"bones": {"jaw": {"x": [lo, hi]}, "neck": {"y": null}}}`` lists the pose-bone
rotations that are controls (degrees, Euler XYZ); ``null`` takes the bounds from the bone's Limit
Rotation constraint. Shape keys and driving custom properties are found in the file
(``rigcast/blender/blender_scene.py`` says how).
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from rigcast.export.rigs.process_rig import ProcessRig
from rigcast.export.rigs.rig import RigError

log = logging.getLogger(__name__)

DESCRIBE_TIMEOUT_S = 120.0


def blender_python() -> str:
    return os.environ.get("RIGCAST_BPY_PYTHON") or sys.executable


def _bone_args(bounds: Mapping[str, Any] | None) -> tuple[str, dict[str, Any]]:
    """(``--bones`` value, explicit bounds) from the bounds mapping."""
    bones = dict((bounds or {}).get("bones", {}))
    unknown = set(bounds or {}) - {"bones"}
    if unknown:
        raise RigError(f".blend bounds take only 'bones', got {sorted(unknown)}")
    specs, explicit = [], {}
    for bone, axes in bones.items():
        if not isinstance(axes, Mapping) or not axes or set(axes) - set("xyz"):
            raise RigError(f"bounds for bone {bone!r} must map 'x'/'y'/'z' to [lo, hi] or null, "
                           f"got {axes!r}")
        specs.append(f"{bone}:{''.join(sorted(axes))}")
        given = {a: v for a, v in axes.items() if v is not None}
        if given:
            explicit[bone] = given
    return ",".join(specs), {"bones": explicit}


class BlenderRig(ProcessRig):
    """A .blend's mesh object as a rig, evaluated by Blender's depsgraph in a worker process."""

    def __init__(self, path: str | Path, *, obj: str | None = None,
                 bounds: Mapping[str, Any] | None = None, timeout: float = 300.0) -> None:
        self.path = Path(path).resolve()
        if not self.path.is_file():
            raise RigError(f".blend file {path} does not exist")
        bones, explicit = _bone_args(bounds)
        common = [str(self.path), "--bones", bones, "--bounds", json.dumps(explicit)]
        if obj is not None:
            common += ["--object", obj]
        python = blender_python()
        schema = self._describe([python, "-m", "rigcast.blender.blender_scene", "describe", *common])
        super().__init__([python, "-m", "rigcast.blender.blender_scene", "serve", *common], schema,
                         timeout=timeout, start_timeout=timeout)
        self.name = f"blend:{self.path.name}" + (f"#{obj}" if obj else "")

    @staticmethod
    def _describe(argv: list[str]) -> dict[str, Any]:
        try:
            proc = subprocess.run(argv, capture_output=True, text=True, check=False,
                                  timeout=DESCRIBE_TIMEOUT_S, stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            raise RigError(f"Blender did not describe {argv[4]} within {DESCRIBE_TIMEOUT_S:g} s"
                           ) from None
        tail = proc.stderr.strip().splitlines()[-1:] if proc.stderr.strip() else []
        if proc.returncode != 0:
            if "No module named 'bpy'" in proc.stderr:
                raise RigError(f"{argv[0]} has no bpy: install the blender extra "
                               "(pip install bpy==5.0.*), or set RIGCAST_BPY_PYTHON to a Python "
                               "that has it")
            raise RigError(f"Blender could not use {argv[4]}: {' '.join(tail)}")
        try:
            data: dict[str, Any] = json.loads(proc.stdout)
        except json.JSONDecodeError:
            raise RigError(f"Blender's description of {argv[4]} is not JSON: "
                           f"{proc.stdout[:200]!r}") from None
        return data
