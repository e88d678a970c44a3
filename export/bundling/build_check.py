"""The build's self-check: the bundle's solve, exactly as it will be served, scored through the
real rig on held-out poses, beside bounded linear least squares (scipy ``lsq_linear`` on the rig
linearised at its defaults) on the same poses.

The served solve is ``runtime.solve.batch.BatchSolver`` with the bundle's own defaults (stabilisation
as the build measured, the refinement steps), no filter: what ``rigcast solve`` and, frame by
frame, ``rigcast serve`` return.

``dead_outputs`` looks at the network alone (the bundle's inverse graph, no refinement) on poses
whose controls are known: each control alone at 25-100 % of the way to each bound (the
recoverability probes), plus held-out poses when their controls are given. A control is *dead*
when, on every such pose where it is active in truth, its output stays within ``STUCK_SPREAD`` of
its range of one value, or its logit (the input of the output's scaled sigmoid) lies where the
output has no slope: past the clip or inside the rest band (``models.unit_output``). There the
mesh loss has no gradient, so training cannot bring it back; the refinement after the network may
hide part of it, which is why it is checked on the network alone.
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.quality.baselines import linearise_rig, solve_lsq
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.solve.batch import BatchSolver, SolveOptions

log = logging.getLogger(__name__)

#: An output that moves less than this share of its range over the poses where its control is
#: active counts as stuck (a hair: the probes span 25-100 % of the way to a bound; common
#: practice, no source).
STUCK_SPREAD = 0.01


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
    dead_outputs: tuple[dict[str, Any], ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


#: The refinement takes Gauss-Newton steps at the current point ("step") only where they lower
#: the held-out error to this share of the fixed matrix's ("fixed") or less: they cost about
#: twice the refinement's arithmetic a frame (demo face, batch), and on rigs that are nearly
#: linear in their controls they bring nothing (demo face 3.2e-5 -> 3.5e-5, face-linear equal;
#: lantern arm 4.1e-3 -> 2.8e-3, zoo rigs 0.73-0.95x). A threshold of ours.
CURVATURE_GAIN = 0.9


def choose_curvature(bundle_path: Path, rig: Rig, meshes: np.ndarray
                     ) -> tuple[str, dict[str, float]]:
    """The refinement's curvature for this bundle, by evidence: the served solve of held-out
    ``meshes`` (N, V, 3) with each setting, scored through the real rig. -> (the choice, each
    setting's mean vertex error). A bundle whose graph has no curvature keeps "fixed"."""
    from dataclasses import replace

    bundle = load_bundle(bundle_path)
    solver = BatchSolver(bundle, threads=2)
    refiner = solver.inverse.refiner
    if refiner is None or refiner.curvature is None:
        return "fixed", {}
    times = np.arange(meshes.shape[0], dtype=np.float64) / 60.0
    errors: dict[str, float] = {}
    base = refiner.settings
    for mode in ("fixed", "step"):
        refiner.settings = replace(base, curvature=mode)
        got = solver.solve(meshes, times, SolveOptions(filter="none", fit_error_scope="off"))
        errors[mode] = float(np.linalg.norm(rig.evaluate(got.controls) - meshes, axis=-1).mean())
    choice = "step" if errors["step"] <= CURVATURE_GAIN * errors["fixed"] else "fixed"
    log.info("refinement curvature %s: held-out error %.3g at the current point, %.3g fixed",
             choice, errors["step"], errors["fixed"])
    return choice, errors


def served_solve(bundle_path: Path, meshes: np.ndarray, fps: float = 60.0
                 ) -> tuple[np.ndarray, np.ndarray, bool]:
    """meshes (N, V, 3) -> (controls (N, C), fit rms (N,), stabilised) from the served solve."""
    bundle = load_bundle(bundle_path)
    solver = BatchSolver(bundle, threads=2)
    times = np.arange(meshes.shape[0], dtype=np.float64) / fps
    res = solver.solve(meshes, times, SolveOptions(filter="none", fit_error_scope="full"))
    return res.controls, res.fit_rms, bundle.rigid_region  # SolveOptions' default follows it


def check_served(bundle_path: Path, rig: Rig, meshes: np.ndarray, forward_err: float,
                 controls: np.ndarray | None = None) -> ServedCheck:
    """Score the served solve of held-out ``meshes`` (N, V, 3) through the real rig, and probe
    every control alone (``fidelity.recoverability``; ``forward_err`` the forward model's mean
    held-out error, below which a control's mesh effect cannot be told apart); ``controls``
    (N, C), the meshes' true controls when known, add them to the dead-output check."""
    from rigcast.export.quality.fidelity import recoverability

    solved, fit_rms, stabilised = served_solve(bundle_path, meshes)
    rec = recoverability(rig, lambda m: served_solve(bundle_path, m)[0], forward_err)
    skip = {c.name for c in rec.controls if c.reason and not c.reason.startswith("not recovered")}
    dead = [d for d in dead_outputs(load_bundle(bundle_path), rig, meshes, controls)
            if d.control not in skip]
    for d in dead:
        log.warning("inverse output %s is dead: %s", d.control, d.describe())
    err = np.linalg.norm(rig.evaluate(solved) - meshes, axis=-1)
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
        dead_outputs=tuple(asdict(d) for d in dead),
    )


