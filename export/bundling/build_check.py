"""The build's self-check: the bundle's solve, exactly as it will be served, scored through the
real rig on held-out poses, beside bounded linear least squares (scipy ``lsq_linear`` on the rig
linearised at its defaults) on the same poses.

The served solve is ``runtime.solve.batch.BatchSolver`` with the bundle's own defaults (stabilisation
as the build measured, the refinement steps), no filter: what ``rigcast solve`` and, frame by
frame, ``rigcast serve`` return.
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.quality.baselines import linearise_rig, solve_lsq
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.solve.batch import BatchSolver, SolveOptions

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ServedCheck:
    """Held-out figures of the served solve, in mesh units unless named ``_pct_diag``.

    rig_mean_err / rig_max_err: the served solve re-rendered by the real rig against the pose's
    mesh (mean over vertices and poses; worst vertex); lsq_mean_err / lsq_max_err: the same for
    bounded linear least squares; fit_rms_mean / fit_rms_p99: the forward model's per-pose RMS
    fit (the off-manifold detector's floor); worse_than_reference: rig_mean_err above both
    lsq_mean_err and 0.005 % of the diagonal.
    """

    rig_mean_err: float
    rig_max_err: float
    rig_mean_err_pct_diag: float
    lsq_mean_err: float
    lsq_max_err: float
    fit_rms_mean: float
    fit_rms_p99: float
    stabilised: bool
    poses: int
    worse_than_reference: bool
    recoverable_controls: int = 0
    lost_controls: tuple[str, ...] = ()
    unrecoverable: tuple[dict[str, str], ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def served_solve(bundle_path: Path, meshes: np.ndarray, fps: float = 60.0
                 ) -> tuple[np.ndarray, np.ndarray, bool]:
    """meshes (N, V, 3) -> (controls (N, C), fit rms (N,), stabilised) from the served solve."""
    bundle = load_bundle(bundle_path)
    solver = BatchSolver(bundle, threads=2)
    times = np.arange(meshes.shape[0], dtype=np.float64) / fps
    res = solver.solve(meshes, times, SolveOptions(filter="none", fit_error_scope="full"))
    return res.controls, res.fit_rms, bundle.rigid_region  # SolveOptions' default follows it


def check_served(bundle_path: Path, rig: Rig, meshes: np.ndarray, forward_err: float
                 ) -> ServedCheck:
    """Score the served solve of held-out ``meshes`` (N, V, 3) through the real rig, and probe
    every control alone (``fidelity.recoverability``; ``forward_err`` the forward model's mean
    held-out error, below which a control's mesh effect cannot be told apart)."""
    from rigcast.export.quality.fidelity import recoverability

    controls, fit_rms, stabilised = served_solve(bundle_path, meshes)
    rec = recoverability(rig, lambda m: served_solve(bundle_path, m)[0], forward_err)
    err = np.linalg.norm(rig.evaluate(controls) - meshes, axis=-1)
    lo, hi = rig.schema.lower, rig.schema.upper
    lsq = solve_lsq(linearise_rig(rig), meshes, lo, hi).controls
    lsq_err = np.linalg.norm(rig.evaluate(lsq) - meshes, axis=-1)
    diag = float(np.linalg.norm(rig.neutral.max(axis=0) - rig.neutral.min(axis=0)))
    mean, ref = float(err.mean()), float(lsq_err.mean())
    return ServedCheck(
        rig_mean_err=mean,
        rig_max_err=float(err.max()),
        rig_mean_err_pct_diag=100.0 * mean / diag,
        lsq_mean_err=ref,
        lsq_max_err=float(lsq_err.max()),
        fit_rms_mean=float(np.nanmean(fit_rms)),
        fit_rms_p99=float(np.nanpercentile(fit_rms, 99)),
        stabilised=stabilised,
        poses=int(meshes.shape[0]),
        worse_than_reference=mean > max(ref, 5e-5 * diag),
        recoverable_controls=len(rec.recoverable),
        lost_controls=tuple(rec.lost),
        unrecoverable=tuple(rec.unrecoverable),
    )
