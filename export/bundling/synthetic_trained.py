"""A trained inverse for a synthetic rig (synthetic_bundle.py), through the normal training code.

The synthetic bundles' ``"mlp"`` inverse has random weights: its answer is far from every frame's
solution, so the refinement after it runs all its steps and halvings, the worst case. A user's
bundle is trained, and its network lands near the solution. This module trains the inverse a build
trains (``export.training.train_inverse.train_inverse``, general mode, the default
``InverseConfig``) on the synthetic rig, so benches can measure what a user gets beside the worst
case.

What differs from a build (``export/bundling/build.py``), and why it does not matter here:

- the forward model is the rig itself: the rig is linear, so the build's anchored linear part is
  exact and its correction MLP would learn nothing (a ForwardApproximator with the rig's deltas
  as its linear part and no residual basis);
- the training meshes hold only the vertices the training reads: the K input vertices, ``others``
  more drawn at random (the build draws the mesh loss's 1,536 from every moving vertex) and the
  neutral's bounding-box extremes, so the diagonal, and with it the training's input noise
  (``InverseConfig.noise_frac`` of it), is the whole rig's. At 20,000 vertices the whole meshes of
  16,000 samples would take 3.8 GB;
- the input vertices are the synthetic rig's own (``SyntheticRig.input_indices``), not
  ``reduction.select_input_vertices``'.

The samples are the build's: ``sample_controls`` with the default sparsity and the build's count.
``trained_inverse`` keeps the exported graph in a cache folder under a key of the rig's arrays and
the settings, so a bench rerun does not train again.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import torch
from rigcast.export.bundling.onnx_export import export_inverse
from rigcast.export.bundling.synthetic_bundle import SyntheticRig
from rigcast.export.data.sampling import SparsityConfig, sample_controls
from rigcast.export.training.models import ForwardApproximator
from rigcast.export.training.train_inverse import InverseConfig, train_inverse

log = logging.getLogger(__name__)

#: The build's default sample count (``BuildConfig.samples``).
SAMPLES = 16000
#: Vertices beside the inputs in the training meshes (the mesh loss draws its 1,536 from them).
OTHERS = 2048


@dataclass(frozen=True)
class TrainedInverse:
    """An exported inverse graph and how it was made."""

    onnx: bytes
    seconds: float  # the training's wall-clock time when it ran (also when read from the cache)
    steps: int
    mean_err: float  # InverseReport.mean_err on the held-out samples, mesh units
    mean_err_pct_diag: float
    cached: bool


def training_vertices(rig: SyntheticRig, others: int = OTHERS, seed: int = 0) -> np.ndarray:
    """(S,) sorted vertex indices the training meshes keep: the inputs, ``others`` more (seeded,
    uniform over the rest) and each axis' extreme neutral vertices."""
    n = rig.neutral.shape[0]
    inputs = np.asarray(rig.input_indices, np.int64)
    rest = np.setdiff1d(np.arange(n), inputs)
    rng = np.random.default_rng(seed)
    pick = rng.choice(rest, size=min(others, rest.size), replace=False)
    extremes = np.concatenate([np.argmin(rig.neutral, axis=0), np.argmax(rig.neutral, axis=0)])
    return np.union1d(np.union1d(inputs, pick), extremes.astype(np.int64))


def linear_forward(rig: SyntheticRig, vertices: np.ndarray) -> ForwardApproximator:
    """The rig on ``vertices`` (S,) as a ForwardApproximator: linear part deltas x range per unit
    of normalised control, no bias, no residual basis (exact for a linear rig)."""
    lo, hi = rig.schema.lower, rig.schema.upper
    c = rig.deltas.shape[0]
    span = (np.asarray(hi, np.float64) - lo)[:, None, None]
    weight = (rig.deltas[:, vertices].astype(np.float64) * span).reshape(c, -1)
    s = vertices.shape[0]
    neutral_lo = rig.neutral[vertices] + np.einsum("c,cvk->vk", np.asarray(lo, np.float64),
                                                   rig.deltas[:, vertices])
    bias = (neutral_lo - rig.neutral[vertices]).reshape(-1)  # the mesh at u = 0, from the neutral
    return ForwardApproximator(rig.neutral[vertices], lo, hi, weight, bias,
                               np.zeros((0, 3 * s), np.float32))


def train_synthetic_inverse(rig: SyntheticRig, config: InverseConfig | None = None, *,
                            samples: int = SAMPLES, others: int = OTHERS, seed: int = 0
                            ) -> TrainedInverse:
    """Train and export the inverse of ``rig`` (see the module docstring); ``config`` None:
    the build's default InverseConfig."""
    config = config or InverseConfig()
    t0 = time.perf_counter()
    keep = training_vertices(rig, others, seed)
    forward = linear_forward(rig, keep)
    controls = sample_controls(rig.schema, samples, sparsity=SparsityConfig(), seed=seed)
    with torch.no_grad():
        meshes = forward(torch.from_numpy(controls)).numpy()  # (N, S, 3) float32
    inputs = np.searchsorted(keep, rig.input_indices)  # the inputs' rows in ``keep``
    model, report = train_inverse(forward, meshes, inputs, rig.schema.defaults, config,
                                  mode="general", controls=controls)
    data, _ = export_inverse(model, meshes[:32, inputs], seed=seed)
    seconds = time.perf_counter() - t0
    log.info("synthetic inverse trained: %d steps, %.1f s, held-out mean error %.3g (%.4f %% D)",
             report.steps, seconds, report.mean_err, report.mean_err_pct_diag)
    return TrainedInverse(data, seconds, report.steps, report.mean_err,
                          report.mean_err_pct_diag, cached=False)


def trained_inverse(rig: SyntheticRig, cache: Path | None, config: InverseConfig | None = None,
                    *, samples: int = SAMPLES, others: int = OTHERS, seed: int = 0
                    ) -> TrainedInverse:
    """``train_synthetic_inverse``, kept in ``cache`` (a folder; None: no cache) under a key of
    the rig's arrays and every setting."""
    config = config or InverseConfig()
    if cache is None:
        return train_synthetic_inverse(rig, config, samples=samples, others=others, seed=seed)
    digest = hashlib.sha256()
    for a in (rig.neutral, rig.deltas, rig.input_indices, rig.schema.lower, rig.schema.upper,
              rig.schema.defaults):
        digest.update(np.ascontiguousarray(a).tobytes())
    digest.update(json.dumps([asdict(config), samples, others, seed], sort_keys=True,
                             default=str).encode())
    key = digest.hexdigest()[:20]
    graph, meta = cache / f"inverse-{key}.onnx", cache / f"inverse-{key}.json"
    if graph.exists() and meta.exists():
        info = json.loads(meta.read_text())
        return TrainedInverse(graph.read_bytes(), float(info["seconds"]), int(info["steps"]),
                              float(info["mean_err"]), float(info["mean_err_pct_diag"]),
                              cached=True)
    out = train_synthetic_inverse(rig, config, samples=samples, others=others, seed=seed)
    cache.mkdir(parents=True, exist_ok=True)
    graph.write_bytes(out.onnx)
    meta.write_text(json.dumps({"steps": out.steps, "seconds": out.seconds,
                                "mean_err": out.mean_err,
                                "mean_err_pct_diag": out.mean_err_pct_diag}))
    return out

