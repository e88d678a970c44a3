"""Batch-solve throughput on the demo face model.

    python bench/batch.py --out DIR [--frames 20000] [--repeats 5] [--fit-error subset|full|off]
                          [--bundle PATH | --synthetic]

Builds (or reuses, cached under DIR/cache) the demo face bundle, makes a synthetic take of the
real rig with head motion, noise and planted off-manifold frames (2,000 distinct frames tiled to
``--frames``), and solves it with ``rigcast.runtime.solve.batch`` with the default options (stabilise,
causal One Euro, clamp, fit error in the ``--fit-error`` mode, adaptive off-manifold flags). In
the same run it measures every fit-error mode, and three baselines on the same frames: the same
solve on one thread (the chunks in order, no pool; its result must equal the pool's bit for bit,
and the bench says whether it does), the inverse model alone (``InverseModel.solve``: the network
and the refinement's first pass through onnxruntime, with no stabilisation, realignment or fit
error; pre-gathered inputs, same batch size, one thread: the sessions run one intra-op
thread each; JSON ``baseline_raw_inverse_fps``) and the live per-frame pipeline
one frame at a time. Beside wall-clock frames/s it gives the process's CPU time per frame (all
threads), which a machine loaded by others disturbs less, its split by stage (each stage's
thread CPU time, ``BatchSolve.stage_cpu_s``), onnxruntime's share of the one-thread solve (the
graphs' arithmetic: the rate it allows on all cores bounds any batch solve of this bundle), and
the load average. It scores the
off-manifold flags against the planted frames (of the first 2,000). Prints the figures and writes
DIR/batch.json.

``--synthetic`` uses a small hand-built bundle (export/bundling/synthetic_bundle.py) instead of the demo
face, so the script runs in seconds (the bench's smoke test); its figures say nothing about the
demo rig.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import time
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.solve.batch import (
    FIT_ERROR_SCOPES,
    STAGES,
    BatchSolver,
    SolveOptions,
    all_cores,
)
from rigcast.runtime.solve.pipeline import StreamState
from rigcast.runtime.solve.solve_core import open_model

from rigcast.solving.forward_subset import slice_forward_graph

DISTINCT_FRAMES = 2000


def demo_bundle(out: Path) -> tuple[Bundle, Any, float]:
    """The demo face bundle from the build's cache under ``out/cache``; (bundle, rig, seconds)."""
    from rigcast.export.bundling.build import BuildConfig, build_bundle
    from rigcast.export.rigs.demo_rigs import tamsin_face

    cache = out / "cache"
    start = time.perf_counter()
    rig = tamsin_face()
    result = build_bundle(rig, cache / "tamsin_face.rcb", BuildConfig(), cache_dir=cache)
    return load_bundle(result.bundle_path), rig, time.perf_counter() - start


def synthetic_bundle(out: Path) -> tuple[Bundle, Any, float]:
    """A small synthetic bundle (no training): 900 vertices, 8 controls, exact inverse."""
    from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig

    start = time.perf_counter()
    path = build_synthetic_bundle(out / "synthetic.rcb", vertices=900, controls=8, inputs=120,
                                  stable=40, seed=0, inverse="lstsq", fit_rms=1e-4)
    rig = make_synthetic_rig(900, 8, inputs=120, stable=40, seed=0)
    return load_bundle(path), rig, time.perf_counter() - start


