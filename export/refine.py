"""The refinement graph: the frozen forward model's fit and gradient on the inverse's inputs.

After the inverse network, the runtime takes a few bounded Gauss-Newton steps on the controls
(``rigcast.runtime.refine``), so the solve lands on the forward model's least-squares optimum near
the network's answer instead of wherever the network's regression put it. This module builds what
those steps need and ships it in the bundle:

- ``refine.onnx``: controls (N, C) and the K input vertices (N, K, 3) -> the gradient
  g = J(u)^T r (N, C) of the forward model restricted to the K input vertices, in normalised
  controls u = (c - lo) / (hi - lo), with r = mesh - f_K(u), and the residual's squared norm
  (N,). For the forward model ``f(u) = neutral + u W + b + MLP(u) B`` (export/models.py):

      J(u)^T r = W_K r + (dMLP/du)^T (B_K r)

  The MLP's vector-Jacobian product is written out layer by layer (a hand-made backward pass:
  Linear^T, times SiLU'(a) = s(a) (1 + a (1 - s(a))) with s the logistic function), so the graph
  is plain matmuls and element-wise ops and exports like the models themselves.
- ``hessian`` (C, C): the Gauss-Newton matrix J^T J averaged over sampled poses, the fixed
  curvature of the steps. With the exact gradient and a fixed curvature the iteration (a chord
  method, Kelley 1995, "Iterative Methods for Linear and Nonlinear Equations", 5.4) still
  converges to a stationary point of the true fit; the curvature only sets the speed.
"""

from __future__ import annotations

import logging

import numpy as np
import torch
from rigcast.export.models import ForwardApproximator, VertexSubset, normalise_controls
from torch import nn

log = logging.getLogger(__name__)


class RefineGraph(nn.Module):
    """(controls (N, C), mesh (N, K, 3)) -> (gradient (N, C), residual_sq (N,)).

    ``forward`` is a ForwardApproximator; ``indices`` (K,) the inverse's input vertices.
    """

    def __init__(self, forward: ForwardApproximator, indices: np.ndarray) -> None:
        super().__init__()
        self.sub = VertexSubset(forward, indices)
        layers = list(forward.correction) if forward.correction is not None else []
        self.linears = nn.ModuleList([m for m in layers if isinstance(m, nn.Linear)])
        if any(not isinstance(m, (nn.Linear, nn.SiLU)) for m in layers):
            raise ValueError("the refinement graph supports Linear/SiLU correction MLPs only")

    def forward(self, controls: torch.Tensor, mesh: torch.Tensor) -> tuple[torch.Tensor,
                                                                            torch.Tensor]:
        full = self.sub.full
        u = normalise_controls(controls, full.lower, full.upper)  # (N, C)
        n = u.shape[0]
        flat = self.sub.neutral + u @ self.sub.weight + self.sub.bias  # (N, 3K)
        pre: list[torch.Tensor] = []
        h = u
        for i, lin in enumerate(self.linears):
            a = lin(h)
            if i < len(self.linears) - 1:
                pre.append(a)
                h = a * torch.sigmoid(a)
            else:
                h = a
        if len(self.linears):
            flat = flat + h @ self.sub.basis  # (N, 3K)
        r = mesh.reshape(n, -1) - flat  # (N, 3K)
        grad = r @ self.sub.weight.T  # (N, C): W_K r
        if len(self.linears):
            back = r @ self.sub.basis.T  # (N, P): B_K r
            for i in range(len(self.linears) - 1, -1, -1):
                back = back @ self.linears[i].weight  # Linear^T
                if i > 0:
                    a = pre[i - 1]
                    s = torch.sigmoid(a)
                    back = back * (s * (1.0 + a * (1.0 - s)))  # SiLU'(a)
            grad = grad + back
        return grad, (r * r).sum(dim=1)


