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
    # the refinement's curvature, chosen by the held-out figures the manifest records
    from rigcast.export.bundling.build_check import CURVATURE_GAIN

    err = m["training"]["curvature_check"]
    assert set(err) == {"fixed", "step"} and all(v > 0 for v in err.values())
    want = "step" if err["step"] <= CURVATURE_GAIN * err["fixed"] else "fixed"
    assert m["refine"]["curvature"] == want


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


def _saturate(inverse_onnx: bytes, control: int, logit: float) -> bytes:
    """The inverse graph with one output's last layer cut from the input: its logit is ``logit``
    on every mesh (the dead output of a face-linear build, whose jaw_drop logit sat near -194)."""
    import onnx
    from onnx import numpy_helper

    model = onnx.load_from_string(inverse_onnx)
    last = [n for n in model.graph.node if n.op_type == "Gemm"][-1]
    inits = {i.name: i for i in model.graph.initializer}
    for name, row in ((last.input[1], 0.0), (last.input[2], logit)):
        arr = numpy_helper.to_array(inits[name]).copy()
        arr[control] = row
        inits[name].CopyFrom(numpy_helper.from_array(arr, name))
    return model.SerializeToString()


def test_build_check_names_a_dead_output(built: tuple) -> None:
    """A saturated output (logit -194 on every pose, deep in the scaled sigmoid's flat zone) is
    named by the check, stuck and saturated; the trained bundle has none, and its manifest says
    so. A logit of +4 is inside the clip's upper flat zone (s = 1.06 sigmoid(4) - 0.03 > 1), so
    the output sits at its bound: stuck and saturated too."""
    from dataclasses import replace

    from rigcast.export.bundling.build_check import dead_outputs, flat_zone

    rig, _, result, _ = built
    bundle = load_bundle(result.bundle_path)
    assert bundle.manifest["training"]["reference"]["dead_outputs"] == []
    assert dead_outputs(bundle, rig) == []
    for logit in (-194.0, 4.0):
        broken = replace(bundle, inverse_onnx=_saturate(bundle.inverse_onnx, 2, logit))
        dead = dead_outputs(broken, rig)
        assert [d.control for d in dead] == ["bump2"]
        assert dead[0].stuck and dead[0].saturated and dead[0].median_logit == pytest.approx(logit)
        assert dead[0].poses == 4 and "bump2" not in dead[0].describe()
    held = np.where(np.random.default_rng(3).random((40, 8)) < 0.4, 0.9, 0.0)
    dead = dead_outputs(broken, rig, rig.evaluate(held), held)  # held-out poses with their truth
    assert [d.control for d in dead] == ["bump2"] and dead[0].poses == 4 + int((held[:, 2] > 0).sum())
    # the flat zone from its definition (models.unit_output): default 0, margin 0.03, band 0.04
    z = np.array([[-194.0, -3.0, -2.0, 0.0, 3.0, 4.0]])
    assert flat_zone(z, np.zeros(6), 0.03, 0.04).tolist() == [[True, True, False, False, False,
                                                                 True]]


def test_the_build_summary_warns_of_a_dead_output_in_one_line() -> None:
    from rigcast.commands.report import _reference_lines

    ref = {"stabilised": True, "poses": 64, "rig_mean_err": 1e-4, "rig_max_err": 1e-3,
           "lsq_mean_err": 2e-4, "lsq_max_err": 2e-3, "recoverable_controls": 46,
           "unrecoverable": []}
    dead = {"control": "jaw_drop", "stuck": True, "saturated": True, "spread_of_range": 0.0,
            "median_logit": -194.0, "poses": 4}
    lines = _reference_lines({**ref, "dead_outputs": [dead]})
    warned = [line for line in lines if line.startswith("warning:") and "jaw_drop" in line]
    assert len(warned) == 1 and "-194" in warned[0]
    assert not [line for line in _reference_lines(ref) if "never moves" in line]


def test_the_build_summary_says_when_the_refinement_uses_the_current_point() -> None:
    from rigcast.commands.report import _reference_lines

    ref = {"stabilised": True, "poses": 64, "rig_mean_err": 1e-4, "rig_max_err": 1e-3,
           "lsq_mean_err": 2e-4, "lsq_max_err": 2e-3, "recoverable_controls": 46,
           "unrecoverable": []}
    said = [line for line in _reference_lines({**ref, "curvature": "step"})
            if "current controls" in line]
    assert len(said) == 1
    assert not [line for line in _reference_lines({**ref, "curvature": "fixed"})
                if "current controls" in line]
