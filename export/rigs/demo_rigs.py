"""Built-in demo rigs of "Tamsin", a round-faced lighthouse keeper of our own invention.

Three rigs, all procedural and deterministic (seeded numpy, no files):

- ``tamsin_face()``: a face of ~3,700 vertices with 46 controls: linear blendshapes, corrective
  combination shapes driven by products of 2 and 3 weights (the "combination shapes" of the
  blendshape literature, e.g. Lewis et al., "Practice and Theory of Blendshape Facial Models",
  Eurographics 2014 STAR), and a jaw joint with linear blend skinning, so the rig is non-linear.
- ``tamsin_face_linear()``: the same linear shapes, no correctives, and the jaw as a linear shape
  (its displacement at full opening, per degree). Affine in the controls.
- ``tamsin_lantern_arm()``: no blendshapes at all; a six-joint tentacle arm holding a lantern,
  linear blend skinning, two bounded angles per joint.

Axes: +y up, +z out of the face, +x the character's left. ``_l`` controls act on +x.

The rigs live in ``demo_face`` (with ``demo_face_shapes`` and ``demo_mesh``) and ``demo_arm``;
this module names them for the CLI and keeps the import path callers use.
"""

from __future__ import annotations

from collections.abc import Callable

from rigcast.export.rigs.demo_arm import TamsinLanternArm, tamsin_lantern_arm
from rigcast.export.rigs.demo_face import TamsinHead, tamsin_face, tamsin_face_linear
from rigcast.export.rigs.demo_face_shapes import JAW, JAW_RANGE_DEG, Term
from rigcast.export.rigs.demo_mesh import uv_sphere, vertex_normals
from rigcast.export.rigs.rig import Rig

# export/rigs/zoo_mesh.py imports these two by their old private names.
_uv_sphere = uv_sphere
_vertex_normals = vertex_normals

__all__ = [
    "DEMO_RIGS",
    "JAW",
    "JAW_RANGE_DEG",
    "TamsinHead",
    "TamsinLanternArm",
    "Term",
    "tamsin_face",
    "tamsin_face_linear",
    "tamsin_lantern_arm",
]

DEMO_RIGS: dict[str, Callable[[], Rig]] = {
    "face": tamsin_face,
    "face-linear": tamsin_face_linear,
    "arm": tamsin_lantern_arm,
}
