"""Tamsin's face as authored: the shape terms, the corrective combinations and the schema.

Each shape is a sum of ``Term`` s (a smooth Gaussian falloff times a displacement); "_l" shapes and
combinations are mirrored into "_r". The corrective combination shapes are the "combination
shapes" of the blendshape literature (Lewis et al., "Practice and Theory of Blendshape Facial
Models", Eurographics 2014 STAR). Axes: +y up, +z out of the face, +x the character's left.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from rigcast.runtime.schema import Control, ControlSchema

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Term:
    """A smooth localised displacement: an anisotropic Gaussian falloff times a vector.

    ``center`` is (x, y) on the front of the unit sphere, or a full 3-vector direction;
    ``sigma`` the falloff widths in x, y, z; ``vec`` a world displacement; ``normal`` a
    displacement along the surface normal.
    """

    center: tuple[float, ...]
    sigma: tuple[float, float, float]
    vec: tuple[float, float, float] = (0.0, 0.0, 0.0)
    normal: float = 0.0

    def mirrored(self) -> Term:
        c = (-self.center[0], *self.center[1:])
        return Term(c, self.sigma, (-self.vec[0], self.vec[1], self.vec[2]), self.normal)


def _s(sx: float, sy: float) -> tuple[float, float, float]:
    return (sx, sy, 0.25)


# name (left or centre), group, (min, max), terms. "_l" names are mirrored into "_r".
_SHAPES: list[tuple[str, str, tuple[float, float], list[Term]]] = [
    ("brow_arch_l", "brow", (0, 1), [Term((0.3, 0.34), _s(0.16, 0.08), (0, 0.06, 0.01))]),
    ("brow_knit_l", "brow", (0, 1), [Term((0.12, 0.3), _s(0.09, 0.07), (-0.035, -0.02, 0.015))]),
    ("brow_outer_lift_l", "brow", (0, 1), [Term((0.46, 0.3), _s(0.1, 0.08), (0, 0.055, 0))]),
    ("brow_sink_l", "brow", (0, 1), [Term((0.28, 0.32), _s(0.16, 0.08), (0, -0.045, 0.01))]),
    ("lid_shut_l", "lid", (0, 1), [Term((0.3, 0.19), _s(0.11, 0.05), (0, -0.06, 0.015))]),
    ("lid_widen_l", "lid", (0, 1), [Term((0.3, 0.21), _s(0.11, 0.05), (0, 0.035, 0.005))]),
    ("lid_squint_l", "lid", (0, 1), [Term((0.3, 0.09), _s(0.12, 0.045), (0, 0.03, 0.01))]),
    ("cheek_swell_l", "cheek", (0, 1), [Term((0.42, -0.25), _s(0.14, 0.14), normal=0.07)]),
    ("cheek_lift_l", "cheek", (0, 1), [Term((0.38, -0.1), _s(0.14, 0.1), (0, 0.045, 0.02))]),
    ("cheek_hollow_l", "cheek", (0, 1), [Term((0.44, -0.3), _s(0.1, 0.12), normal=-0.04)]),
    ("nostril_widen_l", "nose", (0, 1), [Term((0.07, -0.14), _s(0.05, 0.05), (0.025, 0, 0))]),
    ("nose_wrinkle_l", "nose", (0, 1), [Term((0.07, -0.02), _s(0.06, 0.07), (0, 0.025, 0.01))]),
    (
        "lip_corner_lift_l",
        "lip",
        (0, 1),
        [Term((0.24, -0.42), _s(0.07, 0.06), (0.015, 0.05, -0.005))],
    ),
    ("lip_corner_sink_l", "lip", (0, 1), [Term((0.24, -0.44), _s(0.07, 0.06), (0, -0.045, 0))]),
    ("lip_stretch_l", "lip", (0, 1), [Term((0.24, -0.43), _s(0.09, 0.06), (0.05, -0.005, -0.01))]),
    ("upper_lip_raise_l", "lip", (0, 1), [Term((0.1, -0.37), _s(0.08, 0.04), (0, 0.035, 0.01))]),
    ("lower_lip_drop_l", "lip", (0, 1), [Term((0.1, -0.48), _s(0.08, 0.04), (0, -0.035, 0.005))]),
    (
        "ear_wiggle_l",
        "ear",
        (0, 1),
        [Term((1.0, 0.05, -0.1), (0.12, 0.15, 0.15), (0, 0.03, -0.03))],
    ),
    ("lip_press", "lip", (0, 1), [Term((0, -0.42), _s(0.2, 0.035), (0, 0, -0.02))]),
    (
        "lip_pucker",
        "lip",
        (0, 1),
        [
            Term((0.0, -0.42), _s(0.1, 0.07), (0, 0, 0.05)),
            Term((0.14, -0.42), _s(0.07, 0.07), (-0.03, 0, 0.01)),
            Term((-0.14, -0.42), _s(0.07, 0.07), (0.03, 0, 0.01)),
        ],
    ),
    (
        "lip_funnel",
        "lip",
        (0, 1),
        [
            Term((0, -0.42), _s(0.14, 0.08), (0, 0, 0.04)),
            Term((0, -0.38), _s(0.12, 0.03), (0, 0.015, 0)),
            Term((0, -0.47), _s(0.12, 0.03), (0, -0.015, 0)),
        ],
    ),
    ("lip_roll_upper", "lip", (0, 1), [Term((0, -0.39), _s(0.16, 0.03), (0, -0.01, -0.025))]),
    ("lip_roll_lower", "lip", (0, 1), [Term((0, -0.46), _s(0.16, 0.03), (0, 0.01, -0.025))]),
    ("mouth_shift", "lip", (-1, 1), [Term((0, -0.43), _s(0.22, 0.08), (0.05, 0, 0))]),
    ("chin_raise", "jaw", (0, 1), [Term((0, -0.62), _s(0.12, 0.08), (0, 0.03, 0.015))]),
    ("jaw_slide", "jaw", (-1, 1), [Term((0, -0.72), _s(0.35, 0.2), (0.05, 0, 0))]),
    ("jaw_thrust", "jaw", (0, 1), [Term((0, -0.72), _s(0.35, 0.2), (0, 0, 0.05))]),
]

JAW = "jaw_drop"
JAW_RANGE_DEG = (0.0, 30.0)

#: Correctives are authored at this gain: big enough that the face is clearly non-linear (a rig
#: linearised at rest misses them), as correctives on a production face often are.
COMBO_GAIN = 3.0

# Corrective combination shapes: (driver names, terms). Weights are normalised to [0, 1] by their
# bounds before multiplying (the jaw angle by its range). "_l" combos are mirrored into "_r".
_COMBOS: list[tuple[tuple[str, ...], list[Term]]] = [
    (("lip_corner_lift_l", "cheek_lift_l"), [Term((0.34, -0.05), _s(0.1, 0.06), (0, 0.02, 0.02))]),
    (("lid_shut_l", "lid_squint_l"), [Term((0.3, 0.14), _s(0.1, 0.04), (0, 0, -0.015))]),
    (("brow_arch_l", "brow_knit_l"), [Term((0.12, 0.42), _s(0.1, 0.06), (0, -0.01, 0.02))]),
    (("jaw_drop", "lip_stretch_l"), [Term((0.24, -0.48), _s(0.08, 0.06), (0, -0.02, -0.02))]),
    (
        ("nose_wrinkle_l", "upper_lip_raise_l"),
        [Term((0.08, -0.3), _s(0.06, 0.05), (0, 0.015, 0.01))],
    ),
    (("lip_pucker", "lip_funnel"), [Term((0, -0.42), _s(0.12, 0.06), (0, 0, -0.03))]),
    (("jaw_drop", "lip_pucker"), [Term((0, -0.45), _s(0.12, 0.06), (0, 0, 0.03))]),
    (
        ("lip_corner_lift_l", "cheek_lift_l", "lid_squint_l"),
        [Term((0.32, 0.02), _s(0.1, 0.05), (0, 0.015, 0.01))],
    ),
    (("jaw_drop", "lip_funnel", "lip_pucker"), [Term((0, -0.42), _s(0.1, 0.06), (0, -0.01, 0.02))]),
]


def mirror_name(name: str) -> str:
    return name[:-2] + "_r" if name.endswith("_l") else name


def expanded_shapes() -> list[tuple[str, str, tuple[float, float], list[Term]]]:
    out = []
    for name, group, rng, terms in _SHAPES:
        out.append((name, group, rng, terms))
        if name.endswith("_l"):
            out.append((mirror_name(name), group, rng, [t.mirrored() for t in terms]))
    return out


def expanded_combos() -> list[tuple[tuple[str, ...], list[Term]]]:
    out = []
    for names, terms in _COMBOS:
        out.append((names, terms))
        if any(n.endswith("_l") for n in names):
            out.append((tuple(mirror_name(n) for n in names), [t.mirrored() for t in terms]))
    return out


def face_schema() -> ControlSchema:
    controls = []
    for name, group, (lo, hi), _ in expanded_shapes():
        pair = ""
        if name.endswith("_l"):
            pair = name[:-2] + "_r"
        elif name.endswith("_r"):
            pair = name[:-2] + "_l"
        controls.append(Control(name, float(lo), float(hi), 0.0, group, pair))
    controls.append(Control(JAW, JAW_RANGE_DEG[0], JAW_RANGE_DEG[1], 0.0, "jaw", ""))
    return ControlSchema(tuple(controls))

