"""What the build's self-check said about a bundle, for telemetry and the operator view.

The build runs the solve exactly as served on held-out poses, beside bounded linear least squares,
and probes every control alone (export/bundling/build_check.py); the figures go in the manifest's
``training.reference``. A bundle is *poor* when its solve is less accurate than bounded linear
least squares on those poses, or when more than a tenth of its controls cannot be recovered alone
(a share of ours, common practice for a warning, no source: a control or two that a rig hides
behind others is normal, a tenth is a build to redo). Bundles without the section (built before
it, or synthetic) are *unchecked*: neither good nor poor.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

log = logging.getLogger(__name__)

LOST_SHARE_POOR = 0.1  # more than this share of controls not recoverable alone: poor


@dataclass(frozen=True)
class BundleQuality:
    """ok: True (checked, fine), False (checked, poor) or None (no self-check in the bundle);
    reason: one line for a person; lost_controls: controls the check could not recover alone."""

    ok: bool | None
    reason: str
    lost_controls: int = 0
    worse_than_reference: bool = False

    def to_wire(self) -> dict[str, Any]:
        return {"ok": self.ok, "reason": self.reason, "lost_controls": self.lost_controls,
                "worse_than_reference": self.worse_than_reference}


def bundle_quality(manifest: Mapping[str, Any], control_count: int) -> BundleQuality:
    """The verdict of the manifest's ``training.reference`` section (see the module docstring)."""
    training = manifest.get("training")
    ref = training.get("reference") if isinstance(training, Mapping) else None
    if not isinstance(ref, Mapping):
        return BundleQuality(None, "the bundle carries no build self-check")
    lost = ref.get("lost_controls") or ()
    lost_n = len(lost) if isinstance(lost, list | tuple) else 0
    worse = bool(ref.get("worse_than_reference"))
    if worse:
        mean, lsq = ref.get("rig_mean_err"), ref.get("lsq_mean_err")
        figures = (f" (mean error {mean:.3g} against {lsq:.3g})"
                   if isinstance(mean, int | float) and isinstance(lsq, int | float) else "")
        return BundleQuality(False, "solve less accurate than linear least squares on held-out "
                             f"poses{figures}", lost_n, True)
    if control_count > 0 and lost_n > LOST_SHARE_POOR * control_count:
        return BundleQuality(False, f"{lost_n} of {control_count} controls not recoverable",
                             lost_n, False)
    note = f"; {lost_n} of {control_count} controls not recoverable alone" if lost_n else ""
    return BundleQuality(True, f"the build's self-check passed{note}", lost_n, False)
