"""The forward model's kinematic chain is on by default (issue 12): a build of a small skinned
joint chain with default forward settings learns one over every joint angle and ships it in
the bundle's graphs; a build of a blendshape rig learns none."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch
from rigcast.export.bundling.build import BuildConfig, build_bundle
from rigcast.export.bundling.onnx_export import session
from rigcast.export.data.sampling import SparsityConfig
from rigcast.export.rigs.rig import Rig
from rigcast.export.training.models import load_checkpoint, normalise_controls
from rigcast.export.training.train import ForwardConfig, InverseConfig
from rigcast.runtime.bundle import load_bundle
from test_models import PatchRig
from test_train_forward_chain import ChainRig

#: Small sizes; the chain is left at its default on purpose.
FORWARD = ForwardConfig(hidden=(16,), components=8, epochs=3, batch=64)


def _tiny(forward: ForwardConfig) -> BuildConfig:
    return BuildConfig(
        samples=300,
        sparsity=SparsityConfig(mean_active=3.0, max_active=6),
        forward=forward,
        inverse=InverseConfig(hidden=(16,), steps=20, batch=32, loss_vertices=0),
        check_samples=8,
        workers=0,
    )


def _build(rig: Rig, root: Path) -> tuple:
    result = build_bundle(rig, root / f"{rig.name}.rcb", _tiny(FORWARD), cache_dir=root / "c")
    fwd, _, _ = load_checkpoint(root / "c" / result.key / "checkpoint.pt")
    return result, fwd


def test_chain_is_the_default() -> None:
    assert ForwardConfig().chain is True
    assert FORWARD.chain is True


def test_default_build_of_a_skinned_rig_uses_the_chain(tmp_path: Path) -> None:
    """Every joint angle of a 2-joint tube (linear blend skinning) turns its anchor rigidly, so
    all 4 join; the cached checkpoint and the bundle's forward graph carry the chain (the graph
    gives the chained model's mesh, not the MLP's alone)."""
    torch.manual_seed(0)
    rig = ChainRig(joints=2, rings=8, around=6)
    result, fwd = _build(rig, tmp_path)
    assert result.forward_model.chain is not None
    assert result.forward_model.chain.select.argmax(dim=1).tolist() == [0, 1, 2, 3]
    assert fwd.chain is not None and fwd.chain.joint_count == 4
    probe = np.array([[30.0, -20.0, -35.0, 25.0]], np.float32)
    model = result.forward_model
    graph = session(load_bundle(result.bundle_path).forward_onnx)
    got = graph.run(None, {"controls": probe})[0].reshape(-1, 3)
    with torch.no_grad():
        t = torch.from_numpy(probe)
        full = model(t).numpy().reshape(-1, 3)
        chain_part = model.chain(normalise_controls(t, model.lower, model.upper))
    assert float(chain_part.abs().max()) > 1e-3  # the chain adds something at this pose
    np.testing.assert_allclose(got, full, atol=1e-4)


def test_default_build_of_a_blendshape_rig_has_no_chain(tmp_path: Path) -> None:
    """Gaussian bumps with a corrective turn nothing rigidly: no chain, the MLP's model alone."""
    torch.manual_seed(0)
    rig = PatchRig(n=8, controls=4)
    result, fwd = _build(rig, tmp_path)
    assert result.forward_model.chain is None
    assert fwd.chain is None