@dataclass(frozen=True)
class DeadOutput:
    """One control the network alone cannot move (see the module docstring). spread_of_range:
    max - min of its output over the poses where it is active, per unit of range; median_logit:
    of its logit there; poses: how many such poses."""

    control: str
    stuck: bool
    saturated: bool
    spread_of_range: float
    median_logit: float
    poses: int

    def describe(self) -> str:
        what = [f"moves {100 * self.spread_of_range:.2g}% of its range"] if self.stuck else []
        if self.saturated:
            what.append(f"logit {self.median_logit:.3g} in the output's flat zone")
        return f"{' and '.join(what)} over {self.poses} poses where it is active"


def network_logits(bundle: Bundle, meshes: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """meshes (N, V, 3) in the neutral's frame -> (controls (N, C), logits (N, C) or None) from the
    bundle's inverse graph alone; the logits are the input of its last Sigmoid (the output's
    scaled sigmoid), None when the graph has no such (N, C) tensor."""
    import onnx
    from rigcast.export.bundling.onnx_export import session

    model = onnx.load_from_string(bundle.inverse_onnx)
    sig = [n for n in model.graph.node if n.op_type == "Sigmoid"]
    name = sig[-1].input[0] if sig else None
    if name is not None:
        model.graph.output.append(onnx.helper.make_tensor_value_info(name, onnx.TensorProto.FLOAT,
                                                                     None))
    x = np.ascontiguousarray(meshes[:, bundle.input_indices], np.float32)
    out = session(model.SerializeToString(), threads=2).run(None, {"mesh": x})
    z = out[1] if len(out) > 1 and out[1].shape == (x.shape[0], len(bundle.schema)) else None
    return out[0], z


def flat_zone(z: np.ndarray, unit_default: np.ndarray, margin: float, band: float) -> np.ndarray:
    """z (N, C) logits; unit_default (C,) the defaults in [0, 1] -> (N, C) True where the scaled
    sigmoid's output has no slope (models.unit_output): s = (1 + 2m) sigmoid(z) - m outside
    [0, 1], or inside the rest band [d - min(b, d/2), d + min(b, (1 - d)/2)]."""
    with np.errstate(over="ignore"):
        s = (1.0 + 2.0 * margin) / (1.0 + np.exp(-np.asarray(z, np.float64))) - margin
    d = np.asarray(unit_default, np.float64)
    lo_edge, hi_edge = d - np.minimum(band, d / 2), d + np.minimum(band, (1 - d) / 2)
    return (s <= 0.0) | (s >= 1.0) | ((s >= lo_edge) & (s <= hi_edge))


def dead_outputs(bundle: Bundle, rig: Rig, meshes: np.ndarray | None = None,
                 controls: np.ndarray | None = None) -> list[DeadOutput]:
    """The controls whose network output is dead (module docstring) on the recoverability
    probes, plus ``meshes`` (N, V, 3) with their true ``controls`` (N, C) when given."""
    from rigcast.export.quality.fidelity import recoverability_probes

    s = rig.schema
    truth = recoverability_probes(s).controls
    poses = rig.evaluate(truth)
    if meshes is not None and controls is not None:
        truth, poses = np.concatenate([truth, controls]), np.concatenate([poses, meshes])
    got, z = network_logits(bundle, poses)
    span = (s.upper - s.lower).astype(np.float64)
    norm = bundle.manifest.get("normalisation", {})
    unit_d = np.clip((s.defaults - s.lower) / span, 0.0, 1.0)
    flat = (flat_zone(z, unit_d, float(norm.get("edge_margin_m", 0.03)),
                      float(norm.get("rest_band_b", 0.04))) if z is not None else None)
    dead = []
    for j, name in enumerate(s.names):
        act = np.abs(truth[:, j] - s.defaults[j]) > STUCK_SPREAD * span[j]
        if not act.any():
            continue
        spread = float(np.ptp(got[act, j]) / span[j])
        stuck = bool(spread <= STUCK_SPREAD)
        saturated = bool(flat[act, j].all()) if flat is not None else False
        if stuck or saturated:
            zm = float(np.median(z[act, j])) if z is not None else float("nan")
            dead.append(DeadOutput(name, stuck, saturated, spread, zm, int(act.sum())))
    return dead
