"""Batch-solve throughput on the demo face model.

    python bench/batch.py --out DIR [--frames 20000] [--repeats 5] [--bundle PATH]

Builds (or reuses, cached under DIR/cache) the demo face bundle, makes a synthetic take of the
real rig with head motion and noise (2,000 distinct frames tiled to ``--frames``), and solves it
with ``rigcast.runtime.batch`` with the default options (stabilise, causal One Euro, clamp, fit
error through the forward model). In the same run it measures two baselines on the same frames:
the raw onnxruntime inverse alone (pre-gathered inputs, same batch size and threads) and the live
per-frame pipeline one frame at a time. Prints the figures and writes DIR/batch.json.
"""

from __future__ import annotations

import argparse
import json
import logging
import time
from pathlib import Path

import numpy as np
from rigcast.runtime.align import stabilise
from rigcast.runtime.batch import BatchSolver, all_cores, default_params
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.inference import ForwardModel, InverseModel
from rigcast.runtime.one_euro import OneEuroFilter


def demo_bundle(out: Path) -> tuple[Bundle, float]:
    """The demo face bundle from the build's cache under ``out/cache``; (bundle, build seconds)."""
    from rigcast.export.build import BuildConfig, build_bundle
    from rigcast.export.demo_rigs import tamsin_face

    cache = out / "cache"
    start = time.perf_counter()
    result = build_bundle(tamsin_face(), cache / "tamsin_face.rcb", BuildConfig(), cache_dir=cache)
    return load_bundle(result.bundle_path), time.perf_counter() - start


def make_take(bundle_rig_frames: int, frames: int, fps: float = 60.0
              ) -> tuple[np.ndarray, np.ndarray]:
    from rigcast.export.demo_rigs import tamsin_face
    from rigcast.export.take_synth import synth_take

    take = synth_take(tamsin_face(), frames=bundle_rig_frames, fps=fps, seed=3, head_motion=True)
    reps = -(-frames // bundle_rig_frames)
    verts = np.concatenate([take.vertices] * reps)[:frames]
    return np.ascontiguousarray(verts, np.float32), np.arange(frames) / fps


def per_frame_fps(bundle: Bundle, verts: np.ndarray, times: np.ndarray) -> float:
    """The live pipeline one frame at a time (stabilise, infer, One Euro, clamp, then the fit
    error through the forward model, as the live server computes it after the publish), 1 thread."""
    model = InverseModel(bundle, threads=1)
    forward = ForwardModel(bundle, threads=1)
    filt = OneEuroFilter(default_params(bundle))
    neutral_stable = bundle.neutral[bundle.stable_indices]
    lo, hi = bundle.schema.lower, bundle.schema.upper
    start = time.perf_counter()
    for i, frame in enumerate(verts):
        transform, _ = stabilise(frame, bundle.stable_indices, neutral_stable)
        x = transform.apply(frame[bundle.input_indices]).astype(np.float32)
        c = np.clip(filt(model.solve(x[None])[0], round(times[i] * 1e9), i), lo, hi)
        d = forward.evaluate(c[None].astype(np.float32))[0] - transform.apply(frame)
        np.sqrt(np.einsum("vx,vx->v", d, d).mean())
    return verts.shape[0] / (time.perf_counter() - start)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--frames", type=int, default=20000)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--batch-size", type=int, default=1024)
    ap.add_argument("--threads", type=int, default=None, help="default: all cores")
    ap.add_argument("--bundle", type=Path, default=None, help="use this bundle, skip the build")
    args = ap.parse_args()
    logging.basicConfig(level=logging.WARNING)
    args.out.mkdir(parents=True, exist_ok=True)

    if args.bundle:
        bundle, build_s = load_bundle(args.bundle), 0.0
    else:
        bundle, build_s = demo_bundle(args.out)
    verts, times = make_take(2000, args.frames)
    threads = args.threads or all_cores()
    solver = BatchSolver(bundle, threads=threads)
    bs = args.batch_size
    solver.solve(verts[:bs], times[:bs], batch_size=bs)  # warm-up

    runs, runs_nofit, per_batch = [], [], []
    for _ in range(args.repeats):
        runs.append(solver.solve(verts, times, batch_size=bs).frames_per_second)
        runs_nofit.append(solver.solve(verts, times, batch_size=bs,
                                       fit_error=False).frames_per_second)
    for i0 in range(0, args.frames - bs + 1, bs):
        per_batch.append(solver.solve(verts[i0 : i0 + bs], times[i0 : i0 + bs],
                                      batch_size=bs).frames_per_second)
    result = solver.solve(verts, times, batch_size=bs)

    inputs = np.ascontiguousarray(verts[:, bundle.input_indices], np.float32)
    raw = []
    for _ in range(args.repeats):
        start = time.perf_counter()
        for i0 in range(0, args.frames, bs):
            solver.inverse.solve(inputs[i0 : i0 + bs])
        raw.append(args.frames / (time.perf_counter() - start))
    live = per_frame_fps(bundle, verts[:2000], times[:2000])

    fps = float(np.median(runs))
    figures = {
        "frames": int(args.frames),
        "vertices": bundle.vertex_count,
        "controls": bundle.control_count,
        "input_vertices": int(bundle.input_indices.shape[0]),
        "batch_size": bs,
        "threads": threads,
        "repeats": args.repeats,
        "frames_per_second": fps,
        "frames_per_second_p99_low": float(np.percentile(runs, 1)),
        "frames_per_second_no_fit_error": float(np.median(runs_nofit)),
        "per_batch_fps_median": float(np.median(per_batch)),
        "per_batch_fps_p99_low": float(np.percentile(per_batch, 1)),
        "baseline_raw_inverse_fps": float(np.median(raw)),
        "ratio_vs_raw_inverse": fps / float(np.median(raw)),
        "baseline_per_frame_fps": live,  # with fit error, like the full pipeline
        "ratio_vs_per_frame": fps / live,
        "mean_fit_rms": float(np.mean(result.fit_rms)),
        "off_manifold_frames": int(result.off_manifold.sum()),
        "build_or_cache_seconds": build_s,
    }
    print(f"batch solve, demo face model: V={figures['vertices']} C={figures['controls']} "
          f"K={figures['input_vertices']}, {args.frames} frames, batch {bs}, {threads} threads")
    print(f"  full pipeline (with fit error): median {fps:,.0f} frames/s "
          f"(p99-low {figures['frames_per_second_p99_low']:,.0f}) over {args.repeats} runs")
    print(f"  without fit error:              median "
          f"{figures['frames_per_second_no_fit_error']:,.0f} frames/s")
    print(f"  per batch of {bs}:               median {figures['per_batch_fps_median']:,.0f}, "
          f"p99-low {figures['per_batch_fps_p99_low']:,.0f} frames/s")
    print(f"  baseline raw onnxruntime inverse: {figures['baseline_raw_inverse_fps']:,.0f} "
          f"frames/s (ratio {figures['ratio_vs_raw_inverse']:.2f})")
    print(f"  baseline live per-frame pipeline: {live:,.0f} frames/s "
          f"(batch is {figures['ratio_vs_per_frame']:.1f}x)")
    (args.out / "batch.json").write_text(json.dumps(figures, indent=2))
    print(f"wrote {args.out / 'batch.json'}")


if __name__ == "__main__":
    main()
