"""Stabilisation by evidence: a rig with no rigid region is not stabilised unless asked.

Before, every solve fitted a rigid transform to the "stable" vertices, even on rigs where the
controls move them all, and so turned every frame by the pose's own deformation.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from rigcast.export.bundling.build import stabilise_section
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle
from rigcast.export.data.sampling import SparsityConfig, sample_controls
from rigcast.export.rigs.zoo import make_zoo_rig
from rigcast.export.training import reduction
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.serve.config import StreamConfig
from rigcast.runtime.solve.batch import BatchSolver, SolveOptions
from rigcast.runtime.solve.pipeline import StreamState, load_stream_model

from tests.conftest import TINY, rig_mesh, tiny_rig


def _section(rig_seed: int) -> tuple[bool | None, dict]:
    rig = make_zoo_rig(rig_seed, max_vertices=1500, max_controls=30)
    controls = sample_controls(rig.schema, 200, sparsity=SparsityConfig(), seed=3)
    motion = reduction.motion_rms(rig.neutral, rig.evaluate(controls))
    stable = reduction.stable_vertices_for(rig.neutral, motion)
    return getattr(rig, "rigid_region", None), stabilise_section(rig.neutral, motion, stable)


def test_stable_vertices_take_the_whole_static_region_and_it_steadies_the_fit() -> None:
    """With a static region larger than the old fixed count, the build stabilises on all of it
    (up to a cap), so sensor noise turns the frame less: the rigid fit of a noisy, undeformed
    mesh on the default stable set errs several times less than on the old count."""
    rng = np.random.default_rng(4)
    v = 3000
    neutral = rng.uniform(-1, 1, (v, 3))
    motion = np.where(np.arange(v) < 1200, 0.0, rng.uniform(0.01, 0.1, v))  # 1,200 static
    stable = reduction.stable_vertices_for(neutral, motion)
    assert stable.size == 1200 and (motion[stable] == 0).all()
    old = reduction.select_stable_vertices(neutral, motion, reduction.stable_count_for(v))
    assert old.size < 100
    assert reduction.stable_vertices_for(neutral, motion, cap=500).size == 500
    moving = reduction.stable_vertices_for(neutral, np.linspace(0.1, 1.0, v))  # no static region
    assert moving.size == reduction.stable_count_for(v)
    from rigcast.runtime.solve.align import fit_rigid_batch

    def rotation_error(idx: np.ndarray) -> float:
        noisy = neutral[None] + rng.normal(0.0, 0.01, (200, v, 3))
        fit = fit_rigid_batch(noisy[:, idx], neutral[idx])
        return float(np.abs(fit.rotation - np.eye(3)).max(axis=(1, 2)).mean())

    assert rotation_error(stable) < 0.4 * rotation_error(old)  # sqrt(1200 / 75) = 4x in theory


def test_build_measures_whether_the_stable_vertices_are_rigid() -> None:
    seen = set()
    for seed in range(12):
        truth, section = _section(seed)
        assert section["rigid_region"] == truth, (seed, section)
        seen.add(truth)
        if len(seen) == 2:
            break
    assert seen == {True, False}, "the zoo's first seeds should give both kinds"


def test_solve_and_serve_skip_stabilisation_without_a_rigid_region(tmp_path: Path) -> None:
    path = build_synthetic_bundle(tmp_path / "soft.rcb", **TINY, name="soft", rigid_region=False)
    bundle = load_bundle(path)
    assert not bundle.rigid_region
    rig = tiny_rig()
    controls = np.random.default_rng(0).uniform(0.1, 0.9, (6, TINY["controls"]))
    # The whole mesh shifted: only a stabilised solve removes the shift before solving.
    shift = np.array([0.2, 0.0, 0.0], np.float32)
    meshes = np.stack([rig_mesh(rig, c) for c in controls]).astype(np.float32) + shift
    times = np.arange(6) / 60.0
    solver = BatchSolver(bundle, threads=1)
    by_default = solver.solve(meshes, times, SolveOptions(filter="none", fit_error_scope="off"))
    forced = solver.solve(meshes, times, SolveOptions(filter="none", fit_error_scope="off",
                                                      stream=StreamConfig(stabilise=True)))
    assert np.abs(forced.controls - controls).max() < 1e-3
    assert np.abs(by_default.controls - controls).max() > 0.05, "the shift was stabilised away"
    model = load_stream_model(path, threads=1, threshold=None, factor=3.0)
    assert not StreamState(StreamConfig("a", path), model, 16).stabilise
    assert StreamState(StreamConfig("a", path, stabilise=True), model, 16).stabilise


def test_bundles_with_a_rigid_region_stabilise_by_default(tiny_bundle: Path) -> None:
    model = load_stream_model(tiny_bundle, threads=1, threshold=None, factor=3.0)
    assert model.bundle.rigid_region
    assert StreamState(StreamConfig("a", tiny_bundle), model, 16).stabilise
