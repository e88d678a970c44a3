"""One live stream (runtime/solve/pipeline.py) is the solve core on a batch of one frame: frame by
frame it publishes what the batch solve computes for the whole take, with the same settings."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.messaging import protocol
from rigcast.runtime.serve.config import GroupFilter, StreamConfig
from rigcast.runtime.solve.batch import SolveOptions, solve_take
from rigcast.runtime.solve.pipeline import StreamState, load_stream_model

RIG = dict(vertices=300, controls=8, inputs=40, stable=16, seed=0)


def test_a_stream_publishes_what_the_batch_solve_computes(tmp_path: Path) -> None:
    path = build_synthetic_bundle(tmp_path / "b.rcb", inverse="mlp", hidden=32, **RIG)
    rig = make_synthetic_rig(RIG["vertices"], RIG["controls"], inputs=RIG["inputs"],
                             stable=RIG["stable"], seed=RIG["seed"])
    rng = np.random.default_rng(0)
    t = 90
    meshes = rig.evaluate(np.clip(np.cumsum(rng.normal(0, 0.05, (t, RIG["controls"])), 0) + 0.5,
                                  0, 1).astype(np.float32))
    times = np.arange(t) / 60.0
    times[60:] += 0.5  # a gap: both restart the filter
    model = load_stream_model(path, threads=1, threshold=None, factor=3.0)
    group = model.bundle.schema.controls[0].group
    settings = StreamConfig(stream="s", bundle=path, min_cutoff=0.8, beta=2.0, d_cutoff=1.5,
                            gap_ms=300.0, stabilise=True, stabilise_scale=True,
                            groups=(GroupFilter(group, 0.4, 0.5, 2.0),))
    state = StreamState(settings, model, window=100)
    sent: list[protocol.ControlsMessage] = []
    for i in range(t):
        wire = protocol.encode_mesh("s", i, 10**12 + round(times[i] * 1e9), meshes[i])
        mesh = protocol.decode_mesh(protocol.decode_header(wire[0]), wire[1],
                                    expected_vertices=RIG["vertices"], max_bytes=1 << 24)
        state.process(mesh, 0, 0, 0, lambda f: sent.append(protocol.decode_controls(f)))
    live = np.array([m.values for m in sent])
    batch = solve_take(load_bundle(path), meshes, times,
                       SolveOptions(stream=settings, batch_size=32, fit_error_scope="off"))
    np.testing.assert_allclose(live, batch.controls, rtol=0, atol=1e-6)
    assert [m.has(protocol.FLAG_FILTERED) for m in sent].count(False) == 2  # first and gap
    assert np.abs(np.diff(live, axis=0)).max() > 1e-3  # the take moves: the test can fail
    with pytest.raises(AssertionError):
        np.testing.assert_allclose(live, solve_take(load_bundle(path), meshes, times,
                                                    SolveOptions(filter="none")).controls,
                                   atol=1e-6)
