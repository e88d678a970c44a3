"""Quality report: rigcast's solve against strong per-frame references, on built-in and zoo rigs.

    python bench/quality.py --out DIR [--rigs face,face-linear,arm] [--zoo N | --zoo-seeds A,B]
                            [--clean-poses N] [--quick] [--optim]

For each rig (the built-in ones, then N zoo rigs whose seeds are drawn afresh each run from
os.urandom and printed, so that no one can tune to a fixed set) it builds a bundle with the
default build (timed), then solves, with every method, and scores THROUGH THE REAL RIG:

- the take: a synthetic performance (export/quality/take_synth.py), 600 frames at 60 fps, sensor noise
  0.15 % of D per coordinate, a correlated wobble, planted off-manifold bumps of 1.5 % of D at
  their peak; ``M_mean_err`` is against the clean mesh. A second take with rigid head motion
  scores off-manifold detection on rigs with a rigid region;
- clean poses: 1,000 noise-free held-out sparse poses (``M_clean_*``, ``M_false_active``);
- recoverability: each control alone at 25-100 % of its range (export/quality/fidelity.py).

Methods: ``inverse`` (runtime.solve.batch.BatchSolver with SolveOptions(filter="none"): the solve
exactly as users get it, stabilisation at the options' default), ``inverse_filtered`` (the same
with the default causal filter; take only), ``lsq`` (lsq_linear on the rig linearised at rest),
``nlls`` (bounded per-frame non-linear least squares through the real rig, warm-started), and
with ``--optim`` the old ``optim`` row (projected Adam through the trained forward model).
Writes DIR/quality.json, DIR/quality.md and PNG plots; docs/quality.md explains every field.
"""

from __future__ import annotations

import os

# One BLAS thread: on a shared 2-core machine the solver's small dense algebra runs ~10x slower
# with threads fighting for cores (measured on scipy's SVD of an 11,142 x 46 Jacobian).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse
import dataclasses
import json
import logging
import platform
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import quality_report as qr  # bench/quality_report.py, beside this file
from rigcast.export.data.sampling import SparsityConfig, sample_controls
from rigcast.export.quality import fidelity, metrics
from rigcast.export.quality.baselines import linearise_rig, optimise_frames, solve_lsq, solve_nlls
from rigcast.export.quality.take_synth import SynthTake, synth_take
from rigcast.export.rigs.demo_rigs import DEMO_RIGS
from rigcast.export.rigs.rig import Rig
from rigcast.export.rigs.zoo import make_zoo_rig
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.schema import ControlSchema
from rigcast.runtime.serve.config import filter_defaults
from rigcast.runtime.solve.batch import BatchSolver, SolveOptions
from rigcast.runtime.solve.inference import ForwardModel
from rigcast.runtime.solve.manifold import ManifoldConfig, flag_off_manifold
from rigcast.runtime.solve.one_euro import OneEuroFilter, OneEuroParams
from rigcast.runtime.solve.refine import RefineSettings

log = logging.getLogger("bench.quality")

HELDOUT_SEED = 90_001  # far from the build's sampling seeds
HEADLINE = "take (synthetic performance with sensor noise; error against the true, clean mesh)"
NOISE, WOBBLE, BULGE = 0.0015, 0.001, 0.015  # fractions of the bbox diagonal D


def say(msg: str) -> None:
    print(f"[quality {time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


@dataclass(frozen=True)
class Sizes:
    take_frames: int
    clean_poses: int
    nlls_clean_poses: int
    optim_steps: int
    quick: bool
    optim: bool
    zoo_max_vertices: int
    zoo_max_controls: int
    cache: str | None = None  # a str, so the sizes stay JSON in the report
    refine_current: bool = False
    build_set: tuple[str, ...] = ()  # "inverse.consistency=30": build settings changed (A/B)


@dataclass(frozen=True)
class Solved:
    controls: np.ndarray  # (T, C) float32
    per_frame_s: float
    off_manifold: np.ndarray | None = None  # (T,) bool, the batch solve's flags


# --- building -------------------------------------------------------------------------------


def _quick_config() -> Any:
    """Tiny training for a smoke run; fields the training configs no longer have are skipped."""
    from rigcast.export.bundling.build import BuildConfig
    from rigcast.export.training.train import ForwardConfig, InverseConfig

    def make(cls: Any, **kw: Any) -> Any:
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in kw.items() if k in names})

    return make(BuildConfig, samples=1500, check_samples=32,
                forward=make(ForwardConfig, epochs=8, max_seconds=15.0),
                inverse=make(InverseConfig, steps=250, max_seconds=15.0))


