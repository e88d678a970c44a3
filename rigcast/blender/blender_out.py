"""A solve written back into Blender: a copy of the rig's `.blend` with the solved controls keyed
(shape-key values, driving custom properties, pose-bone rotations) at the take's frame rate, so an
animator opens it and scrubs. Blender runs in a worker process (``rigcast.blender.blender_scene key``).
Frame i of the take is scene frame ``1 + round(time_i * fps)``; the scene's rate is the take's.
The head pose keys an empty, ``rigcast_head``, made the parent of the mesh and its armature.
"""

from __future__ import annotations

import logging
import subprocess
import tempfile
from pathlib import Path

import numpy as np

from rigcast.export.rigs.blender_rig import BlenderRig
from rigcast.writers.animation_out import AnimationError, _check_take
from rigcast.writers.frame_info import HeadPose

log = logging.getLogger(__name__)

KEY_TIMEOUT_S = 600.0


def write_blend(out: str | Path, rig: BlenderRig, controls: np.ndarray, times_s: np.ndarray,
                fps: float, head: HeadPose | None = None) -> Path:
    """Key ``controls`` (T, C, in the rig's schema order) on a copy of ``rig``'s file at ``out``,
    and the head pose on an empty that parents the rig. The rig's own file is not changed."""
    out = Path(out).resolve()
    if out.suffix.lower() != ".blend":
        raise AnimationError(f"{out}: Blender output needs a .blend extension")
    if out == rig.path:
        raise AnimationError(f"{out} is the rig's own file; write the keyed copy elsewhere")
    controls, times_s = _check_take(controls, times_s, len(rig.schema))
    serve = rig.argv  # [python, -m, rigcast.blender.blender_scene, serve, PATH, options...]
    with tempfile.TemporaryDirectory() as tmp:
        take = Path(tmp) / "solve.npz"
        arrays: dict[str, np.ndarray] = {
            "names": np.array(rig.schema.names), "controls": controls, "times_s": times_s,
            "fps": np.array(float(fps))}
        if head is not None:
            arrays["head"] = head.matrices()
        np.savez(take, **arrays)  # type: ignore[arg-type]
        argv = [*serve[:3], "key", *serve[4:], "--take", str(take), "--out", str(out)]
        proc = subprocess.run(argv, capture_output=True, text=True, check=False,
                              timeout=KEY_TIMEOUT_S, stdin=subprocess.DEVNULL)
    if proc.returncode != 0 or not out.is_file():
        tail = " ".join(proc.stderr.strip().splitlines()[-2:])
        raise AnimationError(f"Blender could not key the solve into {out}: {tail}")
    log.info("wrote %s: %d frames at %g fps keyed on %d controls", out, len(times_s), fps,
             len(rig.schema))
    return out
