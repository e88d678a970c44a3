"""One entry point for every rig source: ``load_rig(spec)``.

Specs (docs/rig-sources.md):
  demo:face | demo:face-linear | demo:arm    built-in Tamsin rigs
  gltf:PATH[#MESH], or PATH.gltf / PATH.glb  glTF 2.0 morph targets and skins (bounds=...)
  py:MODULE:FUNCTION or py:FILE.py:FUNCTION  a Python function (schema=...)
  proc:COMMAND LINE                          an external process, shlex-split (schema=...)
  npz:PATH, or PATH.npz                      a dataset sampled elsewhere (schema= optional)
  zoo:SEED                                   a seeded test rig from the rig zoo (export/rigs/zoo.py)
  blend:PATH[#OBJECT] or PATH.blend          a Blender scene, evaluated by bpy (bounds=...)
"""

from __future__ import annotations

import logging
import shlex
from pathlib import Path

from rigcast.export.rigs.rig import Rig, RigError

log = logging.getLogger(__name__)

FORMS = ("demo:face", "demo:face-linear", "demo:arm", "gltf:PATH[#MESH]", "PATH.gltf",
         "blend:PATH[#OBJECT]", "PATH.blend",
         "PATH.glb", "py:MODULE:FUNCTION", "py:FILE.py:FUNCTION", "proc:COMMAND LINE",
         "npz:PATH", "PATH.npz", "zoo:SEED")


def _need_schema(spec: str, schema: str | None) -> str:
    if schema is None:
        raise RigError(f"rig {spec!r} needs a schema file (schema=... / --schema)")
    return schema


def load_rig(spec: str, *, schema: str | None = None, bounds: str | None = None) -> Rig:
    """Build the rig that ``spec`` names. ``schema``: a control schema JSON file (py, proc,
    npz); ``bounds``: a glTF bounds JSON file or JSON string."""
    kind, sep, rest = spec.partition(":")
    lower = spec.lower()
    if sep and kind == "demo":
        from rigcast.export.rigs.demo_rigs import DEMO_RIGS

        if rest not in DEMO_RIGS:
            raise RigError(f"unknown demo rig {rest!r}; demo rigs are {sorted(DEMO_RIGS)}")
        return DEMO_RIGS[rest]()
    if (sep and kind == "gltf") or lower.endswith((".gltf", ".glb")):
        from rigcast.export.rigs.gltf_rig import GltfRig

        target = rest if kind == "gltf" else spec
        path, _, mesh = target.partition("#")
        if not Path(path).is_file():
            raise RigError(f"glTF file {path} does not exist")
        return GltfRig(path, mesh=mesh or None, bounds=bounds)
    if sep and kind == "py":
        from rigcast.export.rigs.callable_rig import CallableRig

        return CallableRig(rest, _need_schema(spec, schema))
    if sep and kind == "proc":
        from rigcast.export.rigs.process_rig import ProcessRig

        try:
            argv = shlex.split(rest)
        except ValueError as e:
            raise RigError(f"rig {spec!r}: cannot split the command line: {e}") from None
        if not argv:
            raise RigError(f"rig {spec!r} has an empty command line")
        return ProcessRig(argv, _need_schema(spec, schema))
    if (sep and kind == "blend") or lower.endswith(".blend") or ".blend#" in lower:
        from rigcast.export.rigs.blender_rig import BlenderRig
        from rigcast.export.rigs.gltf_io import load_bounds_json

        target = rest if kind == "blend" else spec
        path, _, obj = target.partition("#")
        return BlenderRig(path, obj=obj or None,
                          bounds=load_bounds_json(bounds, "bones", what=".blend bounds"))
    if sep and kind == "zoo":
        from rigcast.export.rigs.zoo import make_zoo_rig

        if not (rest.isascii() and rest.isdigit()):
            raise RigError(f"rig {spec!r}: a zoo seed is a non-negative integer, got {rest!r}")
        return make_zoo_rig(int(rest))
    if (sep and kind == "npz") or lower.endswith(".npz"):
        from rigcast.export.rigs.dataset_rig import DatasetRig

        path = rest if kind == "npz" else spec
        return DatasetRig(path, schema=schema)
    raise RigError(f"unknown rig {spec!r}; accepted forms: {', '.join(FORMS)}")
