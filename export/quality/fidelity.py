"""Fidelity checks of a solve, measured through the real rig: reusable by the build and the
quality bench.

A *solve* is any callable ``solve(meshes (N, V, 3)) -> controls (N, C)``: the bundle's batch
solve, bounded least squares, per-frame non-linear least squares. The checks:

- ``recoverability``: each control alone at 25, 50, 75 and 100 % of the way from its default to
  each bound with room, noise-free, solved; a control is recoverable when every probe comes back
  within 5 % of its range. An unrecoverable control gets a reason (below the forward model's
  error, the same mesh as another control, or simply not recovered).
- ``false_active``: controls the solve moves (|w - default| > 1 % of range) that are at rest in
  truth, per pose.
- ``jitter_vs_truth``: RMS second difference of (solve - truth) per unit of range.
- ``mesh_error``: mean and worst-frame vertex error of the solved controls re-rendered through
  the real rig.
- ``off_manifold_score``: recall on planted off-manifold frames and the false rate elsewhere.

The 5 % and 1 % thresholds are the acceptance limits of issue 12 (common practice, no source).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.export.quality import metrics
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.schema import ControlSchema

log = logging.getLogger(__name__)

Solve = Callable[[np.ndarray], np.ndarray]

FRACTIONS = (0.25, 0.5, 0.75, 1.0)
RECOVER_TOLERANCE = 0.05  # of each control's range
#: Two controls make "the same mesh" when one's full-range displacement is reproduced by the
#: other's, scaled within its range, to this relative residual (common practice, no source).
SAME_MESH_RESIDUAL = 0.1
#: Truth counts as "at rest" within this fraction of the range of the default.
REST_TOLERANCE = 1e-6


class FidelityError(RigcastError, ValueError):
    """A fidelity check got inconsistent inputs; the message names the bad value."""


@dataclass(frozen=True)
class Probes:
    """Single-control poses. controls (P, C); control (P,) index probed; side (P,) +1 toward the
    upper bound, -1 toward the lower; fraction (P,) of the way from the default to that bound."""

    controls: np.ndarray
    control: np.ndarray
    side: np.ndarray
    fraction: np.ndarray


def recoverability_probes(schema: ControlSchema,
                          fractions: tuple[float, ...] = FRACTIONS) -> Probes:
    """Each control alone, the others at default, at each fraction of the way to each bound that
    has room (a default on a bound has one side)."""
    lo, hi, d = (schema.lower.astype(np.float64), schema.upper.astype(np.float64),
                 schema.defaults.astype(np.float64))
    rows, index, sides, fracs = [], [], [], []
    for i in range(len(schema)):
        for side, bound in ((1, hi[i]), (-1, lo[i])):
            if abs(bound - d[i]) <= REST_TOLERANCE * (hi[i] - lo[i]):
                continue
            for f in fractions:
                w = d.copy()
                w[i] = d[i] + f * (bound - d[i])
                rows.append(w)
                index.append(i)
                sides.append(side)
                fracs.append(f)
    return Probes(np.array(rows), np.array(index), np.array(sides), np.array(fracs))


@dataclass(frozen=True)
class ControlRecovery:
    """One control: ``recovered`` when every probe came back within the tolerance; ``worst`` the
    largest |solved - probed| / range over its probes (and the probe value it was, with what came
    back); ``effect`` its largest vertex displacement at 100 % (either side); ``reason`` why not
    (empty when recovered)."""

    name: str
    recovered: bool
    worst: float
    worst_target: float
    worst_got: float
    effect: float
    reason: str = ""


@dataclass(frozen=True)
class Recoverability:
    controls: tuple[ControlRecovery, ...]

    @property
    def recovered(self) -> np.ndarray:
        """(C,) bool per control."""
        return np.array([c.recovered for c in self.controls])

    @property
    def recoverable(self) -> list[str]:
        return [c.name for c in self.controls if c.recovered]

    @property
    def unrecoverable(self) -> list[dict[str, str]]:
        return [{"control": c.name, "reason": c.reason} for c in self.controls if not c.recovered]

    @property
    def lost(self) -> list[str]:
        """Controls above the forward model's error, with no twin, that were not recovered: the
        ones the issue's check counts against a solve."""
        return [c.name for c in self.controls if c.reason.startswith("not recovered")]

    def to_dict(self) -> dict[str, Any]:
        return {"recoverable": self.recoverable, "unrecoverable": self.unrecoverable,
                "per_control": {c.name: {"recovered": c.recovered, "worst_err_of_range": c.worst,
                                         "effect": c.effect} for c in self.controls}}