def with_settings(config: Any, assignments: tuple[str, ...]) -> Any:
    """The build config (None: the default) with ``section.field=value`` assignments applied,
    e.g. ``inverse.consistency=30`` (values parsed as JSON, else kept as strings): an A/B of a
    build setting on the same rigs and seeds, with nothing else changed."""
    from rigcast.export.bundling.build import BuildConfig

    config = config if config is not None else BuildConfig()
    for item in assignments:
        key, sep, raw = item.partition("=")
        parts = key.strip().split(".")
        if not sep or len(parts) != 2:
            raise SystemExit(f"--set wants section.field=value, got {item!r}")
        try:
            value = json.loads(raw)
        except json.JSONDecodeError:
            value = raw
        section = getattr(config, parts[0], None)
        if not dataclasses.is_dataclass(section) or parts[1] not in {
                f.name for f in dataclasses.fields(section)}:
            raise SystemExit(f"--set: the build config has no setting {key!r}")
        config = dataclasses.replace(config, **{parts[0]: dataclasses.replace(
            section, **{parts[1]: value})})  # type: ignore[type-var]
    return config


def build(rig: Rig, path: Path, quick: bool, cache: Path | None = None,
          assignments: tuple[str, ...] = ()) -> tuple[Path, Any, float, float]:
    """A bundle from the default build (tiny training with ``quick``; ``assignments`` changed,
    see ``with_settings``): (bundle path, torch forward model or None, the build's forward % of
    D, build seconds). With ``cache``, a build of the same rig and settings is reused (its seconds
    are then the original build's)."""
    from rigcast.export.bundling.build import build_bundle

    t0 = time.perf_counter()
    config = _quick_config() if quick else None
    if assignments:
        config = with_settings(config, assignments)
    result = build_bundle(rig, path, config, cache_dir=cache, progress=_Progress())
    seconds = float(result.seconds) if result.cached else time.perf_counter() - t0
    model = getattr(result, "forward_model", None)
    if model is not None:
        model.eval()
    pct = float(getattr(getattr(result, "forward", None), "mean_err_pct_diag", float("nan")))
    return Path(result.bundle_path), model, pct, seconds


class _Progress:
    """Build progress as plain lines: each stage's start, every ~25%, and its end."""

    def __init__(self) -> None:
        self.last: tuple[str, int] = ("", -1)

    def __call__(self, stage: str, done: int, total: int) -> None:
        quarter = int(4 * done / total) if total else 4
        if (stage, quarter) != self.last:
            self.last = (stage, quarter)
            say(f"  build {stage}: {done}/{total}")


# --- solving --------------------------------------------------------------------------------


def _times(n: int) -> np.ndarray:
    return np.arange(n, dtype=np.float64) / 60.0


def solve_batch(solver: BatchSolver, observed: np.ndarray, times_s: np.ndarray | None = None,
                filtered: bool = False) -> Solved:
    """The runtime's batch solve as ``rigcast solve`` runs it: stabilisation at the options'
    default, unfiltered unless ``filtered`` (then the default causal One Euro filter)."""
    opts = SolveOptions() if filtered else SolveOptions(filter="none")
    res = solver.solve(observed, _times(len(observed)) if times_s is None else times_s, opts)
    return Solved(np.asarray(res.controls, np.float32), res.seconds / len(observed),
                  np.asarray(res.off_manifold, bool))


