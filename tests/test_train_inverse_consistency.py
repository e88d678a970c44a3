"""The inverse network's noise-consistency term: two independent input-noise draws on the same
pose should give the same controls (issue 12, section 3, the smoothness point)."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from rigcast.export.training import reduction, train
from rigcast.export.training.train_common import TrainError
from rigcast.runtime.schema import Control, ControlSchema

CONTROLS = 10
NOISE_FRAC = 0.0015  # the training's input noise, also the noise of the spread probe


def _rig() -> tuple[np.ndarray, np.ndarray, ControlSchema]:
    """A linear blendshape patch: a 12 x 12 grid, each control one Gaussian bump in a random
    direction, weights in [0, 1] at rest on 0 (neutral (V, 3), shapes (C, V, 3), schema). The
    last four bumps sit close beside four others, so those pairs move the mesh nearly alike:
    the ill-conditioned directions where a per-frame fit's controls follow the noise."""
    n = 12
    xs, ys = np.meshgrid(np.linspace(0, 1, n), np.linspace(0, 1, n))
    neutral = np.stack([xs.ravel(), ys.ravel(), np.zeros(n * n)], 1).astype(np.float32)
    rng = np.random.default_rng(4)
    centres = rng.random((CONTROLS, 2))
    centres[-4:] = centres[:4] + 0.01
    d2 = ((neutral[None, :, :2] - centres[:, None]) ** 2).sum(-1)
    dirs = rng.standard_normal((CONTROLS, 3))
    dirs[-4:] = dirs[:4] + 0.05 * rng.standard_normal((4, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    shapes = (0.02 * np.exp(-d2 / 0.03)[:, :, None] * dirs[:, None, :]).astype(np.float32)
    schema = ControlSchema(tuple(Control(f"shape{i}", 0.0, 1.0, 0.0) for i in range(CONTROLS)))
    return neutral, shapes, schema


def _poses(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.where(rng.random((n, CONTROLS)) < 0.3, rng.random((n, CONTROLS)), 0.0).astype(
        np.float32
    )


def _spread(inv: torch.nn.Module, clean: np.ndarray, sigma: float, draws: int = 16) -> float:
    """clean: (N, K, 3) input vertices -> RMS over poses and controls of the controls' standard
    deviation across ``draws`` white-noise draws of ``sigma`` (range is 1)."""
    gen = torch.Generator().manual_seed(123)
    x = torch.from_numpy(clean)
    with torch.no_grad():
        outs = torch.stack(
            [inv(x + sigma * torch.randn(x.shape, generator=gen)) for _ in range(draws)]
        )
    return float(outs.std(dim=0).pow(2).mean().sqrt())


@pytest.fixture(scope="module")
def trained() -> dict:
    neutral, shapes, schema = _rig()
    c = _poses(800, 1)
    x = neutral[None] + np.einsum("bc,cvk->bvk", c, shapes)
    fwd, _ = train.train_forward(
        c, x, neutral, schema.lower, schema.upper,
        train.ForwardConfig(hidden=(32, 32), components=12, epochs=10, batch=64),
    )
    motion = reduction.motion_rms(neutral, x)
    inputs = reduction.select_input_vertices(neutral, motion, 40)
    base = train.InverseConfig(hidden=(64, 64), steps=300, batch=64, loss_vertices=0,
                               noise_frac=NOISE_FRAC, wobble_frac=0.0)
    out = {"neutral": neutral, "shapes": shapes, "inputs": inputs}
    for name, weight in (("plain", 0.0), ("consistent", 100.0)):
        inv, rep = train.train_inverse(
            fwd, x, inputs, schema.defaults,
            train.InverseConfig(**{**base.__dict__, "consistency": weight,
                                    "consistency_space": "controls"}), controls=c,
        )
        out[name], out[f"{name}_rep"] = inv, rep
    return out


def test_consistency_lowers_the_output_spread_under_input_noise(trained: dict) -> None:
    neutral, shapes, inputs = trained["neutral"], trained["shapes"], trained["inputs"]
    c = _poses(200, 77)
    clean = (neutral[None] + np.einsum("bc,cvk->bvk", c, shapes))[:, inputs]
    sigma = NOISE_FRAC * train.diagonal(neutral)
    plain = _spread(trained["plain"], clean, sigma)
    consistent = _spread(trained["consistent"], clean, sigma)
    # The term's whole point: the same pose under two noise draws gives closer controls. The
    # bound is ours (no source): at least a fifth less spread, same seed and schedule.
    assert consistent < 0.8 * plain, (plain, consistent)


def test_consistency_keeps_the_mesh_fit(trained: dict) -> None:
    neutral, shapes = trained["neutral"], trained["shapes"]
    c = _poses(200, 78)
    x = neutral[None] + np.einsum("bc,cvk->bvk", c, shapes)
    rest = train.vertex_errors(np.broadcast_to(neutral, x.shape), x).mean()
    # Lower spread is bought with a little bias (measured 2.3x the plain network's held-out
    # error through the forward model at this weight on this rig); the network must still fit:
    # a third of the rest pose's error, the bound tests/test_models.py holds a plain one to.
    assert trained["consistent_rep"].mean_err < 0.33 * rest
    assert trained["plain_rep"].mean_err < 0.33 * rest


@pytest.mark.parametrize("weight, space", [(-1.0, "mesh"), (1.0, "logits")])
def test_bad_consistency_settings_are_named(weight: float, space: str) -> None:
    neutral, shapes, schema = _rig()
    c = _poses(40, 2)
    x = neutral[None] + np.einsum("bc,cvk->bvk", c, shapes)
    fwd, _ = train.train_forward(c, x, neutral, schema.lower, schema.upper,
                                 train.ForwardConfig(hidden=(8,), components=4, epochs=1))
    config = train.InverseConfig(steps=2, consistency=weight,
                                 consistency_space=space)  # type: ignore[arg-type]
    with pytest.raises(TrainError, match="consistency"):
        train.train_inverse(fwd, x, np.arange(8), schema.defaults, config, controls=c)