def same_mesh_twins(fields: np.ndarray, residual: float = SAME_MESH_RESIDUAL) -> list[list[int]]:
    """fields: (C, 2, V*3) each control's displacement at 100 % toward its upper (0) and lower (1)
    bound (zeros where a side has no room). returns, per control i, the controls j != i such that
    some side of i is reproduced by a * (a side of j) with 0 <= a <= 1 to ``residual`` relative
    error: j, moved within its own range, makes the same mesh."""
    c = fields.shape[0]
    flat = fields.reshape(c * 2, -1)
    sq = np.einsum("kn,kn->k", flat, flat)  # (2C,)
    dots = flat @ flat.T  # (2C, 2C)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.clip(dots / sq[None, :], 0.0, 1.0)  # a[p, q]: best scale of field q for field p
        # |p - a q|^2 = |p|^2 - 2 a <p, q> + a^2 |q|^2, relative to |p|^2
        rel = (sq[:, None] - 2 * a * dots + a * a * sq[None, :]) / sq[:, None]
    close = (rel <= residual**2) & (sq[:, None] > 0) & (sq[None, :] > 0)
    owner = np.arange(2 * c) // 2
    out: list[list[int]] = []
    for i in range(c):
        hits = np.flatnonzero(close[2 * i : 2 * i + 2].any(axis=0))
        out.append(sorted({int(owner[q]) for q in hits if owner[q] != i}))
    return out


def recoverability(rig: Rig, solve: Solve, forward_err: float, *,
                   tolerance: float = RECOVER_TOLERANCE,
                   fractions: tuple[float, ...] = FRACTIONS) -> Recoverability:
    """Probe every control alone (``recoverability_probes``), solve the noise-free meshes, and
    say per control whether every probe came back within ``tolerance`` of its range.

    ``forward_err``: the forward model's mean vertex error (mesh units); a control whose mean
    vertex displacement at 100 % is below it is reported as such rather than as lost.
    """
    s = rig.schema
    probes = recoverability_probes(s, fractions)
    meshes = rig.evaluate(probes.controls)
    got = np.asarray(solve(meshes), dtype=np.float64)
    if got.shape != probes.controls.shape:
        raise FidelityError(f"solve returned {got.shape}, expected {probes.controls.shape}")
    span = (s.upper - s.lower).astype(np.float64)
    rows = np.arange(len(probes.control))
    target = probes.controls[rows, probes.control]
    err = np.abs(got[rows, probes.control] - target) / span[probes.control]
    neutral = rig.neutral.astype(np.float64)
    fields = np.zeros((len(s), 2, neutral.size))
    full = probes.fraction == 1.0
    for p in np.flatnonzero(full):
        side = 0 if probes.side[p] > 0 else 1
        fields[probes.control[p], side] = (meshes[p].astype(np.float64) - neutral).reshape(-1)
    # The peak displacement, not the mesh average: a small, local shape (an eyelid) moves few
    # vertices a lot, and it is lost only if even its largest move hides in the forward error.
    effect = np.linalg.norm(fields.reshape(len(s), 2, -1, 3), axis=3).max(axis=(1, 2))
    twins = same_mesh_twins(fields)
    out = []
    for i, name in enumerate(s.names):
        mine = np.flatnonzero(probes.control == i)
        if mine.size == 0:  # no room on either side: nothing to recover
            out.append(ControlRecovery(name, True, 0.0, float(s.defaults[i]),
                                       float(s.defaults[i]), 0.0))
            continue
        k = mine[int(np.argmax(err[mine]))]
        ok = bool(err[k] <= tolerance)
        reason = ""
        if not ok:
            if effect[i] < forward_err:
                reason = (f"mesh effect below the forward model's error ({effect[i]:.3g} < "
                          f"{forward_err:.3g})")
            elif twins[i]:
                reason = f"same mesh as control {s.names[twins[i][0]]}"
            else:
                reason = f"not recovered (got {got[k, i]:.3g} for {target[k]:.3g})"
        out.append(ControlRecovery(name, ok, float(err[k]), float(target[k]), float(got[k, i]),
                                   float(effect[i]), reason))
    result = Recoverability(tuple(out))
    log.info("recoverability on %s: %d of %d controls; lost %s", rig.name,
             len(result.recoverable), len(s), result.lost)
    return result


