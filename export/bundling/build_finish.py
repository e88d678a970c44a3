"""The build's last stages: export, write, re-load and check the bundle; cache it.

``finish`` is shared by general builds (export/bundling/build.py) and per-take fits
(export/bundling/take_fit.py).
"""

from __future__ import annotations

import json
import logging
import shutil
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.bundling.build_config import (
    BUNDLE_NAME,
    CHECKPOINT,
    RIGID_LIMIT,
    BuildConfig,
    BuildError,
    BuildResult,
    Progress,
    _versions,
)
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.bundle import load_bundle, write_bundle

log = logging.getLogger(__name__)


def stabilise_section(neutral: np.ndarray, motion: np.ndarray, stable: np.ndarray
                      ) -> dict[str, Any]:
    """The manifest's ``stabilise`` section: how much the stable vertices move under the
    controls, and whether that is a rigid region (RMS motion at most RIGID_LIMIT of the
    diagonal; a threshold of ours: a rigid region does not move at all, so any limit far below
    the capture noise of ~0.1 % of the diagonal separates the two cases)."""
    from rigcast.export.training.reduction import stable_motion

    diag = float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0)))
    moved = stable_motion(motion, stable, diag)
    rigid = moved <= RIGID_LIMIT
    if not rigid:
        log.warning("the rig has no rigid region: its %d stable vertices move %.3g%% of the "
                    "diagonal (RMS) under the controls; serve and solve will not stabilise "
                    "unless asked to", stable.shape[0], 100 * moved)
    return {"rigid_region": bool(rigid), "stable_motion_pct_diag": 100.0 * moved,
            "limit_pct_diag": 100.0 * RIGID_LIMIT}


