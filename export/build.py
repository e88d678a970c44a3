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
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np
from rigcast.export.dataset import sample_dataset
from rigcast.export.executor import make_executor
from rigcast.export.rig import Rig
from rigcast.export.sampling import SamplingConfig, SparsityConfig, sample_controls
from rigcast.runtime.bundle import Bundle, BundleError, load_bundle, write_bundle

import rigcast

log = logging.getLogger(__name__)

Progress = Callable[[str, int, int], None]
CHECKPOINT = "checkpoint.pt"
BUNDLE_NAME = "bundle.rcb"
_CHECK_SEED_OFFSET = 7919
#: Largest RMS motion of the stable vertices, as a share of the diagonal, for a rigid region.
RIGID_LIMIT = 1e-5


class BuildError(RuntimeError):
    """A build could not run or its result failed a check; the message names the stage."""


def _forward_default() -> Any:
    from rigcast.export.train import ForwardConfig

    return ForwardConfig()


def _inverse_default() -> Any:
    from rigcast.export.train import InverseConfig

    return InverseConfig()


def _take_default() -> Any:
    from rigcast.export.train import InverseConfig

    return InverseConfig(steps=800, lr=5e-4, supervised=0.0, fresh_fraction=0.0)


@dataclass(frozen=True)
class BuildConfig:
    """Everything a build depends on (and so everything its cache key covers).

    ``region_weights``: (vertex index, weight) pairs for the inverse's mesh loss; unlisted
    vertices weigh 1. ``input_count`` / ``stable_count``: K and S, None for the size-based
    defaults of ``reduction``. ``mode="take"`` fine-tunes on frames from ``take_path`` (.npy of
    (T, V, 3), or the first array of an .npz) or the ``frames`` given to ``build_bundle``.
    ``workers`` / ``scheduler`` choose the sampling executor (see ``executor.make_executor``).
    """

    samples: int = 16000
    sparsity: SparsityConfig = field(default_factory=SparsityConfig)
    seed: int = 0
    forward: Any = field(default_factory=_forward_default)  # train.ForwardConfig
    inverse: Any = field(default_factory=_inverse_default)  # train.InverseConfig
    take: Any = field(default_factory=_take_default)  # train.InverseConfig for take mode
    input_count: int | None = None
    stable_count: int | None = None
    region_weights: tuple[tuple[int, float], ...] | None = None
    mode: Literal["general", "take"] = "general"
    take_path: str | None = None
    check_samples: int = 256
    workers: int | None = None
    scheduler: str | None = None

    def __post_init__(self) -> None:
        if self.mode not in ("general", "take"):
            raise BuildError(f"build mode must be 'general' or 'take', got {self.mode!r}")
        if self.samples < 16:
            raise BuildError(f"samples must be at least 16, got {self.samples}")
        if self.check_samples < 1:
            raise BuildError(f"check_samples must be at least 1, got {self.check_samples}")

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def key_dict(self) -> dict[str, Any]:
        """The parts that change the result (not where it runs)."""
        d = self.to_dict()
        for k in ("workers", "scheduler"):
            d.pop(k)
        return d


@dataclass(frozen=True)
class BuildResult:
    bundle_path: Path
    forward: Any  # train.ForwardReport
    inverse: Any  # train.InverseReport
    timings: Mapping[str, float]
    seconds: float
    key: str
    cached: bool
    check_mean_err: float  # real-rig vertex error of the bundle's solve on held-out poses
    check_mean_err_pct_diag: float
    checkpoint: Path | None = field(default=None, compare=False)
    forward_model: Any = field(default=None, compare=False, repr=False)
    inverse_model: Any = field(default=None, compare=False, repr=False)
    # build_check.ServedCheck as a dict: the served solve beside lsq_linear, recoverability
    reference: Mapping[str, Any] | None = field(default=None, compare=False)


def build_key(rig_fingerprint: str, config: BuildConfig) -> str:
    h = hashlib.sha256(f"rigcast-build/{rigcast.__version__}/{rig_fingerprint}/".encode())
    h.update(json.dumps(config.key_dict(), sort_keys=True, default=str).encode())
    return h.hexdigest()[:16]


def region_weight_array(
    vertex_count: int, pairs: tuple[tuple[int, float], ...] | None
) -> np.ndarray | None:
    """(V,) float64 weights: 1 except at the listed (index, weight) pairs; None if no pairs."""
    if not pairs:
        return None
    w = np.ones(vertex_count)
    for idx, weight in pairs:
        if not 0 <= int(idx) < vertex_count:
            raise BuildError(f"region weight vertex {idx} is outside 0..{vertex_count - 1}")
        w[int(idx)] = float(weight)
    return w


