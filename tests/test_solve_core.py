"""The solve core's first solve before a realignment: rough (solve_core.ROUGH_STEPS steps), and
only there.

Real parts: a synthetic moment-form bundle written to disk, real onnxruntime sessions.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.solve.solve_core import (
    ROUGH_STEPS,
    SolveModel,
    open_model,
    solve_points,
    stabilise_frames,
)
from scipy.spatial.transform import Rotation


def _frames(n: int, seed: int) -> np.ndarray:
    """n noisy frames of the synthetic rig (seed 13), turned and shifted a little."""
    rig = make_synthetic_rig(300, 8, inputs=40, stable=16, seed=13)
    rng = np.random.default_rng(seed)
    w = np.clip(rng.normal(0.3, 0.2, (n, 8)), 0, 1).astype(np.float32)
    clean = rig.evaluate(w).astype(np.float64)
    rot = Rotation.from_rotvec(rng.normal(0, 0.05, (n, 3))).as_matrix()
    moved = np.einsum("njk,nik->nij", rot, clean) + rng.normal(0, 0.01, (n, 1, 3))
    noisy = moved + rng.normal(0, 2e-3 * np.ptp(clean), moved.shape)
    return noisy.astype(np.float32)


def _counted(model: SolveModel) -> list[int]:
    """Count the refinement graph's evaluations, batched and on one frame, with the bundle's
    fixed curvature (``gradient``, ``bind``) or the frame's own (``curvature``,
    ``bind_curvature``); the rough copy, made later, shares them all."""
    refiner = model.inverse.refiner
    assert refiner is not None
    count = [0]

    def counted(fn: Callable[..., Any]) -> Callable[..., Any]:
        def run(*args: Any) -> Any:
            count[0] += 1
            return fn(*args)

        return run

    def bound(fn: Callable[..., Any]) -> Callable[..., Any]:
        return lambda state: counted(fn(state))

    for name, wrap in (("gradient", counted), ("bind", bound), ("curvature", counted),
                       ("bind_curvature", bound)):
        fn = getattr(refiner, name, None)
        if fn is not None:
            setattr(refiner, name, wrap(fn))
    return count


def test_only_a_solve_before_a_realignment_is_rough(tmp_path: Path) -> None:
    """With a realignment the first solve takes ROUGH_STEPS steps (fewer graph evaluations than
    the bundle's), as does the middle one of two passes, and the controls stay within a small
    share of the range of those with full solves, in a batch and one frame at a time (the live
    path); with none (passes 0, or not stabilised) the solve is the bundle's own, bit for
    bit."""
    path = build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=13,
                                  inverse="mlp", hidden=32)
    model = open_model(load_bundle(path), label="m", threads=1)
    full = dataclasses.replace(model, rough=None)
    refiner = model.inverse.refiner
    assert refiner is not None and refiner.settings.steps > ROUGH_STEPS
    # every step taken while one lowers the cost (no early stop), so the step counts show
    refiner.settings = dataclasses.replace(refiner.settings, tol=0.0)
    count = _counted(model)
    frames = _frames(12, 14)
    points, rigid = stabilise_frames(model, frames, stabilise=True, scale=False)
    calls = {}
    out = {}
    for label, m in (("rough", model), ("full", full)):
        for passes in (0, 1, 2):
            count[0] = 0
            out[label, passes], _ = solve_points(m, frames, points, rigid, passes=passes,
                                                 scale=False)
            calls[label, passes] = count[0]
        count[0] = 0
        out[label, "one"] = np.concatenate([
            solve_points(m, frames[i : i + 1], points[i : i + 1], rigid.frames(i, i + 1),
                         passes=1, scale=False)[0] for i in range(len(frames))])
        calls[label, "one"] = count[0]
    np.testing.assert_array_equal(out["rough", 0], out["full", 0])
    np.testing.assert_array_equal(out["rough", 0], model.inverse.solve(points))
    assert calls["rough", 1] < calls["full", 1]
    assert calls["rough", 2] - calls["rough", 1] < calls["full", 2] - calls["full", 1]
    assert calls["rough", "one"] < calls["full", "one"]
    # controls in [0, 1]; the realignment's target moved, the solve from the moved frame did not
    assert float(np.abs(out["rough", 1] - out["full", 1]).max()) < 0.02
    assert float(np.abs(out["rough", 2] - out["full", 2]).max()) < 0.02
    # the live path (one frame) and the batch path agree
    np.testing.assert_allclose(out["rough", "one"], out["rough", 1], atol=1e-5)
    unstabilised, _ = solve_points(model, frames, points, None, passes=1, scale=False)
    np.testing.assert_array_equal(unstabilised, model.inverse.solve(points))


def test_the_rough_refiner_follows_the_bundles_settings(tmp_path: Path) -> None:
    """The rough copy takes the bundle's refiner's settings but its own step count, is remade
    when those settings change, and never changes the bundle's refiner."""
    path = build_synthetic_bundle(tmp_path / "m.rcb", refine="projected", seed=3)
    model = open_model(load_bundle(path), label="m", threads=1)
    assert model.rough is not None
    refiner = model.inverse.refiner
    assert refiner is not None
    steps = refiner.settings.steps
    rough = model.rough.get()
    assert rough is not None and rough is not refiner
    assert rough.settings == dataclasses.replace(refiner.settings,
                                                 steps=min(steps, ROUGH_STEPS))
    assert refiner.settings.steps == steps
    assert model.rough.get() is rough  # made once per setting
    refiner.settings = dataclasses.replace(refiner.settings, steps=1, kappa=3.0)
    again = model.rough.get()
    assert again is not None and again is not rough
    assert again.settings.steps == 1 and again.settings.kappa == 3.0