def finish(
    rig: Rig,
    rig_fp: str,
    dataset_fp: str,
    key: str,
    out_path: Path,
    config: BuildConfig,
    fwd: Any,
    fwd_rep: Any,
    inv: Any,
    inv_rep: Any,
    inputs: np.ndarray,
    stable: np.ndarray,
    check_x: np.ndarray,
    entry: Path | None,
    timings: dict[str, float],
    t_start: float,
    progress: Progress | None,
    motion: np.ndarray | None,
    poses: np.ndarray,
    stabilise: dict[str, Any] | None = None,
    check_controls: np.ndarray | None = None,
) -> BuildResult:
    """Export, write, re-load and check; cache the bundle and checkpoint. ``check_controls``
    (N, C): the true controls of ``check_x``, for the dead-output check."""
    from rigcast.export.bundling.build_check import check_served, choose_curvature
    from rigcast.export.bundling.onnx_export import OPSET, export_forward, export_inverse
    from rigcast.export.training.models import EDGE_MARGIN, REST_BAND, save_checkpoint
    from rigcast.export.training.refine import projected_refine_parts
    from rigcast.runtime.solve.refine import RefineSettings

    t = time.perf_counter()
    inv_bytes, inv_parity = export_inverse(inv, check_x[:16][:, inputs])
    fwd_bytes, fwd_parity = export_forward(fwd)
    ref_bytes, hessian, projection, ref_parity = projected_refine_parts(fwd, poses, check_x[:16],
                                                                    stable=stable)
    timings["export"] = time.perf_counter() - t
    if progress is not None:
        progress("export", 1, 1)
    if stabilise is None:
        stabilise = stabilise_section(np.asarray(rig.neutral, np.float32), motion, stable) \
            if motion is not None else {"rigid_region": True}

    t = time.perf_counter()
    check = _check_arrays(inv, fwd, inv_bytes, fwd_bytes, rig, check_x, inputs)
    diag = float(np.linalg.norm(rig.neutral.max(axis=0) - rig.neutral.min(axis=0)))
    seconds = time.perf_counter() - t_start
    training = {
        "forward": asdict(fwd_rep),
        "inverse": {**asdict(inv_rep), "loss_curve": list(inv_rep.loss_curve)},
        "timings": {**timings, "check": time.perf_counter() - t},
        "seconds": seconds,
        "check_samples": int(check_x.shape[0]),
        "parity": {"inverse": inv_parity, "forward": fwd_parity, "refine": ref_parity,
                   "bundle": check["parity"]},
    }
    extra = {
        "build_key": key,
        "training": training,
        "fingerprint": {"rig": rig_fp, "dataset": dataset_fp},
        "versions": _versions(),
        "normalisation": {
            "controls": "u = (c - min) / (max - min) into the forward model",
            "inverse_input": "(mesh - neutral[input_indices]) / input_scale",
            "inverse_output": "min + (max - min) * rest_band(clip((1 + 2m) sigmoid(z) - m, 0, 1))",
            "edge_margin_m": EDGE_MARGIN,
            "rest_band_b": REST_BAND,
            "input_scale": inv_rep.input_scale,
            "diagonal": diag,
        },
        "opset": OPSET,
        "build_config": json.loads(json.dumps(config.to_dict(), default=str)),
        "refine": asdict(RefineSettings()),
        "stabilise": stabilise,
    }
    # Written two or three times: the curvature choice and the check run the served solve from
    # the written file, and their figures then go into the manifest of the final one.
    parts = {"name": rig.name, "schema": rig.schema, "neutral": rig.neutral, "faces": rig.faces,
             "stable_indices": stable, "input_indices": inputs, "inverse_onnx": inv_bytes,
             "forward_onnx": fwd_bytes, "refine_onnx": ref_bytes, "refine_hessian": hessian,
             "refine_projection": projection}
    write_bundle(out_path, extra=extra, **parts)
    curvature, curvature_errors = choose_curvature(out_path, rig, check_x)
    if curvature != extra["refine"]["curvature"]:
        extra["refine"] = asdict(RefineSettings(curvature=curvature))
        write_bundle(out_path, extra=extra, **parts)
    training["curvature_check"] = curvature_errors
    served = check_served(out_path, rig, check_x, float(fwd_rep.mean_err), check_controls)
    training.update(check_mean_err=served.rig_mean_err,
                    check_mean_err_pct_diag=served.rig_mean_err_pct_diag,
                    reference={**served.to_dict(), "curvature": curvature})
    extra.update(fit_rms_train=served.fit_rms_mean, fit_rms_p99=served.fit_rms_p99)
    write_bundle(out_path, extra=extra, **parts)
    if served.worse_than_reference:
        log.warning("the bundle's held-out error %.3g is above bounded linear least squares "
                    "(%.3g) on the same poses", served.rig_mean_err, served.lsq_mean_err)
    if served.lost_controls:
        log.warning("the bundle's solve does not recover %d control(s) alone: %s",
                    len(served.lost_controls), ", ".join(served.lost_controls))
    check_pct = served.rig_mean_err_pct_diag
    bundle = load_bundle(out_path)
    reload = _check_arrays(
        inv, fwd, bundle.inverse_onnx, bundle.forward_onnx, rig, check_x, bundle.input_indices
    )
    if reload["parity"] > check["parity"] + 1e-7:
        out_path.unlink(missing_ok=True)
        raise BuildError(f"check: re-loaded bundle {out_path} differs from what was written")
    timings["check"] = time.perf_counter() - t
    if progress is not None:
        progress("check", 1, 1)
    ckpt = None
    if entry is not None:
        entry.mkdir(parents=True, exist_ok=True)
        ckpt = save_checkpoint(
            entry / CHECKPOINT,
            fwd,
            inv,
            {"input_indices": inputs.tolist(), "stable_indices": stable.tolist(), "key": key},
        )
        if out_path.resolve() != (entry / BUNDLE_NAME).resolve():
            shutil.copyfile(out_path, entry / BUNDLE_NAME)
    seconds = time.perf_counter() - t_start
    log.info(
        "built %s in %.1fs (%s); held-out rig error %.3g (%.3f%% diag)",
        out_path,
        seconds,
        ", ".join(f"{k} {v:.1f}s" for k, v in timings.items()),
        served.rig_mean_err,
        check_pct,
    )
    return BuildResult(
        bundle_path=out_path,
        forward=fwd_rep,
        inverse=inv_rep,
        timings=dict(timings),
        seconds=seconds,
        key=key,
        cached=False,
        check_mean_err=served.rig_mean_err,
        check_mean_err_pct_diag=check_pct,
        checkpoint=ckpt,
        forward_model=fwd,
        inverse_model=inv,
        reference={**served.to_dict(), "curvature": curvature},
    )


def _check_arrays(
    inv: Any,
    fwd: Any,
    inv_bytes: bytes,
    fwd_bytes: bytes,
    rig: Rig,
    check_x: np.ndarray,
    inputs: np.ndarray,
) -> dict[str, float]:
    """The inverse graph through onnxruntime against torch on the check meshes, relative to each
    control's range (``PARITY_TOL``)."""
    import torch
    from rigcast.export.bundling.onnx_export import PARITY_TOL, session

    x_in = np.ascontiguousarray(check_x[:, inputs], np.float32)
    got = session(inv_bytes).run(None, {"mesh": x_in})[0]
    with torch.no_grad():
        ref = inv(torch.from_numpy(x_in)).numpy()
    span = rig.schema.upper - rig.schema.lower
    parity = float(np.max(np.abs(got - ref) / span))
    if not parity <= PARITY_TOL:
        raise BuildError(
            f"check: bundle inverse differs from torch by {parity:.3g} of a control's range "
            f"(> {PARITY_TOL})"
        )
    return {"parity": parity}


