"""What `rigcast solve` writes besides the controls, computed once for every output format.

- the per-frame quality (``FrameQuality``) from the batch solve and the take's times;
- the head pose (``HeadPose``): the solve's own stabilisation fits (``BatchSolve.rigid``, each
  frame's stable vertices onto the bundle's neutral, Umeyama 1991), inverted, so the pose is
  exactly the motion the solve removed, with or without scale, and the take is not fitted twice;
- the rig for glTF/USD: a skinned rig (``--rig``) writes its skeleton, whose fingerprint must be
  the bundle's; otherwise the blendshapes are read off the bundle's forward model.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rigcast.errors import MismatchError, UserError
from rigcast.runtime.bundle import Bundle
from rigcast.runtime.solve.batch import BatchSolve
from rigcast.writers.animation_out import MorphBasis, morph_basis
from rigcast.writers.frame_info import (
    FLAG_NAMES,
    FrameQuality,
    HeadPose,
    clamped_frames,
    describe_ranges,
    head_pose_from_fit,
    identity_pose,
    stale_frames,
)
from rigcast.writers.skeleton import Skeleton, skeleton_from_rig

log = logging.getLogger(__name__)

RIG_SUFFIXES = (".gltf", ".glb", ".usda", ".usdc", ".usd")  # outputs that carry the rig
# Blendshape weights span [0, 1] or [-1, 1] (common practice, no source); a wider control is an
# angle or a distance, so without --rig it is left out of the morph targets.
WEIGHT_SPAN = 2.0


@dataclass(frozen=True)
class SolveExtras:
    """Everything written beside the controls: quality, head pose and the rig's form."""

    quality: FrameQuality
    head: HeadPose
    basis: MorphBasis | None
    skeleton: Skeleton | None


def frame_quality(bundle: Bundle, result: BatchSolve, times_s: np.ndarray) -> FrameQuality:
    """Per-frame fit error and flags of a batch solve (see ``rigcast.writers.frame_info``)."""
    return FrameQuality(
        fit_rms=np.asarray(result.fit_rms, np.float64),
        fit_max=np.asarray(result.fit_max, np.float64),
        off_manifold=np.asarray(result.off_manifold, bool),
        clamped=clamped_frames(result.controls, bundle.schema),
        stale=stale_frames(times_s),
    )


def head_pose(result: BatchSolve) -> HeadPose:
    """The head pose of every frame of a batch solve: the inverse of the fits that stabilised its
    frames (``result.rigid``), identity on every frame when the solve did not stabilise."""
    if result.rigid is None:
        return identity_pose(result.controls.shape[0])
    fits = result.rigid
    return head_pose_from_fit(fits.rotation, fits.translation, fits.scale)


def checked_rig(bundle: Bundle, rig_spec: str, bounds: Path | None) -> Any:
    """The rig ``rig_spec`` names, if it is the one ``bundle`` was built from (fingerprint)."""
    from rigcast.export.rigs.rig_loader import load_rig

    rig = load_rig(rig_spec, bounds=bounds)
    recorded = bundle.manifest.get("fingerprint")
    theirs = recorded.get("rig") if isinstance(recorded, dict) else None
    ours = rig.fingerprint()
    if ours != theirs:
        rig.close()
        raise MismatchError(
            f"rig {rig_spec} (fingerprint {ours[:12]}) is not the rig bundle {bundle.name!r} was "
            f"built from ({str(theirs)[:12] if theirs else 'none recorded'})",
            "give the rig spec and bounds the bundle was built with")
    return rig


def output_form(bundle: Bundle, out: Path, forward: Any, rig_spec: str | None,
                bounds: Path | None) -> tuple[MorphBasis | None, Skeleton | None]:
    """The rig's form for glTF/USD ``out``: its skeleton when ``rig_spec`` names a skinned rig,
    else the blendshapes read off the bundle's forward model (``forward.evaluate``)."""
    if out.suffix.lower() == ".blend" and rig_spec is None:
        raise UserError(f"{out}: a .blend output is a keyed copy of the rig's own file",
                        "give the rig with --rig blend:PATH (and --bounds as for the build)",
                        code=2)
    if out.suffix.lower() not in RIG_SUFFIXES:
        return None, None
    if rig_spec is not None:
        rig = checked_rig(bundle, rig_spec, bounds)
        try:
            return None, skeleton_from_rig(rig)
        finally:
            rig.close()
    # The forward model is a learned approximation, so linearity is judged loosely, and a control
    # wider than a weight's range (degrees, distances) is never taken for a blendshape.
    return morph_basis(bundle.name, bundle.schema, bundle.neutral, bundle.faces,
                       forward.evaluate, linearity_tol=0.05, max_span=WEIGHT_SPAN), None


def write_blend_solve(out: Path, bundle: Bundle, rig_spec: str, bounds: Path | None,
                      controls: np.ndarray, times_s: np.ndarray, fps: float,
                      head: HeadPose | None = None) -> Path:
    """Key a solve into a copy of the .blend the bundle was built from (``--rig blend:...``)."""
    from rigcast.blender.blender_out import write_blend
    from rigcast.export.rigs.blender_rig import BlenderRig

    rig = checked_rig(bundle, rig_spec, bounds)
    try:
        if not isinstance(rig, BlenderRig):
            raise UserError(f"{out}: .blend output needs a Blender rig (--rig blend:PATH), got "
                            f"{rig_spec}", "write .gltf, .usda, .csv or .json instead", code=2)
        return write_blend(out, rig, controls, times_s, fps, head)
    finally:
        rig.close()


def flag_lines(quality: FrameQuality) -> list[str]:
    """One line per flag with its frame ranges, for the solve's summary."""
    return [f"{name.replace('_', '-')} frames: {describe_ranges(quality.flags(name))}"
            for name in FLAG_NAMES]
