"""Write a solve's controls in the format the output file's extension names: CSV and JSON
(``rigcast.writers.animation_out``), glTF 2.0 (``rigcast.writers.gltf_out``) or OpenUSD
(``rigcast.writers.usd_out``, through usd-core). The writers import ``animation_out``; this module imports
them, only here, so no two writers import each other."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from rigcast.runtime.schema import ControlSchema
from rigcast.writers.animation_out import AnimationError, MorphBasis, write_csv, write_json
from rigcast.writers.frame_info import FrameQuality, HeadPose

if TYPE_CHECKING:
    from rigcast.writers.skeleton import Skeleton


OUTPUT_SUFFIXES = (".csv", ".json", ".gltf", ".glb", ".usda", ".usdc", ".usd")


def write_controls(path: str | Path, schema: ControlSchema, controls: np.ndarray,
                   times_s: np.ndarray, *, fps: float | None = None,
                   basis: MorphBasis | None = None, skeleton: Skeleton | None = None,
                   quality: FrameQuality | None = None, head: HeadPose | None = None) -> Path:
    """Write by extension: .csv, .json, .gltf/.glb (``basis`` and/or ``skeleton``) or
    .usda/.usdc/.usd (the same, through usd-core). ``quality`` and ``head`` go into every
    format that can hold them (glTF: the head pose only, on the root node)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return write_csv(path, schema.names, controls, times_s, quality=quality, head=head)
    if suffix == ".json":
        return write_json(path, schema, controls, times_s, fps=fps, quality=quality, head=head)
    if suffix in (".gltf", ".glb"):
        from rigcast.writers.gltf_out import write_gltf

        return write_gltf(path, controls, times_s, basis=basis, skeleton=skeleton, head=head,
                          fps=fps)
    if suffix in (".usda", ".usdc", ".usd"):
        from rigcast.writers.usd_out import write_usd

        return write_usd(path, schema, controls, times_s, basis=basis, skeleton=skeleton,
                         head=head, quality=quality, fps=fps)
    raise AnimationError(
        f"{path}: unknown output format {suffix!r}; use {', '.join(OUTPUT_SUFFIXES)}"
    )
