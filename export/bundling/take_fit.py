"""Per-take mode: fine-tune a general build's inverse on the user's own frames."""

from __future__ import annotations

import hashlib
import logging
import time
from pathlib import Path

import numpy as np
from rigcast.export.bundling.build_config import (
    _CHECK_SEED_OFFSET,
    BuildConfig,
    BuildError,
    BuildResult,
    Progress,
    region_weight_array,
)
from rigcast.export.bundling.build_finish import finish
from rigcast.export.data.sampling import sample_controls
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.bundle import load_bundle

log = logging.getLogger(__name__)


def fit_take(
    general: BuildResult,
    rig: Rig,
    frames: np.ndarray,
    out_path: str | Path,
    config: BuildConfig | None = None,
    *,
    progress: Progress | None = None,
) -> BuildResult:
    """Fine-tune ``general``'s inverse on a take, self-supervised, and write a new bundle.

    frames: (T, V, 3) the user's meshes in the neutral's frame (stabilised). The forward model is
    reused from ``general`` (a fresh build or a cached one with its checkpoint); only the inverse
    changes, with ``config.take`` as its training config. The check stage runs on the general
    build's held-out poses, so the report shows what the fine-tune costs off the take.
    """
    from rigcast.export.training.train import train_inverse

    config = config or BuildConfig(mode="take")
    out_path = Path(out_path)
    t_start = time.perf_counter()
    if general.forward_model is None or general.inverse_model is None:
        raise BuildError("fit_take needs the general build's torch models (build with a cache_dir)")
    frames = np.asarray(frames, np.float32)
    if frames.ndim != 3 or frames.shape[1:] != (rig.vertex_count, 3):
        raise BuildError(f"take frames must be (T, {rig.vertex_count}, 3), got {frames.shape}")
    bundle = load_bundle(general.bundle_path)
    inputs, stable = np.array(bundle.input_indices), np.array(bundle.stable_indices)
    if bundle.rigid_region:
        # Train on the frames as the solve will see them: head motion removed.
        from rigcast.runtime.solve.batch import fit_rigid_batch

        rigid = fit_rigid_batch(frames[:, stable], bundle.neutral[stable].astype(np.float64))
        frames = rigid.apply(frames)
    fwd = general.forward_model
    inv = type(general.inverse_model)(
        np.zeros((inputs.shape[0], 3)),
        1.0,
        rig.schema.lower,
        rig.schema.upper,
        rig.schema.defaults,
        general.inverse_model.hidden,
    )
    inv.load_state_dict(general.inverse_model.state_dict())
    for p in inv.parameters():
        p.requires_grad_(True)
    take_fp = hashlib.sha256(frames.tobytes()).hexdigest()[:16]
    t = time.perf_counter()
    inv, inv_rep = train_inverse(
        fwd,
        frames,
        inputs,
        rig.schema.defaults,
        config.take,
        mode="take",
        init=inv,
        region_weights=region_weight_array(rig.vertex_count, config.region_weights),
        progress=progress,
    )
    timings = {"inverse": time.perf_counter() - t}
    check_c = sample_controls(
        rig.schema,
        config.check_samples,
        sparsity=config.sparsity,
        seed=config.seed + _CHECK_SEED_OFFSET,
    )
    return finish(
        rig,
        bundle.manifest["fingerprint"]["rig"],
        f"take-{take_fp}",
        f"{general.key}-{take_fp}",
        out_path,
        config,
        fwd,
        general.forward,
        inv,
        inv_rep,
        inputs,
        stable,
        rig.evaluate(check_c),
        None,
        timings,
        t_start,
        progress,
        None,
        np.concatenate([rig.schema.defaults[None], check_c[:255]]),
        dict(bundle.manifest.get("stabilise", {"rigid_region": True})),
        check_controls=check_c,
    )
