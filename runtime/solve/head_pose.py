"""The head pose: the rigid motion that stabilisation removes, as it goes on the wire.

Stabilisation fits ``x_neutral = s R x_frame + t`` (runtime/solve/align.py); the head's pose relative to
the neutral is its inverse, ``x_frame = (1/s) R^T (x_neutral - t)``. It goes out with every live
controls message (docs/protocol.md §5.1, ``head_pose``) and in telemetry (``pose``).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.runtime.solve.align import RigidTransform

log = logging.getLogger(__name__)

HEAD_POSE_VERSION = 1  # the version of the controls header's head_pose map


def rotation_to_quaternion(rotation: np.ndarray) -> np.ndarray:
    """rotation (3, 3) proper rotation -> unit quaternion (4,) as (w, x, y, z), w >= 0.

    Shepperd's method (J. Guidance and Control 1(3), 1978): take the largest of the four squared
    components from the trace and the diagonal, then the others from off-diagonal sums.
    """
    # on Python floats (the same IEEE arithmetic as numpy's scalars, without their cost)
    (m00, m01, m02), (m10, m11, m12), (m20, m21, m22) = np.asarray(rotation, np.float64).tolist()
    tr = m00 + m11 + m22
    candidates = (tr, m00, m11, m22)
    if math.isnan(tr + m00 + m11 + m22):  # np.argmax's choice where a NaN is among them
        i = int(np.argmax(candidates))
    else:  # the first largest, as np.argmax
        i = max(range(4), key=candidates.__getitem__)
    if i == 0:
        s = 2.0 * math.sqrt(1.0 + tr)
        q = [0.25 * s, (m21 - m12) / s, (m02 - m20) / s, (m10 - m01) / s]
    elif i == 1:
        s = 2.0 * math.sqrt(1.0 + m00 - m11 - m22)
        q = [(m21 - m12) / s, 0.25 * s, (m01 + m10) / s, (m02 + m20) / s]
    elif i == 2:
        s = 2.0 * math.sqrt(1.0 + m11 - m00 - m22)
        q = [(m02 - m20) / s, (m01 + m10) / s, 0.25 * s, (m12 + m21) / s]
    else:
        s = 2.0 * math.sqrt(1.0 + m22 - m00 - m11)
        q = [(m10 - m01) / s, (m02 + m20) / s, (m12 + m21) / s, 0.25 * s]
    out = np.array(q)
    out /= math.sqrt(out.dot(out))  # np.linalg.norm's arithmetic for a vector
    return out if out[0] >= 0 else -out


@dataclass(frozen=True)
class HeadPose:
    """The head's pose relative to the neutral: ``x_frame = scale * R(q) x_neutral + translation``
    with q = quaternion_wxyz (unit, w >= 0); angle_deg is the rotation's angle."""

    quaternion_wxyz: tuple[float, float, float, float]
    translation: tuple[float, float, float]
    scale: float
    angle_deg: float

    @classmethod
    def from_stabiliser(cls, stabiliser: RigidTransform) -> HeadPose:
        """The pose undone by ``stabiliser`` (the fit taking the frame onto the neutral)."""
        pose = stabiliser.inverse()
        w, x, y, z = rotation_to_quaternion(pose.rotation).tolist()
        tx, ty, tz = pose.translation.tolist()
        return cls((w, x, y, z), (tx, ty, tz), float(pose.scale), pose.angle_deg)

    def to_wire(self) -> dict[str, Any]:
        """The telemetry ``pose`` map."""
        return {"quaternion_wxyz": list(self.quaternion_wxyz),
                "translation": list(self.translation), "scale": self.scale,
                "angle_deg": self.angle_deg}

    def to_controls_wire(self) -> dict[str, Any]:
        """The controls header's ``head_pose`` map (versioned: ``v``)."""
        return {"v": HEAD_POSE_VERSION, "quaternion_wxyz": list(self.quaternion_wxyz),
                "translation": list(self.translation), "scale": self.scale}

    @classmethod
    def from_wire(cls, data: Mapping[str, Any]) -> HeadPose | None:
        """A ``head_pose`` or ``pose`` map back, or None when it is not one this version reads
        (another ``v``, missing or malformed values): readers ignore what they do not know."""
        try:
            if data.get("v", HEAD_POSE_VERSION) != HEAD_POSE_VERSION:
                return None
            q = tuple(float(v) for v in data["quaternion_wxyz"])
            t = tuple(float(v) for v in data["translation"])
            scale = float(data["scale"])
        except (KeyError, TypeError, ValueError):
            return None
        if len(q) != 4 or len(t) != 3 or not all(math.isfinite(v) for v in (*q, *t, scale)):
            return None
        angle = 2.0 * math.degrees(math.acos(min(1.0, abs(q[0]))))
        return cls((q[0], q[1], q[2], q[3]), (t[0], t[1], t[2]), scale, angle)
