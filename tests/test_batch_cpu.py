"""The batch solve's CPU time per stage (BatchSolve.stage_cpu_s), which bench/batch.py prints."""

from __future__ import annotations

import time

import numpy as np
import pytest
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.bundle import Bundle, load_bundle
from rigcast.runtime.solve.batch import STAGES, BatchSolver, SolveOptions

RIG = dict(vertices=300, controls=8, inputs=40, stable=16, seed=0)


@pytest.fixture(scope="module")
def bundle(tmp_path_factory: pytest.TempPathFactory) -> Bundle:
    path = tmp_path_factory.mktemp("b") / "synthetic.rcb"
    build_synthetic_bundle(path, inverse="lstsq", **RIG)
    return load_bundle(path)


def _take(t: int) -> tuple[np.ndarray, np.ndarray]:
    rig = make_synthetic_rig(**RIG)
    rng = np.random.default_rng(2)
    controls = rng.uniform(rig.schema.lower, rig.schema.upper, (t, len(rig.schema)))
    return rig.evaluate(controls.astype(np.float32)), np.arange(t) / 60.0


@pytest.mark.parametrize("threads", [1, 2])
@pytest.mark.parametrize("scope", ["full", "off"])
def test_stage_cpu_adds_up_to_no_more_than_the_process_used(bundle: Bundle, threads: int,
                                                            scope: str) -> None:
    meshes, times = _take(400)
    solver = BatchSolver(bundle, threads=threads)
    options = SolveOptions(batch_size=64, fit_error_scope=scope)
    solver.solve(meshes, times, options)  # warm
    start = time.process_time()
    result = solver.solve(meshes, times, options)
    used = time.process_time() - start
    stages = result.stage_cpu_s
    assert tuple(stages) == STAGES
    assert all(v >= 0.0 for v in stages.values()), stages
    assert stages["solve"] > 0.0 and stages["stabilise"] > 0.0
    assert (stages["fit_error"] > 0.0) == (scope != "off"), stages
    # every stage's time is some thread's CPU time inside the solve (the clocks tick in
    # scheduler quanta: a few ms of slack)
    assert sum(stages.values()) <= used + 0.01, (stages, used)
