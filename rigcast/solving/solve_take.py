"""One take solved to one file: what `rigcast solve` does per take, alone or in a batch.

``solve_one`` reads the take, solves it with the bundle (``runtime.solve.batch.BatchSolver``), writes
the controls in the format the output path names, and returns a ``TakeRow`` (the take's line in
a batch summary). Its settings are one frozen, picklable dataclass, so the same call runs in this
process, in a local worker process or on a dask worker.
"""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np

from rigcast.runtime.serve.config import StreamConfig

log = logging.getLogger(__name__)

CUT_MIN_FRAMES = 10_000  # takes this long solve with the subset fit error's cut forward graph
FilterChoice = Literal["none", "causal", "smooth"]


@dataclass(frozen=True)
class SolveSettings:
    """How to solve every take: the `rigcast solve` options, checked by argparse's choices.

    ``stream`` holds the per-stream settings exactly as `rigcast serve` takes them (filter and
    per-group filters, d_cutoff, gap, stabilisation; from ``--config`` and the same flags).
    ``threads`` is onnxruntime's and the solver's thread count (None: all cores; a batch of
    parallel takes gives each worker 1)."""

    filter: FilterChoice = "none"
    fps: float | None = None
    stream: StreamConfig = StreamConfig()  # noqa: RUF009 (frozen, so shared safely)
    smooth_hz: float = 3.0
    fit_error_scope: Literal["subset", "full", "off"] = "full"  # which vertices it reads
    batch_size: int = 1024
    rig: str | None = None
    bounds: Path | None = None
    threads: int | None = None


@dataclass(frozen=True)
class TakeRow:
    """One take's line in a batch summary. ``fit_rms_mean`` is NaN when the fit error is off;
    ``flagged`` is the off-manifold frame ranges ("none", "12-30, 95"); ``seconds`` the wall
    time of read, solve and write."""

    take: str
    out: str
    frames: int
    fps: float
    fit_rms_mean: float
    off_manifold: int
    flagged: str
    seconds: float
    status: str = "solved"  # "solved", "skipped" (solved by an earlier run) or "failed"
    error: str = ""


@dataclass(frozen=True)
class TakeSolved:
    """What `rigcast solve` prints about one take, beside its summary row."""

    row: TakeRow
    lines: tuple[str, ...]


def solve_one(bundle_path: Path, take_path: Path, out: Path,
              settings: SolveSettings) -> TakeSolved:
    """Solve ``take_path`` with the bundle and write ``out`` (its suffix picks the format).

    The output is written to a temporary name beside ``out`` and renamed when complete, so an
    interrupted solve never leaves a file that looks finished (batches resume on that).
    """
    from rigcast.errors import MismatchError
    from rigcast.readers.takes import read_take
    from rigcast.runtime.bundle import load_bundle
    from rigcast.runtime.solve.batch import BatchSolver, SolveOptions
    from rigcast.solving.forward_subset import slice_forward_graph
    from rigcast.solving.solve_out import flag_lines, frame_quality, head_pose, output_form
    from rigcast.writers.controls_out import write_controls

    start = time.perf_counter()
    bundle = load_bundle(bundle_path)
    take = read_take(take_path, fps=settings.fps)
    if take.vertices.shape[1] != bundle.vertex_count:
        raise MismatchError(
            f"take {take_path} has {take.vertices.shape[1]} vertices but bundle {bundle_path} "
            f"was built for a rig of {bundle.vertex_count}",
            "solve it with the bundle built for this take's rig, or rebuild the bundle from it",
        )
    # Cutting the forward graph needs `import onnx` (a second or two); it pays off on long takes.
    cutter = slice_forward_graph if take.vertices.shape[0] >= CUT_MIN_FRAMES else None
    solver = BatchSolver(bundle, threads=settings.threads, subset_graph=cutter)
    options = SolveOptions(stream=settings.stream, filter=settings.filter,
                           smooth_hz=settings.smooth_hz, fit_error_scope=settings.fit_error_scope,
                           batch_size=settings.batch_size)
    basis, skeleton = output_form(bundle, out, solver.forward, settings.rig, settings.bounds)
    result = solver.solve(take.vertices, take.times_s, options)
    quality = frame_quality(bundle, result, take.times_s)
    head = head_pose(result)
    partial = out.with_name(f".{out.stem}.partial{out.suffix}")
    try:
        if out.suffix.lower() == ".blend":
            from rigcast.solving.solve_out import write_blend_solve

            write_blend_solve(partial, bundle, settings.rig or "", settings.bounds,
                              result.controls, take.times_s, take.fps, head)
        else:
            write_controls(partial, bundle.schema, result.controls, take.times_s, fps=take.fps,
                           basis=basis, skeleton=skeleton, quality=quality, head=head)
        os.replace(partial, out)
    finally:
        partial.unlink(missing_ok=True)
    from rigcast.writers.frame_info import describe_ranges

    if result.fit_error_scope == "off":
        fit = "fit error off"
        mean = float("nan")
    else:
        mean = float(np.nanmean(result.fit_rms))
        fit = (f"fit error ({result.fit_error_scope}, {result.fit_vertices} of "
               f"{bundle.vertex_count} vertices) RMS mean {mean:.5f}, "
               f"{int(result.off_manifold.sum())} off-manifold frames")
    first = (f"solved {result.controls.shape[0]} frames at {take.fps_note} in "
             f"{result.seconds:.3f} s ({result.frames_per_second:,.0f} frames/s); {fit}; "
             f"wrote {out}")
    row = TakeRow(take=str(take_path), out=str(out), frames=int(result.controls.shape[0]),
                  fps=float(take.fps), fit_rms_mean=mean,
                  off_manifold=int(np.asarray(result.off_manifold, bool).sum()),
                  flagged=describe_ranges(quality.flags("off_manifold")),
                  seconds=time.perf_counter() - start)
    return TakeSolved(row, (first, *flag_lines(quality)))
