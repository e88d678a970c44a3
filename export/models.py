"""Torch models: the forward approximator (controls -> mesh) and the inverse (mesh -> controls).

The modules only hold parameters and buffers and call the small functions below. Everything the
exported graphs need (neutral mesh, bounds, scales, bases) is a registered buffer, so ONNX export
bakes it in and the runtime needs no side information.

Forward approximator, for controls ``c`` (N, C) with bounds ``lo``, ``hi``:

    u       = (c - lo) / (hi - lo)                       normalised controls in [0, 1]
    linear  = u @ W + b                                  blendshape layer, least squares on the data
    coeffs  = MLP(u)                                     (N, P)
    offsets = linear + coeffs @ basis                    basis: (P, 3V) PCA of the linear residual
    mesh    = neutral + offsets                          (N, V, 3)

The linear layer alone is exact for a linear rig; the MLP adds the non-linear part (corrective
products, skinned joints) in a low-dimensional residual basis, so its output layer stays small.

Inverse network, for ``x`` (N, K, 3) absolute positions of the K input vertices:

    h = (x - neutral[K]) / scale                         (N, 3K)
    z = MLP(h)                                           (N, C)
    u = clip((1 + 2m) * sigmoid(z) - m, 0, 1)            m = EDGE_MARGIN
    c = lo + (hi - lo) * u                               never leaves the bounds

The sigmoid is stretched by a margin m on each side and clipped, so a control can sit *exactly* on
a bound (a plain sigmoid only approaches it, and a control at rest on its lower bound would then
hover a little above it on every frame, counting as active and adding jitter). Inside the bounds
the mapping is a smooth sigmoid, so training gradients behave as for the plain one; in the clipped
band the mesh loss has no gradient, which is what lets an unused control stay at rest. (The same
idea as a ReLU's exact zeros; a rule of thumb, with m chosen by measurement on the demo rigs.)
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import numpy as np
import torch
from torch import nn

log = logging.getLogger(__name__)

#: Share of the range the sigmoid is stretched past each bound before the clip (see above).
EDGE_MARGIN = 0.03


def normalise_controls(c: torch.Tensor, lo: torch.Tensor, hi: torch.Tensor) -> torch.Tensor:
    """c: (N, C); lo, hi: (C,) -> (N, C) in [0, 1] for in-bound controls."""
    return (c - lo) / (hi - lo)


def unit_output(z: torch.Tensor) -> torch.Tensor:
    """z: (N, C) logits -> (N, C) u = clip((1 + 2m) sigmoid(z) - m, 0, 1), m = EDGE_MARGIN."""
    return ((1.0 + 2.0 * EDGE_MARGIN) * torch.sigmoid(z) - EDGE_MARGIN).clamp(0.0, 1.0)


def unit_output_naive(z: np.ndarray) -> np.ndarray:
    """Element-by-element float64 twin of ``unit_output``. z: (N, C) -> (N, C)."""
    out = np.empty(np.shape(z), dtype=np.float64)
    for idx, zi in np.ndenumerate(np.asarray(z, np.float64)):
        s = 1.0 / (1.0 + math.exp(-zi)) if zi >= -700 else 0.0
        out[idx] = min(1.0, max(0.0, (1.0 + 2.0 * EDGE_MARGIN) * s - EDGE_MARGIN))
    return out


def sigmoid_target(u: torch.Tensor) -> torch.Tensor:
    """u: (N, C) normalised controls in [0, 1] -> the sigmoid value that ``unit_output`` maps to
    u (the target of the supervised logit term)."""
    return (u + EDGE_MARGIN) / (1.0 + 2.0 * EDGE_MARGIN)


def scaled_sigmoid(z: torch.Tensor, lo: torch.Tensor, hi: torch.Tensor) -> torch.Tensor:
    """z: (N, C) logits; lo, hi: (C,) -> (N, C) = lo + (hi - lo) * unit_output(z), in [lo, hi]."""
    return lo + (hi - lo) * unit_output(z)


def default_logits(defaults: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """(C,) logits z with ``scaled_sigmoid(z)`` == defaults (a default on a bound maps to the
    edge of the clipped band, so the control starts exactly at rest)."""
    u = (np.asarray(defaults, np.float64) - lo) / (np.asarray(hi, np.float64) - lo)
    s = (np.clip(u, 0.0, 1.0) + EDGE_MARGIN) / (1.0 + 2.0 * EDGE_MARGIN)
    return np.log(s / (1.0 - s)).astype(np.float32)


def mlp(sizes: list[int], activation: type[nn.Module] = nn.SiLU) -> nn.Sequential:
    """A plain MLP: Linear layers of the given sizes with ``activation`` between them."""
    layers: list[nn.Module] = []
    for i in range(len(sizes) - 1):
        layers.append(nn.Linear(sizes[i], sizes[i + 1]))
        if i < len(sizes) - 2:
            layers.append(activation())
    return nn.Sequential(*layers)


def _f32(a: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(np.array(a, dtype=np.float32, copy=True))


class ForwardApproximator(nn.Module):
    """controls (N, C) -> vertices (N, V, 3).

    neutral: (V, 3); lower, upper: (C,); linear_weight: (C, 3V) and linear_bias: (3V,) act on
    normalised controls; basis: (P, 3V) orthonormal rows of the residual PCA. ``hidden`` sizes
    the correction MLP; its last layer starts at zero, so an untrained model is the linear layer.
    """

    neutral: torch.Tensor
    lower: torch.Tensor
    upper: torch.Tensor
    basis: torch.Tensor

    def __init__(
        self,
        neutral: np.ndarray,
        lower: np.ndarray,
        upper: np.ndarray,
        linear_weight: np.ndarray,
        linear_bias: np.ndarray,
        basis: np.ndarray,
        hidden: tuple[int, ...] = (256, 256, 256),
    ) -> None:
        super().__init__()
        v = int(neutral.shape[0])
        c = int(lower.shape[0])
        p = int(basis.shape[0])
        self.vertex_count = v
        self.control_count = c
        self.hidden = tuple(hidden)
        self.register_buffer("neutral", _f32(neutral).reshape(v * 3))
        self.register_buffer("lower", _f32(lower))
        self.register_buffer("upper", _f32(upper))
        self.register_buffer("basis", _f32(basis).reshape(p, v * 3))
        self.linear_weight = nn.Parameter(_f32(linear_weight).reshape(c, v * 3))
        self.linear_bias = nn.Parameter(_f32(linear_bias).reshape(v * 3))
        self.correction = mlp([c, *hidden, p]) if p > 0 else None
        if self.correction is not None:
            last = self.correction[-1]
            assert isinstance(last, nn.Linear)
            nn.init.zeros_(last.weight)
            nn.init.zeros_(last.bias)

    def coefficients(self, u: torch.Tensor) -> torch.Tensor:
        """u: (N, C) normalised controls -> (N, P) residual-basis coefficients."""
        if self.correction is None:
            return u.new_zeros((u.shape[0], 0))
        out: torch.Tensor = self.correction(u)
        return out

    def offsets(self, controls: torch.Tensor) -> torch.Tensor:
        """controls: (N, C) -> (N, 3V) flat offsets from the neutral."""
        u = normalise_controls(controls, self.lower, self.upper)
        out = u @ self.linear_weight + self.linear_bias
        if self.correction is not None:
            out = out + self.coefficients(u) @ self.basis
        return out

    def forward(self, controls: torch.Tensor) -> torch.Tensor:
        flat = self.neutral + self.offsets(controls)
        return flat.reshape(-1, self.vertex_count, 3)

    def restricted(self, indices: np.ndarray) -> VertexSubset:
        """A view that evaluates only the vertices ``indices`` (L,), for cheaper training losses."""
        return VertexSubset(self, indices)


class VertexSubset(nn.Module):
    """controls (N, C) -> (N, L, 3): a ForwardApproximator restricted to L vertices.

    Slices the linear layer, bias, neutral and basis columns once; shares the correction MLP.
    """

    neutral: torch.Tensor
    weight: torch.Tensor
    bias: torch.Tensor
    basis: torch.Tensor

    def __init__(self, full: ForwardApproximator, indices: np.ndarray) -> None:
        super().__init__()
        idx = torch.as_tensor(np.asarray(indices, np.int64))
        cols = (idx[:, None] * 3 + torch.arange(3)).reshape(-1)
        self.count = int(idx.shape[0])
        self.full = full
        self.register_buffer("neutral", full.neutral[cols].clone())
        self.register_buffer("weight", full.linear_weight.detach()[:, cols].clone())
        self.register_buffer("bias", full.linear_bias.detach()[cols].clone())
        self.register_buffer("basis", full.basis[:, cols].clone())

    def forward(self, controls: torch.Tensor) -> torch.Tensor:
        u = normalise_controls(controls, self.full.lower, self.full.upper)
        out = self.neutral + u @ self.weight + self.bias
        if self.full.correction is not None:
            out = out + self.full.coefficients(u) @ self.basis
        return out.reshape(-1, self.count, 3)


class InverseNetwork(nn.Module):
    """mesh (N, K, 3) absolute positions of ``input_indices`` -> controls (N, C) within bounds.

    neutral_inputs: (K, 3) neutral positions of the input vertices; scale: one float, the offset
    magnitude that maps to ~1 (e.g. the RMS training offset); lower, upper, defaults: (C,).
    The last layer starts with small weights and a bias at the defaults' logits, so an untrained
    network outputs (nearly) the rest pose.
    """

    neutral_inputs: torch.Tensor
    inv_scale: torch.Tensor
    lower: torch.Tensor
    upper: torch.Tensor
    defaults: torch.Tensor

    def __init__(
        self,
        neutral_inputs: np.ndarray,
        scale: float,
        lower: np.ndarray,
        upper: np.ndarray,
        defaults: np.ndarray,
        hidden: tuple[int, ...] = (512, 512),
    ) -> None:
        super().__init__()
        if not scale > 0.0 or not math.isfinite(scale):
            raise ValueError(f"inverse input scale must be a positive finite number, got {scale!r}")
        k = int(neutral_inputs.shape[0])
        c = int(lower.shape[0])
        self.input_count = k
        self.control_count = c
        self.hidden = tuple(hidden)
        self.register_buffer("neutral_inputs", _f32(neutral_inputs).reshape(k * 3))
        self.register_buffer("inv_scale", torch.tensor(1.0 / scale, dtype=torch.float32))
        self.register_buffer("lower", _f32(lower))
        self.register_buffer("upper", _f32(upper))
        self.register_buffer("defaults", _f32(defaults))
        self.body = mlp([k * 3, *hidden, c])
        last = self.body[-1]
        assert isinstance(last, nn.Linear)
        with torch.no_grad():
            last.weight.mul_(0.1)
            last.bias.copy_(_f32(default_logits(defaults, lower, upper)))

    def logits(self, mesh: torch.Tensor) -> torch.Tensor:
        """mesh: (N, K, 3) -> (N, C) logits."""
        h = (mesh.reshape(mesh.shape[0], -1) - self.neutral_inputs) * self.inv_scale
        out: torch.Tensor = self.body(h)
        return out

    def forward(self, mesh: torch.Tensor) -> torch.Tensor:
        return scaled_sigmoid(self.logits(mesh), self.lower, self.upper)


def save_checkpoint(
    path: str | Path,
    forward: ForwardApproximator,
    inverse: InverseNetwork,
    extra: dict | None = None,
) -> Path:
    """Save both models' ``state_dict``s and their constructor sizes to ``path`` (torch.save)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    payload = {
        "format": "rigcast-checkpoint/1",
        "forward": {
            "state": forward.state_dict(),
            "vertex_count": forward.vertex_count,
            "control_count": forward.control_count,
            "components": int(forward.basis.shape[0]),
            "hidden": list(forward.hidden),
        },
        "inverse": {
            "state": inverse.state_dict(),
            "input_count": inverse.input_count,
            "control_count": inverse.control_count,
            "hidden": list(inverse.hidden),
        },
        "extra": dict(extra or {}),
    }
    tmp = path.with_name(path.name + ".partial")
    torch.save(payload, tmp)
    tmp.replace(path)
    return path


def load_checkpoint(path: str | Path) -> tuple[ForwardApproximator, InverseNetwork, dict]:
    """Rebuild (forward, inverse, extra) from ``save_checkpoint``; both frozen, in eval mode."""
    payload = torch.load(Path(path), map_location="cpu", weights_only=True)
    if not isinstance(payload, dict) or payload.get("format") != "rigcast-checkpoint/1":
        raise ValueError(f"{path} is not a rigcast checkpoint")
    f, i = payload["forward"], payload["inverse"]
    v, c, p = int(f["vertex_count"]), int(f["control_count"]), int(f["components"])
    z = np.zeros
    fwd = ForwardApproximator(
        z((v, 3)), z(c), np.ones(c), z((c, 3 * v)), z(3 * v), z((p, 3 * v)), tuple(f["hidden"])
    )
    fwd.load_state_dict(f["state"])
    k = int(i["input_count"])
    inv = InverseNetwork(z((k, 3)), 1.0, z(c), np.ones(c), z(c), tuple(i["hidden"]))
    inv.load_state_dict(i["state"])
    for m in (fwd, inv):
        m.eval()
        for q in m.parameters():
            q.requires_grad_(False)
    return fwd, inv, dict(payload.get("extra", {}))
