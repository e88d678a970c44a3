"""The build: rig -> sampled dataset -> forward -> inverse -> ONNX bundle -> check.

Stages, each timed and reported through ``progress(stage, done, total)``:

- ``sample``:  ``sample_dataset`` (resumable chunks; in ``cache_dir/datasets`` when a cache is
  given), plus a small held-out check set drawn with another seed and evaluated on the real rig;
- ``forward``: ``train_forward``;
- ``inverse``: vertex selection (``reduction``), then ``train_inverse`` in general mode, and, in
  take mode, a self-supervised fine-tune on the user's frames (``fit_take``);
- ``export``:  both graphs to ONNX (checker, pinned opset, torch parity);
- ``check``:   the written bundle is re-loaded with ``load_bundle``; its onnxruntime inverse must
  match torch within ``PARITY_TOL`` on the held-out check meshes, and its solve is scored through
  the real rig.

Caching: the build key is a digest of the rig fingerprint, the build config and the rigcast
version. With a ``cache_dir``, ``cache_dir/<key>/`` keeps the bundle and a torch checkpoint
(``state_dict``s and selections) so an unchanged build is a copy, and a per-take fit can start from
a general build without retraining the forward model. The key is written into the manifest.
"""

from __future__ import annotations

import hashlib
import json
import logging
import shutil
import tempfile
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.bundling.build_config import (
    _CHECK_SEED_OFFSET,
    BUNDLE_NAME,
    CHECKPOINT,
    BuildConfig,
    BuildError,
    BuildResult,
    Progress,
    build_key,
    load_frames,
    region_weight_array,
)
from rigcast.export.data.dataset import sample_dataset
from rigcast.export.data.executor import make_executor
from rigcast.export.data.sampling import SamplingConfig, anchor_poses, sample_controls
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.bundle import Bundle, BundleError, load_bundle

log = logging.getLogger(__name__)

def _cached(entry: Path, key: str, out_path: Path) -> BuildResult | None:
    from rigcast.export.training.models import load_checkpoint

    bundle_file = entry / BUNDLE_NAME
    if not bundle_file.exists() or not (entry / CHECKPOINT).exists():
        return None
    try:
        bundle = load_bundle(bundle_file)
    except BundleError as exc:
        log.warning("ignoring cached bundle %s: %s", bundle_file, exc)
        return None
    if bundle.manifest.get("build_key") != key:
        return None
    if out_path.resolve() != bundle_file.resolve():
        out_path.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(bundle_file, out_path)
    fwd, inv, _ = load_checkpoint(entry / CHECKPOINT)
    log.info("reusing cached bundle %s (key %s)", bundle_file, key)
    return _result_from_manifest(bundle, out_path, entry / CHECKPOINT, fwd, inv)


def _result_from_manifest(
    bundle: Bundle, out_path: Path, checkpoint: Path | None, fwd: Any, inv: Any
) -> BuildResult:
    from rigcast.export.training.train import ForwardReport, InverseReport

    tr = bundle.manifest["training"]
    return BuildResult(
        bundle_path=out_path,
        forward=ForwardReport(**tr["forward"]),
        inverse=InverseReport(
            **{**tr["inverse"], "loss_curve": tuple(tr["inverse"]["loss_curve"])}
        ),
        timings=dict(tr["timings"]),
        seconds=float(tr["seconds"]),
        key=str(bundle.manifest["build_key"]),
        cached=True,
        check_mean_err=float(tr["check_mean_err"]),
        check_mean_err_pct_diag=float(tr["check_mean_err_pct_diag"]),
        checkpoint=checkpoint,
        forward_model=fwd,
        inverse_model=inv,
        reference=tr.get("reference"),
    )


def build_bundle(
    rig: Rig,
    out_path: str | Path,
    config: BuildConfig | None = None,
    *,
    cache_dir: str | Path | None = None,
    progress: Progress | None = None,
    frames: np.ndarray | None = None,
) -> BuildResult:
    """Build (or reuse from ``cache_dir``) the bundle for ``rig`` at ``out_path``.

    In take mode the general build is made (or reused) first, then ``fit_take`` fine-tunes its
    inverse on ``frames`` (T, V, 3) or on ``config.take_path``.
    """
    config = config or BuildConfig()
    out_path = Path(out_path)
    if config.mode == "take":
        take = frames if frames is not None else None
        if take is None:
            if config.take_path is None:
                raise BuildError("take mode needs frames or config.take_path")
            take = load_frames(config.take_path)
        general = build_bundle(
            rig,
            out_path,
            replace(config, mode="general", take_path=None),
            cache_dir=cache_dir,
            progress=progress,
        )
        return fit_take(general, rig, take, out_path, config, progress=progress)
    t_start = time.perf_counter()
    rig_fp = rig.fingerprint()
    key = build_key(rig_fp, config)
    entry = Path(cache_dir) / key if cache_dir is not None else None
    if entry is not None:
        hit = _cached(entry, key, out_path)
        if hit is not None:
            return hit
    with tempfile.TemporaryDirectory(prefix="rigcast-build-") as tmp:
        ds_root = Path(cache_dir) / "datasets" if cache_dir is not None else Path(tmp)
        result = _build(rig, rig_fp, key, out_path, config, ds_root, entry, progress, t_start)
    return result


