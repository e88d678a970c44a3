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
    s = clip((1 + 2m) * sigmoid(z) - m, 0, 1)            m = EDGE_MARGIN
    u = rest_band(s)                                     exactly the default on [d - b, d + b]
    c = lo + (hi - lo) * u                               never leaves the bounds

The sigmoid is stretched by a margin m on each side and clipped, so a control can sit *exactly* on
a bound (a plain sigmoid only approaches it, and a control at rest on its lower bound would then
hover a little above it on every frame, counting as active and adding jitter). Inside the bounds
the mapping is a smooth sigmoid, so training gradients behave as for the plain one; in the clipped
band the mesh loss has no gradient, which is what lets an unused control stay at rest. The rest
band does the same for a default inside the range (a joint angle at 0 in [-40, 40]): s within b of
the normalised default d gives exactly d, and each side is stretched linearly back onto [0, d] and
[d, 1], so the map stays continuous, monotone and onto [0, 1]. (The same idea as a ReLU's exact
zeros; a rule of thumb, with m and b chosen by measurement on the demo rigs.)
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import numpy as np
import torch
from rigcast.export.training.kinematic import KinematicChain
from torch import nn

log = logging.getLogger(__name__)

#: Share of the range the sigmoid is stretched past each bound before the clip (see above).
EDGE_MARGIN = 0.03
#: Half-width of the rest band around each default, as a share of the range (see above).
REST_BAND = 0.04


def normalise_controls(c: torch.Tensor, lo: torch.Tensor, hi: torch.Tensor) -> torch.Tensor:
    """c: (N, C); lo, hi: (C,) -> (N, C) in [0, 1] for in-bound controls."""
    return (c - lo) / (hi - lo)


def band_coefficients(d: np.ndarray, band: float = REST_BAND) -> np.ndarray:
    """d: (C,) defaults in [0, 1] -> (4, C) float32 rows (b_lo, b_hi, a_lo, a_hi) of the rest band.

    b_lo, b_hi: half-widths of the band below and above d (at most half the room on that side,
    0 where d sits on a bound); a_lo, a_hi: slopes that map the rest of each side back onto it.
    """
    d = np.clip(np.asarray(d, np.float64), 0.0, 1.0)
    b_lo, b_hi = np.minimum(band, d / 2), np.minimum(band, (1.0 - d) / 2)
    a_lo = np.where(d > 0, d / np.maximum(d - b_lo, 1e-12), 1.0)
    a_hi = np.where(d < 1, (1.0 - d) / np.maximum(1.0 - d - b_hi, 1e-12), 1.0)
    return np.stack([b_lo, b_hi, a_lo, a_hi]).astype(np.float32)


def unit_output(z: torch.Tensor, d: torch.Tensor, coef: torch.Tensor) -> torch.Tensor:
    """z: (N, C) logits; d: (C,) defaults in [0, 1]; coef: (4, C) from ``band_coefficients``
    -> (N, C) u in [0, 1]:

        s = clip((1 + 2m) sigmoid(z) - m, 0, 1)                      m = EDGE_MARGIN
        u = d + a_hi relu(s - d - b_hi) - a_lo relu(d - b_lo - s)    exactly d on the band
    """
    s = ((1.0 + 2.0 * EDGE_MARGIN) * torch.sigmoid(z) - EDGE_MARGIN).clamp(0.0, 1.0)
    b_lo, b_hi, a_lo, a_hi = coef[0], coef[1], coef[2], coef[3]
    return d + a_hi * torch.relu(s - d - b_hi) - a_lo * torch.relu(d - b_lo - s)