def false_active(pred: np.ndarray, truth: np.ndarray, schema: ControlSchema,
                 fraction: float = metrics.ACTIVE_FRACTION) -> float:
    """pred, truth: (N, C) -> mean per pose of the controls at rest in truth (within
    ``REST_TOLERANCE`` of the range of the default) that the solve moved by more than
    ``fraction`` of their range."""
    pred, truth = np.asarray(pred, np.float64), np.asarray(truth, np.float64)
    if pred.shape != truth.shape or pred.ndim != 2 or pred.shape[1] != len(schema):
        raise FidelityError(f"false_active: pred {pred.shape} and truth {truth.shape} must both "
                            f"be (N, {len(schema)})")
    d = schema.defaults.astype(np.float64)
    span = (schema.upper - schema.lower).astype(np.float64)
    rest = np.abs(truth - d) <= REST_TOLERANCE * span
    moved = np.abs(pred - d) > fraction * span
    return float((rest & moved).sum(axis=1).mean())


def false_active_naive(pred: np.ndarray, truth: np.ndarray, schema: ControlSchema,
                       fraction: float = metrics.ACTIVE_FRACTION) -> float:
    """Loop twin of ``false_active``."""
    total = 0
    for p_row, t_row in zip(pred, truth, strict=True):
        for c, ctl in enumerate(schema.controls):
            span = ctl.maximum - ctl.minimum
            at_rest = abs(float(t_row[c]) - ctl.default) <= REST_TOLERANCE * span
            total += at_rest and abs(float(p_row[c]) - ctl.default) > fraction * span
    return total / len(pred)


def jitter_vs_truth(pred: np.ndarray, truth: np.ndarray, schema: ControlSchema) -> float:
    """pred, truth: (T, C), T >= 3 -> RMS over frames and controls of the second difference of
    (pred - truth), per unit of each control's range (``metrics.jitter`` of the error): the
    solve's own jitter, not the performance's motion."""
    pred, truth = np.asarray(pred, np.float64), np.asarray(truth, np.float64)
    if pred.shape != truth.shape:
        raise FidelityError(f"jitter_vs_truth: pred {pred.shape} vs truth {truth.shape}")
    return metrics.jitter(pred - truth, schema.lower, schema.upper)


@dataclass(frozen=True)
class MeshErrorStats:
    """Through the real rig: ``mean`` over frames and vertices; ``worst_frame`` the largest
    per-frame mean; ``max_vertex`` the largest single vertex distance; ``per_frame`` (N,)."""

    mean: float
    worst_frame: float
    max_vertex: float
    per_frame: np.ndarray


def mesh_error(rig: Rig, controls: np.ndarray, reference: np.ndarray) -> MeshErrorStats:
    """controls (N, C) rendered by the real rig against reference meshes (N, V, 3)."""
    err = metrics.vertex_error(rig.evaluate(controls), reference)
    return MeshErrorStats(err.mean, float(err.per_frame_mean.max()), err.max, err.per_frame_mean)


@dataclass(frozen=True)
class OffManifoldScore:
    """recall: share of planted frames flagged (NaN with none planted); false_rate: share of the
    other frames flagged (NaN with none)."""

    recall: float
    false_rate: float
    planted: int
    flagged: int


def off_manifold_score(flags: np.ndarray, planted: np.ndarray) -> OffManifoldScore:
    """flags, planted: (T,) bool."""
    f, p = np.asarray(flags, bool), np.asarray(planted, bool)
    if f.shape != p.shape or f.ndim != 1:
        raise FidelityError(f"off_manifold_score: flags {f.shape} vs planted {p.shape}")
    recall = float(f[p].mean()) if p.any() else float("nan")
    false_rate = float(f[~p].mean()) if (~p).any() else float("nan")
    return OffManifoldScore(recall, false_rate, int(p.sum()), int(f.sum()))
