"""The bundle build end to end on a tiny rig: load_bundle, manifest, cache reuse, take mode."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
from rigcast.export.bundling.build import BuildConfig, BuildError, build_bundle, fit_take
from rigcast.export.bundling.onnx_export import OPSET, session
from rigcast.export.data.sampling import SparsityConfig
from rigcast.export.training.train import ForwardConfig, InverseConfig
from rigcast.runtime.bundle import load_bundle
from test_models import PatchRig

TINY = BuildConfig(
    samples=400,
    sparsity=SparsityConfig(mean_active=3.0, max_active=6),
    forward=ForwardConfig(hidden=(32, 32), components=8, epochs=10, batch=64),
    inverse=InverseConfig(hidden=(64, 64), steps=300, batch=64, loss_vertices=0, l1=0.003),
    take=InverseConfig(
        hidden=(64, 64),
        steps=100,
        batch=32,
        lr=5e-4,
        supervised=0.0,
        fresh_fraction=0.0,
        loss_vertices=0,
    ),
    input_count=48,
    stable_count=12,
    check_samples=32,
    workers=0,
)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple:
    root = tmp_path_factory.mktemp("build")
    rig = PatchRig()
    t0 = time.perf_counter()
    result = build_bundle(rig, root / "patch.rcb", TINY, cache_dir=root / "cache")
    return rig, root, result, time.perf_counter() - t0


def test_bundle_loads_and_carries_training_figures(built: tuple) -> None:
    rig, _, result, _ = built
    bundle = load_bundle(result.bundle_path)
    m = bundle.manifest
    assert m["opset"] == OPSET
    assert m["build_key"] == result.key
    assert m["fingerprint"]["rig"] == rig.fingerprint()
    assert set(m["training"]["timings"]) >= {"sample", "forward", "inverse", "export", "check"}
    assert m["training"]["forward"]["mean_err_pct_diag"] == result.forward.mean_err_pct_diag
    assert set(m["versions"]) >= {"torch", "onnx", "onnxruntime", "numpy", "rigcast"}
    assert bundle.input_indices.shape == (48,) and bundle.stable_indices.shape == (12,)
    assert set(bundle.stable_indices.tolist()) <= set(rig.static.tolist())
    assert result.forward_model is not None and result.inverse_model is not None


def test_bundle_inverse_solves_through_the_real_rig(built: tuple) -> None:
    rig, _, result, _ = built
    bundle = load_bundle(result.bundle_path)
    rng = np.random.default_rng(11)
    c = np.where(rng.random((50, 8)) < 0.4, rng.random((50, 8)), 0.0)
    x = rig.evaluate(c)
    w = session(bundle.inverse_onnx).run(None, {"mesh": x[:, bundle.input_indices]})[0]
    err = np.linalg.norm(rig.evaluate(w) - x, axis=-1).mean()
    rest = np.linalg.norm(rig.neutral[None] - x, axis=-1).mean()
    assert err < 0.5 * rest  # 300 tiny steps: at least half the rest-pose error is removed


def test_cache_reuse_returns_the_same_bundle(built: tuple, tmp_path: Path) -> None:
    rig, root, first, first_seconds = built
    t0 = time.perf_counter()
    again = build_bundle(rig, tmp_path / "copy.rcb", TINY, cache_dir=root / "cache")
    assert again.cached and again.key == first.key
    assert (tmp_path / "copy.rcb").read_bytes() == first.bundle_path.read_bytes()
    assert time.perf_counter() - t0 < first_seconds
    assert again.forward == first.forward


def test_take_mode_lowers_the_error_on_the_take(built: tuple, tmp_path: Path) -> None:
    rig, _, general, _ = built
    rng = np.random.default_rng(5)
    frames = rig.evaluate(0.5 + 0.5 * rng.random((48, 8)))  # all controls on: off distribution

    def err(path: Path) -> float:
        b = load_bundle(path)
        w = session(b.inverse_onnx).run(None, {"mesh": frames[:, b.input_indices]})[0]
        return float(np.linalg.norm(rig.evaluate(w) - frames, axis=-1).mean())

    tuned = fit_take(general, rig, frames, tmp_path / "take.rcb", TINY)
    assert tuned.inverse.mode == "take"
    assert err(tuned.bundle_path) < 0.8 * err(general.bundle_path)


def test_bad_config_and_frames_are_named() -> None:
    with pytest.raises(BuildError, match="'batch'"):
        BuildConfig(mode="batch")
    with pytest.raises(BuildError, match="take mode"):
        build_bundle(PatchRig(), "/nonexistent/x.rcb", BuildConfig(mode="take"))