def coefficient_jacobian(forward: ForwardApproximator, u: torch.Tensor) -> torch.Tensor:
    """d MLP(u) / du for normalised controls u (B, C) -> (B, C, P), in forward mode by hand:
    through each Linear (times W^T) and SiLU (times SiLU'(a)), one tangent per control."""
    assert forward.correction is not None
    linears = [m for m in forward.correction if isinstance(m, nn.Linear)]
    b, c = u.shape
    tangent = torch.eye(c, dtype=u.dtype).expand(b, c, c)  # (B, C, C): d u / d u
    h = u
    for i, lin in enumerate(linears):
        a = lin(h)
        tangent = tangent @ lin.weight.T  # (B, C, out)
        if i < len(linears) - 1:
            sg = torch.sigmoid(a)
            tangent = tangent * (sg * (1.0 + a * (1.0 - sg)))[:, None, :]  # SiLU'(a)
            h = a * sg
    return tangent


def gauss_newton_matrix(forward: ForwardApproximator, indices: np.ndarray, poses: np.ndarray,
                        chunk: int = 64) -> np.ndarray:
    """Mean of J(u)^T J(u) over poses (M, C) (controls), J the (3K, C) Jacobian in normalised
    controls of the forward model restricted to ``indices`` (K,). -> (C, C) float64."""
    sub = VertexSubset(forward, indices)
    lo, hi = forward.lower, forward.upper
    acc = np.zeros((lo.shape[0], lo.shape[0]))
    u_all = normalise_controls(torch.as_tensor(np.asarray(poses, np.float32)), lo, hi)
    with torch.no_grad():
        for s in range(0, u_all.shape[0], chunk):
            u = u_all[s : s + chunk]
            jac = sub.weight.expand(u.shape[0], -1, -1)  # (B, C, 3K): the linear layer
            if forward.correction is not None:
                jac = jac + coefficient_jacobian(forward, u) @ sub.basis
            j = jac.double()
            acc += torch.einsum("bck,bdk->cd", j, j).numpy()  # sum over poses b, coordinates k
    return acc / max(u_all.shape[0], 1)


def gauss_newton_matrix_naive(forward: ForwardApproximator, indices: np.ndarray,
                              poses: np.ndarray) -> np.ndarray:
    """Autograd twin of ``gauss_newton_matrix``: torch.autograd.functional.jacobian per pose."""
    sub = VertexSubset(forward, indices)
    lo, hi = forward.lower, forward.upper
    acc = np.zeros((lo.shape[0], lo.shape[0]))
    for pose in np.asarray(poses, np.float32):
        u0 = normalise_controls(torch.from_numpy(pose[None]), lo, hi)[0]
        j = torch.autograd.functional.jacobian(
            lambda u: sub(lo + (hi - lo) * u[None])[0].reshape(-1), u0).double()  # (3K, C)
        acc += (j.T @ j).numpy()
    return acc / max(len(poses), 1)


def refine_gradient_naive(forward: ForwardApproximator, indices: np.ndarray,
                          controls: np.ndarray, mesh: np.ndarray) -> np.ndarray:
    """Autograd twin of RefineGraph's gradient: J(u)^T r by torch.autograd. -> (N, C)."""
    sub = VertexSubset(forward, indices)
    lo, hi = forward.lower, forward.upper
    u = normalise_controls(torch.as_tensor(np.asarray(controls, np.float32)), lo, hi)
    u = u.clone().requires_grad_(True)
    r = torch.as_tensor(np.asarray(mesh, np.float32)) - sub(lo + (hi - lo) * u)
    (0.5 * (r * r).sum()).backward()
    assert u.grad is not None
    return (-u.grad).numpy()


def refine_parts(forward: ForwardApproximator, indices: np.ndarray, poses: np.ndarray,
                 example_meshes: np.ndarray) -> tuple[bytes, np.ndarray, float]:
    """What a bundle needs for the refinement: (refine.onnx bytes, hessian (C, C), parity).

    poses: (M, C) controls the Gauss-Newton matrix is averaged over (training poses and the
    defaults); example_meshes: (E, K, 3) input vertices for the export's parity check.
    """
    from rigcast.export.onnx_export import export_refine

    hessian = gauss_newton_matrix(forward, indices, poses)
    graph = RefineGraph(forward, indices)
    data, parity = export_refine(graph, forward.lower.numpy(), forward.upper.numpy(),
                                 example_meshes)
    return data, hessian, parity