def solve_inverse(bundle: Bundle, observed: np.ndarray) -> Solved:
    """The solve users get from a bundle, unfiltered (bench/filter_grid.py filters it itself)."""
    return solve_batch(BatchSolver(bundle), observed)


def filter_controls(controls: np.ndarray, times_s: np.ndarray, schema: ControlSchema,
                    settings: tuple[float, float, float] | None = None) -> np.ndarray:
    """(T, C) -> (T, C) through a fresh One Euro filter built the way the server builds it
    (runtime/solve/pipeline.py make_filter: beta per unit of each control's range). ``settings`` is
    (min_cutoff, beta, d_cutoff), by default the server's (runtime/serve/config.py filter_defaults)."""
    params = OneEuroParams.uniform(len(schema), *(settings or filter_defaults()))
    filt = OneEuroFilter(params.per_unit_range(schema.upper - schema.lower))
    out = [filt(c, round(t * 1e9), frame=i)
           for i, (c, t) in enumerate(zip(controls, times_s, strict=True))]
    return np.asarray(out, dtype=np.float32)


def solve_nlls_logged(rig: Rig, observed: np.ndarray, warm: bool, what: str,
                      cache: Path | None = None) -> Solved:
    """Per-frame NLLS through the real rig. With ``cache`` (a folder), the result is kept under
    a key of the rig's fingerprint, the observed meshes and the start, and reused: the reference
    is deterministic, and it is the run's slowest part, so an A/B of build settings on the same
    rigs pays for it once."""
    import hashlib

    path = None
    if cache is not None:
        key = hashlib.sha256(f"{rig.fingerprint()}|{warm}|{observed.shape}".encode()
                             + np.ascontiguousarray(observed, np.float32).tobytes()).hexdigest()
        path = cache / "nlls" / f"{key[:24]}.npz"
        if path.is_file():
            with np.load(path) as z:
                say(f"  nlls {what}: reused {path.name}")
                return Solved(z["controls"], float(z["per_frame_s"]))

    def progress(done: int, total: int) -> None:
        if done % 100 == 0 or done == total:
            say(f"  nlls {what}: {done}/{total}")

    sol = solve_nlls(rig, observed, warm_start=warm, progress=progress)
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        np.savez(path, controls=sol.controls, per_frame_s=sol.per_frame_s)
    return Solved(sol.controls, sol.per_frame_s)


def reference_flags(rig: Rig, solved: Solved, observed: np.ndarray, floor: float) -> np.ndarray:
    """(T,) bool: the runtime's off-manifold rule (manifold.flag_off_manifold, the bundle's
    floor) fed each frame's worst vertex of the observed mesh against the real rig at the
    reference's controls. What the rule can do at best: a planted bump the rig can explain
    (many controls, a bump inside their span) leaves no residual for any solve to flag."""
    fit = metrics.vertex_error(rig.evaluate(solved.controls), observed).per_frame_max
    return flag_off_manifold(fit, ManifoldConfig(floor=floor))


def take_weights(schema: ControlSchema) -> np.ndarray:
    """(C,) expression pick weights: jaw controls 4x as likely (a speech-like take; a take where
    the jaw never opens would not exercise a face's skinned, non-linear part)."""
    return np.array([4.0 if g == "jaw" else 1.0 for g in schema.groups])


def talk_control(schema: ControlSchema) -> int | None:
    """Index of the jaw-opening control that speaks through the take (``speech_track``), or None
    for a rig without one."""
    for name in ("jaw_drop", "jaw_open"):
        if name in schema.names:
            return schema.names.index(name)
    return None