def _build(
    rig: Rig,
    rig_fp: str,
    key: str,
    out_path: Path,
    config: BuildConfig,
    ds_root: Path,
    entry: Path | None,
    progress: Progress | None,
    t_start: float,
) -> BuildResult:
    from rigcast.export.training import reduction
    from rigcast.export.training.train import train_forward, train_inverse

    timings: dict[str, float] = {}
    t = time.perf_counter()
    sconf = SamplingConfig(count=config.samples, sparsity=config.sparsity, seed=config.seed)
    # The folder is keyed by everything the samples depend on (count, seed, sparsity, method,
    # chunking), so a changed sampling config resamples instead of refusing the old folder.
    sconf_key = hashlib.sha256(json.dumps(sconf.to_dict(), sort_keys=True, default=str)
                               .encode()).hexdigest()[:8]
    ds_dir = ds_root / f"{rig.name or 'rig'}-{rig_fp}-{config.samples}-{config.seed}-{sconf_key}"
    report = (lambda d, n: progress("sample", d, n)) if progress is not None else None
    with make_executor(config.workers, config.scheduler) as executor:
        dataset = sample_dataset(rig, ds_dir, sconf, executor=executor, progress=report)
    check_c = sample_controls(
        rig.schema,
        config.check_samples,
        sparsity=config.sparsity,
        seed=config.seed + _CHECK_SEED_OFFSET,
    )
    check_x = rig.evaluate(check_c)
    anchor_c = anchor_poses(rig.schema)
    anchors = (anchor_c, rig.evaluate(anchor_c))
    timings["sample"] = time.perf_counter() - t
    log.info("sampled %d poses in %.1fs", len(dataset), timings["sample"])

    t = time.perf_counter()
    schema = rig.schema
    neutral = np.asarray(dataset.neutral, np.float32)
    fwd, fwd_rep = train_forward(
        dataset.controls,
        dataset.vertices,
        neutral,
        schema.lower,
        schema.upper,
        config.forward,
        progress,
        anchors,
    )
    timings["forward"] = time.perf_counter() - t

    t = time.perf_counter()
    motion = reduction.motion_rms(neutral, dataset.vertices)
    k = config.input_count or reduction.input_count_for(rig.vertex_count)
    per_control = max(2, min(8, k // (3 * rig.control_count)))
    regions = reduction.control_region_vertices(fwd.linear_weight.detach().numpy(), neutral,
                                                per_control)
    inputs = reduction.select_input_vertices(neutral, motion, k, must_include=regions)
    stable = (reduction.select_stable_vertices(neutral, motion, config.stable_count)
              if config.stable_count else reduction.stable_vertices_for(neutral, motion))
    inv, inv_rep = train_inverse(
        fwd,
        dataset.vertices,
        inputs,
        schema.defaults,
        config.inverse,
        mode="general",
        controls=dataset.controls,
        region_weights=region_weight_array(rig.vertex_count, config.region_weights),
        progress=progress,
    )
    timings["inverse"] = time.perf_counter() - t
    poses = np.concatenate([schema.defaults[None], dataset.controls[:255]])
    return _finish(
        rig,
        rig_fp,
        dataset.fingerprint,
        key,
        out_path,
        config,
        fwd,
        fwd_rep,
        inv,
        inv_rep,
        inputs,
        stable,
        check_x,
        entry,
        timings,
        t_start,
        progress,
        motion,
        poses,
        check_controls=check_c,
    )


# The later stages live beside this module; re-exported so callers keep one import.
from rigcast.export.bundling.build_finish import finish as _finish  # noqa: E402
from rigcast.export.bundling.build_finish import stabilise_section  # noqa: E402
from rigcast.export.bundling.take_fit import fit_take  # noqa: E402

__all__ = ["BuildConfig", "BuildError", "BuildResult", "build_bundle", "fit_take",
           "stabilise_section"]