def unit_output_naive(z: np.ndarray, d: np.ndarray, band: float = REST_BAND) -> np.ndarray:
    """Element-by-element float64 twin of ``unit_output``, from the definition: a stretched,
    clipped sigmoid, then the rest band [d - b, d + b] sent to d and each side stretched back
    linearly onto [0, d] and [d, 1]. z: (N, C); d: (C,) -> (N, C)."""
    z = np.asarray(z, np.float64)
    out = np.empty(z.shape, dtype=np.float64)
    for (i, j), zi in np.ndenumerate(z):
        sig = 1.0 / (1.0 + math.exp(-zi)) if zi >= -700 else 0.0
        s = min(1.0, max(0.0, (1.0 + 2.0 * EDGE_MARGIN) * sig - EDGE_MARGIN))
        dj = float(d[j])
        lo_edge, hi_edge = dj - min(band, dj / 2), dj + min(band, (1 - dj) / 2)
        if s > hi_edge:
            out[i, j] = dj + (s - hi_edge) * (1 - dj) / (1 - hi_edge)
        elif s < lo_edge:
            out[i, j] = dj - (lo_edge - s) * dj / lo_edge
        else:
            out[i, j] = dj
    return out


def sigmoid_target(u: torch.Tensor, d: torch.Tensor, coef: torch.Tensor) -> torch.Tensor:
    """u: (N, C) normalised controls in [0, 1] -> the sigmoid value that ``unit_output`` maps to
    u (the middle of the band for u == d): the target of the supervised logit term."""
    b_lo, b_hi, a_lo, a_hi = coef[0], coef[1], coef[2], coef[3]
    s = torch.where(
        u > d, d + b_hi + (u - d) / a_hi, torch.where(u < d, d - b_lo - (d - u) / a_lo, d)
    )
    return (s + EDGE_MARGIN) / (1.0 + 2.0 * EDGE_MARGIN)


def default_logits(defaults: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """(C,) logits z with ``unit_output(z)`` == the defaults: the middle of the rest band (or its
    edge, for a default on a bound)."""
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
    ``chain``: an optional learned kinematic chain (export/training/kinematic.py) whose output
    adds to the MLP's coefficients, for skinned joints; the mesh stays offset + basis weights.
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
        chain: KinematicChain | None = None,
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
        if chain is not None and (p == 0 or chain.out.out_features != p):
            raise ValueError(f"the kinematic chain gives {chain.out.out_features} coefficients, "
                             f"the residual basis has {p}")
        self.chain = chain

    def coefficients(self, u: torch.Tensor) -> torch.Tensor:
        """u: (N, C) normalised controls -> (N, P) residual-basis coefficients."""
        if self.correction is None:
            return u.new_zeros((u.shape[0], 0))
        out: torch.Tensor = self.correction(u)
        if self.chain is not None:
            out = out + self.chain(u)
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
    default_unit: torch.Tensor
    band: torch.Tensor

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
        d_unit = (np.asarray(defaults, np.float64) - lower) / (np.asarray(upper, np.float64) - lower)
        self.register_buffer("default_unit", _f32(np.clip(d_unit, 0.0, 1.0)))
        self.register_buffer("band", torch.from_numpy(band_coefficients(d_unit)))
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
        return self.from_logits(self.logits(mesh))

    def from_logits(self, z: torch.Tensor) -> torch.Tensor:
        """z: (N, C) logits -> (N, C) controls in [lower, upper]."""
        c = self.lower + (self.upper - self.lower) * unit_output(z, self.default_unit, self.band)
        return torch.minimum(torch.maximum(c, self.lower), self.upper)  # float rounding at bounds

    def sigmoid_target(self, controls: torch.Tensor) -> torch.Tensor:
        """controls: (N, C) in bounds -> (N, C) the sigmoid values that give them."""
        u = ((controls - self.lower) / (self.upper - self.lower)).clamp(0.0, 1.0)
        return sigmoid_target(u, self.default_unit, self.band)


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
            "chain": (None if forward.chain is None
                      else forward.chain.select.argmax(dim=1).tolist()),
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
    joints = f.get("chain")
    chain = None if joints is None else KinematicChain(z((len(joints), 3)), z(c), p,
                                                       controls=np.asarray(joints))
    fwd = ForwardApproximator(
        z((v, 3)), z(c), np.ones(c), z((c, 3 * v)), z(3 * v), z((p, 3 * v)), tuple(f["hidden"]),
        chain,
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