def make_take(rig: Rig, frames: int, head_motion: bool) -> SynthTake:
    s = rig.schema
    return synth_take(rig, frames=frames, fps=60.0, seed=8 if head_motion else 7,
                      noise_sigma=NOISE, wobble_sigma=WOBBLE, bulge_size=BULGE,
                      off_manifold_frames=max(2, frames // 30), head_motion=head_motion,
                      pick_weights=take_weights(s), talk_control=talk_control(s))


# --- scoring --------------------------------------------------------------------------------


def score_take(rig: Rig, solved: Solved, take: SynthTake, diag: float) -> dict[str, Any]:
    s = rig.schema
    mesh = rig.evaluate(solved.controls)
    err = metrics.vertex_error(mesh, take.vertices_clean)
    seen = metrics.vertex_error(mesh, take.vertices)
    ctrl = metrics.control_error(solved.controls, take.controls_true, s.lower, s.upper)
    return {
        "mean_err": err.mean,
        "max_err": err.max,
        "mean_err_pct_diag": 100.0 * err.mean / diag,
        "observed_mean_err": seen.mean,
        "control_err": ctrl.mean_abs,
        "control_err_norm": ctrl.mean_abs_norm,
        "active": float(metrics.active_controls(solved.controls, s.defaults, s.lower,
                                                s.upper).mean()),
        "jitter": metrics.jitter(solved.controls, s.lower, s.upper),
        "jitter_vs_truth": fidelity.jitter_vs_truth(solved.controls, take.controls_true, s),
        "ms_per_frame": 1e3 * solved.per_frame_s,
        "per_frame_err_observed": seen.per_frame_mean,
    }


def score_clean(rig: Rig, solved: Solved, truth: np.ndarray, meshes: np.ndarray,
                diag: float) -> dict[str, Any]:
    s = rig.schema
    err = fidelity.mesh_error(rig, solved.controls, meshes)
    return {
        "clean_mean_err": err.mean,
        "clean_max_err": err.worst_frame,
        "clean_max_vertex_err": err.max_vertex,
        "clean_mean_err_pct_diag": 100.0 * err.mean / diag,
        "false_active": fidelity.false_active(solved.controls, truth, s),
        "clean_ms_per_frame": 1e3 * solved.per_frame_s,
        "clean_poses": len(truth),
    }


def forward_error(bundle: Bundle, rig: Rig, controls: np.ndarray) -> float:
    """The bundle's forward ONNX against the real rig (mean vertex error, mesh units)."""
    pred = ForwardModel(bundle, threads=1).evaluate(controls.astype(np.float32))
    return metrics.vertex_error(pred, rig.evaluate(controls)).mean


# --- one rig --------------------------------------------------------------------------------


def make_rig(name: str, sizes: Sizes) -> tuple[Rig, dict[str, Any]]:
    """A built-in rig by name, or ``zoo-SEED``; with the entry fields that say which."""
    if name.startswith("zoo-"):
        rig = make_zoo_rig(int(name[4:]), max_vertices=sizes.zoo_max_vertices,
                           max_controls=sizes.zoo_max_controls)
        return rig, {"zoo": True, "seed": int(name[4:]), "zoo_spec": dataclasses.asdict(rig.spec),
                     "rigid_region": rig.rigid_region}
    # Built-ins: the faces' back of the head never moves (no shape reaches it, the jaw's skin
    # weights are 0 there); every vertex of the arm is skinned to a moving joint.
    return DEMO_RIGS[name](), {"zoo": False, "rigid_region": name != "arm"}


def run_rig(name: str, out: Path, sizes: Sizes) -> dict[str, Any]:
    rig, entry = make_rig(name, sizes)
    s = rig.schema
    diag = metrics.bbox_diagonal(rig.neutral)
    say(f"{name}: {rig.vertex_count} vertices, {rig.control_count} controls, "
        f"linear={rig.linear}, rigid region={entry['rigid_region']}")
    cache = Path(sizes.cache) if sizes.cache else None
    path, forward, build_pct, build_s = build(rig, out / "bundles" / f"{name}.rigcast",
                                              sizes.quick, cache, sizes.build_set)
    say(f"{name}: built in {build_s:.1f}s")
    bundle = load_bundle(path)
    solver = BatchSolver(bundle)
    refiner = solver.inverse.refiner
    if sizes.refine_current and refiner is not None:
        refiner.settings = RefineSettings()  # the runtime's defaults, not the bundle's record
    entry["refine_settings"] = dataclasses.asdict(refiner.settings) if refiner else None
    lin = linearise_rig(rig)
    truth_c = sample_controls(s, sizes.clean_poses, sparsity=SparsityConfig(), seed=HELDOUT_SEED)
    mesh_c = rig.evaluate(truth_c)
    take = make_take(rig, sizes.take_frames, head_motion=False)
    fwd_err = forward_error(bundle, rig, truth_c[:256])

    say(f"{name}: take ({take.frames} frames)")
    tk: dict[str, Solved] = {"inverse": solve_batch(solver, take.vertices, take.times_s),
                             "inverse_filtered": solve_batch(solver, take.vertices, take.times_s,
                                                             filtered=True)}
    lsq = solve_lsq(lin, take.vertices, s.lower, s.upper)
    tk["lsq"] = Solved(lsq.controls, lsq.per_frame_s)
    tk["nlls"] = solve_nlls_logged(rig, take.vertices, True, "take", cache)
    if sizes.optim and forward is not None:
        opt = optimise_frames(forward, take.vertices, s.lower, s.upper, s.defaults,
                              steps=sizes.optim_steps)
        tk["optim"] = Solved(opt.controls, opt.per_frame_s)

    say(f"{name}: clean poses ({len(truth_c)}; nlls on the first {sizes.nlls_clean_poses})")
    cl = {"inverse": solve_batch(solver, mesh_c)}
    lsq = solve_lsq(lin, mesh_c, s.lower, s.upper)
    cl["lsq"] = Solved(lsq.controls, lsq.per_frame_s)
    n_nlls = min(sizes.nlls_clean_poses, len(truth_c))
    cl["nlls"] = solve_nlls_logged(rig, mesh_c[:n_nlls], False, "clean poses", cache)

    say(f"{name}: recoverability ({rig.control_count} controls)")
    rec = fidelity.recoverability(rig, lambda m: solve_batch(solver, m).controls, fwd_err)
    off = fidelity.off_manifold_score(tk["inverse"].off_manifold, take.off_manifold)
    off_ref = fidelity.off_manifold_score(
        reference_flags(rig, tk["nlls"], take.vertices, solver.model.floor), take.off_manifold)
    entry |= {
        "linear": bool(rig.linear),
        "vertices": rig.vertex_count,
        "controls": rig.control_count,
        "bbox_diagonal": diag,
        "headline_data": HEADLINE,
        "take_frames": take.frames,
        "take_off_manifold_frames": int(take.off_manifold.sum()),
        "heldout_poses": len(truth_c),
        "nlls_clean_poses": n_nlls,
        "build_seconds": build_s,
        "forward_mean_err": fwd_err,
        "forward_mean_err_pct_diag": 100.0 * fwd_err / diag,
        "forward_build_report_pct_diag": build_pct,
        "lsq_linearise_seconds": lin.seconds,
        "truth_active": float(metrics.active_controls(take.controls_true, s.defaults, s.lower,
                                                      s.upper).mean()),
        "truth_jitter": metrics.jitter(take.controls_true, s.lower, s.upper),
        "noise_floor_mean_err": metrics.vertex_error(take.vertices_clean, take.vertices).mean,
        "heldout_truth_active": float(metrics.active_controls(truth_c, s.defaults, s.lower,
                                                              s.upper).mean()),
        "recoverable_controls": rec.recoverable,
        "unrecoverable": rec.unrecoverable,
        "lost_controls": rec.lost,
        "offmanifold_recall": off.recall,
        "offmanifold_false_rate": off.false_rate,
        "nlls_offmanifold_recall": off_ref.recall,
        "nlls_offmanifold_false_rate": off_ref.false_rate,
        "offmanifold_head_recall": None,
        "offmanifold_head_false_rate": None,
    }
    if entry["rigid_region"]:
        head = make_take(rig, sizes.take_frames, head_motion=True)
        say(f"{name}: take with head motion ({head.frames} frames)")
        hs = solve_batch(solver, head.vertices, head.times_s)
        off_h = fidelity.off_manifold_score(hs.off_manifold, head.off_manifold)
        entry |= {"offmanifold_head_recall": off_h.recall,
                  "offmanifold_head_false_rate": off_h.false_rate,
                  "inverse_head_mean_err": metrics.vertex_error(
                      rig.evaluate(hs.controls), head.vertices_clean).mean}
    else:
        entry["head_motion_note"] = ("no rigid region: rigid head motion cannot be told from "
                                     "the controls' own motion, so no head-motion take")
    figs_t = {m: score_take(rig, v, take, diag) for m, v in tk.items()}
    for m, f in figs_t.items():
        for k, v in f.items():
            if k == "observed_mean_err":
                entry[f"observed_{m}_mean_err"] = v
            elif not k.startswith("per_frame"):
                entry[f"{m}_{k}"] = v
    for m, v in cl.items():
        f = score_clean(rig, v, truth_c[: len(v.controls)], mesh_c[: len(v.controls)], diag)
        for k, val in f.items():
            entry[f"{m}_{k}"] = val
        # the names the report has used since the first quality issue
        entry[f"heldout_{m}_mean_err"] = f["clean_mean_err"]
        entry[f"heldout_{m}_max_err"] = f["clean_max_vertex_err"]
        entry[f"heldout_{m}_mean_err_pct_diag"] = f["clean_mean_err_pct_diag"]
        entry[f"heldout_{m}_active"] = float(metrics.active_controls(
            v.controls, s.defaults, s.lower, s.upper).mean())
        entry[f"heldout_{m}_ms_per_frame"] = f["clean_ms_per_frame"]
    entry["acceptance"] = qr.acceptance(name, entry)
    influence = np.linalg.norm(lin.jacobian, axis=0)
    qr.plot_take(out / f"take_{name}.png", name, s.names, s.defaults, take.controls_true,
                 take.times_s, take.off_manifold, {m: v.controls for m, v in tk.items()},
                 {m: f["per_frame_err_observed"] for m, f in figs_t.items()}, influence)
    return entry


def _git_state() -> str:
    """HEAD and whether the work tree differs from it: the models change while others work."""
    import subprocess

    root = Path(__file__).resolve().parent.parent
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, check=True,
                              capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"],
                               cwd=root, check=True, capture_output=True, text=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return head + (" (with uncommitted changes)" if dirty.strip() else "")


def fresh_seeds(n: int) -> list[int]:
    """n zoo seeds from os.urandom mixed with the clock: a new sample of rigs every run."""
    mix = np.random.SeedSequence([int.from_bytes(os.urandom(8), "little"), time.time_ns()])
    return [int(x) for x in np.random.default_rng(mix).integers(0, 1_000_000, size=n)]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, required=True, help="folder for quality.json/.md and PNGs")
    ap.add_argument("--rigs", default=",".join(DEMO_RIGS),
                    help="comma-separated built-in rigs ('' for none)")
    ap.add_argument("--zoo", type=int, default=3, help="zoo rigs with fresh random seeds")
    ap.add_argument("--zoo-seeds", default=None, help="comma-separated zoo seeds to replay "
                    "(instead of --zoo)")
    ap.add_argument("--clean-poses", type=int, default=1000, help="noise-free held-out poses")
    ap.add_argument("--nlls-clean-poses", type=int, default=200,
                    help="how many of them per-frame non-linear least squares also solves")
    ap.add_argument("--take-frames", type=int, default=600)
    ap.add_argument("--optim", action="store_true", help="add the old per-frame Adam row")
    ap.add_argument("--quick", action="store_true", help="small sizes for a smoke run")
    ap.add_argument("--cache", type=Path, default=None,
                    help="build cache folder: rebuilds of the same rig and settings are reused "
                    "(to re-score after a runtime change)")
    ap.add_argument("--refine-current", action="store_true",
                    help="solve with the runtime's current refinement defaults instead of those "
                    "each bundle recorded (re-scores cached builds after a runtime change)")
    ap.add_argument("--set", dest="build_set", action="append", default=[],
                    metavar="SECTION.FIELD=VALUE",
                    help="change one build setting for every rig (repeatable), e.g. "
                    "inverse.consistency=30: an A/B on the same seeds")
    ap.add_argument("--dry-run", action="store_true", help="print the rigs and seeds, then stop")
    args = ap.parse_args(argv)
    names = [n for n in args.rigs.split(",") if n]
    unknown = [n for n in names if n not in DEMO_RIGS]
    if unknown:
        ap.error(f"unknown rig(s) {unknown}; choose from {sorted(DEMO_RIGS)}")
    try:
        seeds = ([int(x) for x in args.zoo_seeds.split(",") if x] if args.zoo_seeds is not None
                 else fresh_seeds(args.zoo))
    except ValueError:
        ap.error(f"--zoo-seeds must be comma-separated integers, got {args.zoo_seeds!r}")
    if any(x < 0 for x in seeds) or args.zoo < 0 or args.clean_poses < 1:
        ap.error("zoo seeds, --zoo and --clean-poses must be non-negative (poses at least 1)")
    names += [f"zoo-{x}" for x in seeds]
    cache = str(args.cache) if args.cache else None
    if args.quick:
        sizes = Sizes(take_frames=120, clean_poses=min(args.clean_poses, 48), nlls_clean_poses=16,
                      optim_steps=60, quick=True, optim=args.optim, zoo_max_vertices=1200,
                      zoo_max_controls=12, cache=cache,
                      refine_current=args.refine_current, build_set=tuple(args.build_set))
    else:
        sizes = Sizes(take_frames=args.take_frames, clean_poses=args.clean_poses,
                      nlls_clean_poses=args.nlls_clean_poses, optim_steps=250, quick=False,
                      optim=args.optim, zoo_max_vertices=20000, zoo_max_controls=150,
                      cache=cache, refine_current=args.refine_current,
                      build_set=tuple(args.build_set))
    say(f"zoo seeds this run: {seeds} (replay with --zoo-seeds {','.join(map(str, seeds))})")
    print(f"zoo seeds: {seeds}", flush=True)
    if args.dry_run:
        print(f"rigs: {names}")
        return 0
    logging.basicConfig(level=logging.WARNING)
    args.out.mkdir(parents=True, exist_ok=True)
    rigs: dict[str, dict[str, Any]] = {}
    meta = {"when": time.strftime("%Y-%m-%d %H:%M:%S"), "quick": args.quick,
            "machine": f"{platform.machine()}, {platform.python_version()}",
            "headline_data": HEADLINE, "sizes": dataclasses.asdict(sizes), "git": _git_state(),
            "zoo_seeds": seeds}
    for name in names:
        rigs[name] = run_rig(name, args.out, sizes)
        print("\n".join(qr.rig_table(name, rigs[name])), flush=True)
        # Rewritten after every rig, so a long run shows its figures as they come.
        (args.out / "quality.json").write_text(json.dumps({"rigs": rigs, "meta": meta},
                                                          indent=2))
    qr.plot_errors(args.out / "errors.png", rigs)
    (args.out / "quality.md").write_text(qr.report_md(rigs, meta))
    failed = sum(qr.section3_failures(e) for e in rigs.values())
    worst = qr.worst_rig(rigs)
    if worst is not None:
        print(f"worst rig: {worst} ({qr.section3_failures(rigs[worst])} section-3 check(s) "
              "failed)")
    print(f"wrote {args.out / 'quality.json'}, quality.md and plots; {failed} section-3 "
          "check(s) failed over all rigs")
    return 0


if __name__ == "__main__":
    sys.exit(main())