def make_take(rig: Any, distinct: int, frames: int, fps: float = 60.0
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(vertices (frames, V, 3), times (frames,), planted off-manifold (distinct,) bool)."""
    from rigcast.export.quality.take_synth import synth_take

    take = synth_take(rig, frames=distinct, fps=fps, seed=3, head_motion=True,
                      off_manifold_frames=max(1, distinct // 150))
    reps = -(-frames // distinct)
    verts = np.concatenate([take.vertices] * reps)[:frames]
    return np.ascontiguousarray(verts, np.float32), np.arange(frames) / fps, take.off_manifold


def per_frame_fps(bundle: Bundle, verts: np.ndarray, times: np.ndarray) -> float:
    """The live server's per-frame code (runtime/solve/pipeline.py StreamState: the solve core on a
    batch of one, encoding the controls message, then the fit error on every vertex as the
    server computes it after the publish), 1 thread, no sockets."""
    state = StreamState(StreamConfig(stream="bench"), open_model(bundle, label="bench",
                                                                  threads=1), window=1000)
    sent: list[list[bytes]] = []
    start = time.perf_counter()
    for i, frame in enumerate(verts):
        mesh = protocol.MeshFrame("bench", i, round(times[i] * 1e9), frame)
        result = state.process(mesh, 0, 0, 0, sent.append)
        state.fit(result, frame)
        sent.clear()
    return verts.shape[0] / (time.perf_counter() - start)


def time_sessions(solver: BatchSolver) -> list[float]:
    """Wraps ``run`` of each onnxruntime session of ``solver`` (on the session objects, so only
    this solver's calls): the returned one-item list gathers their thread CPU time, seconds.
    The moment form's projection and refinement sessions are reached through it; an older
    bundle's refinement session is not, so its figure leaves that graph out."""
    spent = [0.0]
    form = solver.inverse.moment_form
    found = [solver.inverse.session, solver.forward.session,
             *((form.project, form.refine) if form is not None else ())]
    for session in {id(s): s for s in found}.values():
        def timed(*args: Any, _run: Any = session.run, **kwargs: Any) -> Any:
            start = time.thread_time()
            try:
                return _run(*args, **kwargs)
            finally:
                spent[0] += time.thread_time() - start

        session.run = timed
    return spent


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--frames", type=int, default=20000)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--batch-size", type=int, default=1024)
    ap.add_argument("--threads", type=int, default=None,
                    help="chunks solved at once (default: all cores); the one-thread path is "
                         "measured beside it in the same run")
    ap.add_argument("--fit-error", choices=FIT_ERROR_SCOPES, default="full",
                    help="which vertices the fit error of the headline figure reads (default: full)")
    source = ap.add_mutually_exclusive_group()
    source.add_argument("--bundle", type=Path, default=None,
                        help="use this demo-face bundle, skip the build")
    source.add_argument("--synthetic", action="store_true",
                        help="a small synthetic bundle instead of the demo face (smoke runs)")
    ap.add_argument("--per-frame-frames", type=int, default=2000,
                    help="frames of the live per-frame baseline")
    args = ap.parse_args()
    logging.basicConfig(level=logging.WARNING)
    args.out.mkdir(parents=True, exist_ok=True)

    if args.synthetic:
        bundle, rig, build_s = synthetic_bundle(args.out)
    elif args.bundle:
        from rigcast.export.rigs.demo_rigs import tamsin_face

        bundle, rig, build_s = load_bundle(args.bundle), tamsin_face(), 0.0
    else:
        bundle, rig, build_s = demo_bundle(args.out)
    distinct = min(DISTINCT_FRAMES, args.frames)
    verts, times, planted = make_take(rig, distinct, args.frames)
    threads = args.threads or all_cores()
    solver = BatchSolver(bundle, threads=threads, subset_graph=slice_forward_graph)
    bs = args.batch_size
    headline = SolveOptions(batch_size=bs, fit_error_scope=args.fit_error)
    for mode in FIT_ERROR_SCOPES:  # warm-up: sessions, subsets, thread pools
        solver.solve(verts[: min(bs, args.frames)], times[: min(bs, args.frames)],
                     SolveOptions(batch_size=bs, fit_error_scope=mode))

    one_thread = BatchSolver(bundle, threads=1, subset_graph=slice_forward_graph)
    one_thread.solve(verts[: min(bs, args.frames)], times[: min(bs, args.frames)], headline)
    ort_spent = time_sessions(one_thread)
    ort_us: list[float] = []  # onnxruntime's share of the one-thread runs, per frame

    fps_by_mode: dict[str, list[float]] = {m: [] for m in FIT_ERROR_SCOPES}
    cpu_us: list[float] = []  # process CPU time per frame of the headline runs, all threads
    stage_us: dict[str, list[float]] = {s: [] for s in STAGES}  # headline runs, per frame
    serial: list[float] = []
    serial_cpu_us: list[float] = []
    for _ in range(args.repeats):
        for mode in FIT_ERROR_SCOPES:  # interleaved, so machine noise hits every mode alike
            options = SolveOptions(batch_size=bs, fit_error_scope=mode)
            cpu = time.process_time()
            run = solver.solve(verts, times, options)
            fps_by_mode[mode].append(run.frames_per_second)
            if mode == args.fit_error:
                cpu_us.append((time.process_time() - cpu) / args.frames * 1e6)
                for stage, seconds in run.stage_cpu_s.items():
                    stage_us[stage].append(seconds / args.frames * 1e6)
        cpu, ort = time.process_time(), ort_spent[0]
        serial.append(one_thread.solve(verts, times, headline).frames_per_second)
        serial_cpu_us.append((time.process_time() - cpu) / args.frames * 1e6)
        ort_us.append((ort_spent[0] - ort) / args.frames * 1e6)
    per_batch = [solver.solve(verts[i0 : i0 + bs], times[i0 : i0 + bs], headline)
                 .frames_per_second for i0 in range(0, args.frames - bs + 1, bs)]
    result = solver.solve(verts, times, headline)
    alone = one_thread.solve(verts, times, headline)
    same = all(np.array_equal(getattr(result, f), getattr(alone, f), equal_nan=True)
               for f in ("controls", "fit_rms", "fit_max", "off_manifold", "align_rms"))
    pool_vs_one = float(np.max(np.abs(result.controls - alone.controls)))
    full = solver.solve(verts[:distinct], times[:distinct],
                        SolveOptions(batch_size=bs, fit_error_scope="full"))

    inputs = np.ascontiguousarray(verts[:, solver.inverse.point_indices], np.float32)
    raw = []
    for _ in range(args.repeats):
        start = time.perf_counter()
        for i0 in range(0, args.frames, bs):
            solver.inverse.solve(inputs[i0 : i0 + bs])
        raw.append(args.frames / (time.perf_counter() - start))
    n_live = min(args.per_frame_frames, args.frames)
    live = per_frame_fps(bundle, verts[:n_live], times[:n_live])

    runs = fps_by_mode[args.fit_error]
    fps = float(np.median(runs))
    flags = result.off_manifold[:distinct]
    sub_rms, full_rms = result.fit_rms[:distinct], full.fit_rms
    figures = {
        "bundle": "synthetic" if args.synthetic else "demo face",
        "frames": int(args.frames),
        "vertices": bundle.vertex_count,
        "controls": bundle.control_count,
        "input_vertices": int(bundle.input_indices.shape[0]),
        "batch_size": bs,
        "threads": threads,
        "repeats": args.repeats,
        "fit_error": args.fit_error,
        "fit_vertices": result.fit_vertices,
        "fit_subset_forward_cut": solver.subset_forward(SolveOptions().fit_sample),
        "frames_per_second": fps,
        "frames_per_second_p99_low": float(np.percentile(runs, 1)),
        "frames_per_second_by_fit_error": {m: float(np.median(v)) for m, v in fps_by_mode.items()},
        "frames_per_second_no_fit_error": float(np.median(fps_by_mode["off"])),
        "cpu_us_per_frame": float(np.median(cpu_us)),
        "cpu_us_per_frame_by_stage": {s: float(np.median(v)) for s, v in stage_us.items()},
        "baseline_one_thread_fps": float(np.median(serial)),
        "baseline_one_thread_cpu_us_per_frame": float(np.median(serial_cpu_us)),
        "ratio_vs_one_thread": fps / float(np.median(serial)),
        # the graphs' arithmetic alone, and the rate it allows on every core with nothing else
        "onnxruntime_cpu_us_per_frame_one_thread": float(np.median(ort_us)),
        "onnxruntime_bound_fps": threads * 1e6 / float(np.median(ort_us)),
        "pool_equals_one_thread": bool(same),
        "pool_vs_one_thread_max_control_diff": pool_vs_one,
        "load_average_1min": os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan"),
        "per_batch_fps_median": float(np.median(per_batch)) if per_batch else float("nan"),
        "per_batch_fps_p99_low": float(np.percentile(per_batch, 1)) if per_batch else float("nan"),
        "baseline_raw_inverse_fps": float(np.median(raw)),
        "ratio_vs_raw_inverse": fps / float(np.median(raw)),
        "baseline_per_frame_fps": live,  # with fit error on every vertex, like the live server
        "ratio_vs_per_frame": fps / live,
        "mean_fit_rms": float(np.nanmean(result.fit_rms)) if args.fit_error != "off"
        else float("nan"),
        "mean_fit_rms_full": float(np.nanmean(full_rms)),
        "fit_rms_subset_vs_full_max_rel_diff": float(np.nanmax(np.abs(sub_rms / full_rms - 1.0)))
        if args.fit_error != "off" else float("nan"),
        "off_manifold_frames": int(result.off_manifold.sum()),
        "off_manifold_planted": int(planted.sum()),
        "off_manifold_found": int((flags & planted).sum()),
        "off_manifold_false": int((flags & ~planted).sum()),
        "off_manifold_found_full": int((full.off_manifold & planted).sum()),
        "off_manifold_false_full": int((full.off_manifold & ~planted).sum()),
        "build_or_cache_seconds": build_s,
    }
    by_mode = figures["frames_per_second_by_fit_error"]
    assert isinstance(by_mode, dict)
    print(f"batch solve, {figures['bundle']} model: V={figures['vertices']} "
          f"C={figures['controls']} K={figures['input_vertices']}, {args.frames} frames, "
          f"batch {bs}, {threads} threads")
    cut = ", cut forward graph" if figures["fit_subset_forward_cut"] else ""
    print(f"  full pipeline, fit error {args.fit_error} ({result.fit_vertices} vertices{cut}): median "
          f"{fps:,.0f} frames/s (p99-low {figures['frames_per_second_p99_low']:,.0f}) over "
          f"{args.repeats} runs")
    print(f"  CPU time, all threads:           {figures['cpu_us_per_frame']:.0f} us a frame "
          f"(one thread: {figures['baseline_one_thread_cpu_us_per_frame']:.0f})")
    by_stage = figures["cpu_us_per_frame_by_stage"]
    assert isinstance(by_stage, dict)
    print("  CPU by stage (thread time):       " + ", ".join(
        f"{s.replace('_', ' ')} {v:.0f}" for s, v in by_stage.items())
        + f" us a frame (sum {sum(by_stage.values()):.0f})")
    print(f"  onnxruntime alone, one thread:   "
          f"{figures['onnxruntime_cpu_us_per_frame_one_thread']:.0f} us a frame of "
          f"{figures['baseline_one_thread_cpu_us_per_frame']:.0f} (on {threads} cores with "
          f"nothing else: at most {figures['onnxruntime_bound_fps']:,.0f} frames/s)")
    print(f"  baseline one thread, same chunks: {figures['baseline_one_thread_fps']:,.0f} frames/s "
          f"(pool is {figures['ratio_vs_one_thread']:.2f}x; same bits: "
          f"{figures['pool_equals_one_thread']}, max control difference {pool_vs_one:.3g}); "
          f"load average {figures['load_average_1min']:.2f}")
    print("  by fit-error mode:               "
          + ", ".join(f"{m} {v:,.0f}" for m, v in by_mode.items()) + " frames/s")
    print(f"  per batch of {bs}:               median {figures['per_batch_fps_median']:,.0f}, "
          f"p99-low {figures['per_batch_fps_p99_low']:,.0f} frames/s")
    print(f"  baseline inverse alone (network and refinement, no realignment): "
          f"{figures['baseline_raw_inverse_fps']:,.0f} "
          f"frames/s (ratio {figures['ratio_vs_raw_inverse']:.2f})")
    print(f"  baseline live per-frame pipeline: {live:,.0f} frames/s "
          f"(batch is {figures['ratio_vs_per_frame']:.1f}x)")
    print(f"  off-manifold: {figures['off_manifold_found']} of {figures['off_manifold_planted']} "
          f"planted frames flagged, {figures['off_manifold_false']} others "
          f"(full fit error: {figures['off_manifold_found_full']}, "
          f"{figures['off_manifold_false_full']}); fit RMS mean {figures['mean_fit_rms']:.5f} "
          f"vs full {figures['mean_fit_rms_full']:.5f}")
    (args.out / "batch.json").write_text(json.dumps(figures, indent=2))
    print(f"wrote {args.out / 'batch.json'}")


if __name__ == "__main__":
    main()