def load_frames(path: str | Path) -> np.ndarray:
    """(T, V, 3) float32 frames from .npy, or the first array of an .npz."""
    p = Path(path)
    try:
        data = np.load(p, allow_pickle=False)
        arr = data[data.files[0]] if isinstance(data, np.lib.npyio.NpzFile) else data
    except (OSError, ValueError, IndexError) as exc:
        raise BuildError(f"take {p} could not be read as .npy/.npz frames: {exc}") from None
    arr = np.asarray(arr, np.float32)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise BuildError(f"take {p} must hold (T, V, 3) frames, got shape {arr.shape}")
    return arr


def _versions() -> dict[str, str]:
    import onnx
    import onnxruntime
    import torch

    return {
        "rigcast": rigcast.__version__,
        "torch": torch.__version__,
        "onnx": onnx.__version__,
        "onnxruntime": onnxruntime.__version__,
        "numpy": np.__version__,
    }


def _cached(entry: Path, key: str, out_path: Path) -> BuildResult | None:
    from rigcast.export.models import load_checkpoint

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
    from rigcast.export.train import ForwardReport, InverseReport

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
    from rigcast.export import reduction
    from rigcast.export.train import train_forward, train_inverse

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
    )
    timings["forward"] = time.perf_counter() - t

    t = time.perf_counter()
    motion = reduction.motion_rms(neutral, dataset.vertices)
    k = config.input_count or reduction.input_count_for(rig.vertex_count)
    s = config.stable_count or reduction.stable_count_for(rig.vertex_count)
    per_control = max(2, min(8, k // (3 * rig.control_count)))
    regions = reduction.control_region_vertices(fwd.linear_weight.detach().numpy(), neutral,
                                                per_control)
    inputs = reduction.select_input_vertices(neutral, motion, k, must_include=regions)
    stable = reduction.select_stable_vertices(neutral, motion, s)
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
    )


def stabilise_section(neutral: np.ndarray, motion: np.ndarray, stable: np.ndarray
                      ) -> dict[str, Any]:
    """The manifest's ``stabilise`` section: how much the stable vertices move under the
    controls, and whether that is a rigid region (RMS motion at most RIGID_LIMIT of the
    diagonal; a threshold of ours: a rigid region does not move at all, so any limit far below
    the capture noise of ~0.1 % of the diagonal separates the two cases)."""
    from rigcast.export.reduction import stable_motion

    diag = float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0)))
    moved = stable_motion(motion, stable, diag)
    rigid = moved <= RIGID_LIMIT
    if not rigid:
        log.warning("the rig has no rigid region: its %d stable vertices move %.3g%% of the "
                    "diagonal (RMS) under the controls; serve and solve will not stabilise "
                    "unless asked to", stable.shape[0], 100 * moved)
    return {"rigid_region": bool(rigid), "stable_motion_pct_diag": 100.0 * moved,
            "limit_pct_diag": 100.0 * RIGID_LIMIT}


def _finish(
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
) -> BuildResult:
    """Export, write, re-load and check; cache the bundle and checkpoint."""
    from rigcast.export.build_check import check_served
    from rigcast.export.models import EDGE_MARGIN, REST_BAND, save_checkpoint
    from rigcast.export.onnx_export import OPSET, export_forward, export_inverse
    from rigcast.export.refine import refine_parts
    from rigcast.runtime.refine import RefineSettings

    t = time.perf_counter()
    inv_bytes, inv_parity = export_inverse(inv, check_x[:16][:, inputs])
    fwd_bytes, fwd_parity = export_forward(fwd)
    ref_bytes, hessian, ref_parity = refine_parts(fwd, inputs, poses, check_x[:16][:, inputs])
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
    write_bundle(
        out_path,
        name=rig.name,
        schema=rig.schema,
        neutral=rig.neutral,
        faces=rig.faces,
        stable_indices=stable,
        input_indices=inputs,
        inverse_onnx=inv_bytes,
        forward_onnx=fwd_bytes,
        extra=extra,
        refine_onnx=ref_bytes,
        refine_hessian=hessian,
    )
    served = check_served(out_path, rig, check_x, float(fwd_rep.mean_err))
    training.update(check_mean_err=served.rig_mean_err,
                    check_mean_err_pct_diag=served.rig_mean_err_pct_diag,
                    reference=served.to_dict())
    extra.update(fit_rms_train=served.fit_rms_mean, fit_rms_p99=served.fit_rms_p99)
    write_bundle(out_path, name=rig.name, schema=rig.schema, neutral=rig.neutral,
                 faces=rig.faces, stable_indices=stable, input_indices=inputs,
                 inverse_onnx=inv_bytes, forward_onnx=fwd_bytes, extra=extra,
                 refine_onnx=ref_bytes, refine_hessian=hessian)
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
        reference=served.to_dict(),
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
    from rigcast.export.onnx_export import PARITY_TOL, session

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
    from rigcast.export.train import train_inverse

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
        from rigcast.runtime.batch import fit_rigid_batch

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
    return _finish(
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
    )
