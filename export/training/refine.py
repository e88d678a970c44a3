"""The refinement graph: the frozen forward model's fit and gradient on the inverse's inputs.

After the inverse network, the runtime takes a few bounded Gauss-Newton steps on the controls
(``rigcast.runtime.solve.refine``), so the solve lands on the forward model's least-squares optimum near
the network's answer instead of wherever the network's regression put it. This module builds what
those steps need and ships it in the bundle:

- ``refine.onnx``: controls (N, C) and the K input vertices (N, K, 3) -> the gradient
  g = J(u)^T r (N, C) of the forward model restricted to the K input vertices, in normalised
  controls u = (c - lo) / (hi - lo), with r = mesh - f_K(u), and the residual's squared norm
  (N,). For the forward model ``f(u) = neutral + u W + b + MLP(u) B`` (export/training/models.py):

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
from collections.abc import Sequence

import numpy as np
import torch
from rigcast.export.training.models import ForwardApproximator, VertexSubset, normalise_controls
from rigcast.runtime.bundle import RefineProjection, RestOfMesh
from rigcast.runtime.solve.refine import project_naive
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
        self.layers: list[nn.Linear] = [m for m in layers if isinstance(m, nn.Linear)]
        if any(not isinstance(m, (nn.Linear, nn.SiLU)) for m in layers):
            raise ValueError("the refinement graph supports Linear/SiLU correction MLPs only")
        self.chain = forward.chain

    def forward(self, controls: torch.Tensor, mesh: torch.Tensor) -> tuple[torch.Tensor,
                                                                            torch.Tensor]:
        full = self.sub.full
        u = normalise_controls(controls, full.lower, full.upper)  # (N, C)
        n = u.shape[0]
        flat = self.sub.neutral + u @ self.sub.weight + self.sub.bias  # (N, 3K)
        pre: list[torch.Tensor] = []
        if len(self.linears):
            m, pre = _mlp_pre(self.layers, u)
            if self.chain is not None:
                m = m + self.chain(u)
            flat = flat + m @ self.sub.basis  # (N, 3K)
        r = mesh.reshape(n, -1) - flat  # (N, 3K)
        grad = r @ self.sub.weight.T  # (N, C): W_K r
        if len(self.linears):
            back = r @ self.sub.basis.T  # B_K r
            grad = grad + _mlp_vjp(self.layers, pre, back)
            if self.chain is not None:
                grad = grad + self.chain.vjp(u, back)
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
    if forward.chain is not None:
        tangent = tangent + forward.chain.jacobian(u)
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
    from rigcast.export.bundling.onnx_export import export_refine

    hessian = gauss_newton_matrix(forward, indices, poses)
    graph = RefineGraph(forward, indices)
    data, parity = export_refine(graph, forward.lower.numpy(), forward.upper.numpy(),
                                 example_meshes)
    return data, hessian, parity


def _mlp_pre(linears: Sequence[nn.Linear], u: torch.Tensor) -> tuple[torch.Tensor, list[torch.Tensor]]:
    """The correction MLP on u (N, C) -> (its output (N, P), the hidden pre-activations)."""
    pre: list[torch.Tensor] = []
    h = u
    for i, lin in enumerate(linears):
        a = lin(h)
        if i < len(linears) - 1:
            pre.append(a)
            h = a * torch.sigmoid(a)
        else:
            h = a
    return h, pre


def _mlp_vjp(linears: Sequence[nn.Linear], pre: list[torch.Tensor], back: torch.Tensor) -> torch.Tensor:
    """(dMLP/du)^T back for back (N, P), by hand: Linear^T, times SiLU'(a). -> (N, C)."""
    for i in range(len(linears) - 1, -1, -1):
        back = back @ linears[i].weight  # Linear^T
        if i > 0:
            a = pre[i - 1]
            s = torch.sigmoid(a)
            back = back * (s * (1.0 + a * (1.0 - s)))  # SiLU'(a)
    return back


class RefineCore(nn.Module):
    """(controls (N, C), projection (N, R), tangents (N, T, C)) -> (gradient (N, C), quad (N,)
    float64, z (N, R) float64, curvature (N, T, T) float64), R = C + P.

    The projected refinement's graph. A frame's S vertices x are projected once (runtime
    ``refine.project``): p = A y, y = x - offset, A = [W_S; B_S] (R, 3S) the forward model's
    linear and residual bases on them. For z = [u; MLP(u)] the forward model on S is
    offset + A^T z, so with G = A A^T (R, R):

        A r       = p - G z                               r = y - A^T z
        J^T r     = (A r)_W + (dMLP/du)^T (A r)_B
        |r|^2     = |y|^2 + quad,   quad = z^T G z - 2 z^T p

    G and the products with it are float64: quad cancels most of |y|^2 on a good fit.
    """

    gram: torch.Tensor
    lower: torch.Tensor
    upper: torch.Tensor

    def __init__(self, forward: ForwardApproximator, gram: np.ndarray) -> None:
        super().__init__()
        layers = list(forward.correction) if forward.correction is not None else []
        self.linears = nn.ModuleList([m for m in layers if isinstance(m, nn.Linear)])
        self.layers: list[nn.Linear] = [m for m in layers if isinstance(m, nn.Linear)]
        if any(not isinstance(m, (nn.Linear, nn.SiLU)) for m in layers):
            raise ValueError("the refinement graph supports Linear/SiLU correction MLPs only")
        self.chain = forward.chain
        self.c = int(forward.lower.shape[0])
        self.register_buffer("gram", torch.from_numpy(np.asarray(gram, np.float64).copy()))
        self.register_buffer("lower", forward.lower.clone())
        self.register_buffer("upper", forward.upper.clone())

    def forward(self, controls: torch.Tensor, projection: torch.Tensor, tangents: torch.Tensor
                ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
        u = normalise_controls(controls, self.lower, self.upper)  # (N, C)
        if len(self.linears):
            m, pre = _mlp_pre(self.layers, u)
            if self.chain is not None:
                m = m + self.chain(u)
            z = torch.cat([u, m], dim=1).double()  # (N, R)
        else:
            z, pre = u.double(), []
        p = projection.double()
        gz = z @ self.gram
        e = p - gz  # (N, R): A r
        quad = (z * (gz - 2.0 * p)).sum(dim=1)
        e32 = e.float()
        grad = e32[:, : self.c]
        if len(self.linears):
            grad = grad + _mlp_vjp(self.layers, pre, e32[:, self.c :])
            if self.chain is not None:
                grad = grad + self.chain.vjp(u, e32[:, self.c :])
        return grad, quad, z, self.curvature(u, pre, tangents)

    def curvature(self, u: torch.Tensor, pre: list[torch.Tensor], tangents: torch.Tensor
                  ) -> torch.Tensor:
        """The Gauss-Newton matrix at u (N, C) along the tangents V (N, T, C) (normalised
        controls; the runtime sends the frame's active controls as one-hot rows):
        (J_z V)^T G (J_z V) -> (N, T, T) float64, J_z = dz/du = [I; dMLP/du] in forward mode
        (Linear, then times SiLU'(a); the chain's own Jacobian added)."""
        jz = tangents
        if len(self.linears):
            t = tangents
            for i, lin in enumerate(self.layers):
                t = t @ lin.weight.T  # (N, T, out)
                if i < len(self.layers) - 1:
                    s = torch.sigmoid(pre[i])
                    t = t * (s * (1.0 + pre[i] * (1.0 - s)))[:, None, :]  # SiLU'(a)
            if self.chain is not None:
                t = t + tangents @ self.chain.jacobian(u)
            jz = torch.cat([tangents, t], dim=2)  # (N, T, R)
        jd = jz.double()
        return (jd @ self.gram) @ jd.transpose(1, 2)


def vertex_information(forward: ForwardApproximator, poses: np.ndarray, chunk: int = 1024
                       ) -> np.ndarray:
    """How much each vertex tells about each control: the mean over poses (M, C) of |J_vc|^2,
    J_vc (3,) the forward model's derivative at vertex v by normalised control c (the Fisher
    information a vertex carries on a control under white noise). -> (V, C) float64."""
    lo, hi = forward.lower, forward.upper
    u = normalise_controls(torch.as_tensor(np.asarray(poses, np.float32)), lo, hi)
    v, c = forward.vertex_count, forward.control_count
    w = forward.linear_weight.detach().reshape(c, v, 3)
    out = np.zeros((v, c))
    with torch.no_grad():
        m = coefficient_jacobian(forward, u) if forward.correction is not None else None  # (M,C,P)
        basis = forward.basis.reshape(-1, v, 3)
        for s in range(0, v, chunk):
            jw = w[:, s : s + chunk]  # (C, L, 3)
            if m is None:
                out[s : s + chunk] = (jw.double() ** 2).sum(-1).T.numpy()
                continue
            jb = torch.einsum("mcp,plk->mclk", m, basis[:, s : s + chunk])  # (M, C, L, 3)
            j = (jw[None] + jb).double()
            out[s : s + chunk] = (j**2).sum(-1).mean(0).T.numpy()
    return out


def refine_vertices(info: np.ndarray, share: float = 0.995, cap: int = 4096) -> np.ndarray:
    """The vertices the refinement fits: for every control, the fewest vertices holding ``share``
    of its information (info (V, C) from ``vertex_information``), united; when more than ``cap``,
    the ``cap`` with the largest share of some control's information. -> (S,) sorted int64.

    A vertex that no control moves tells nothing and only costs time, so most rigs keep every
    moving vertex; ``cap`` bounds the live cost on very dense meshes."""
    v, c = info.shape
    total = info.sum(axis=0)  # (C,)
    rel = info / np.where(total > 0, total, 1.0)  # (V, C) shares
    keep = np.zeros(v, bool)
    for j in range(c):
        if total[j] <= 0:
            continue
        order = np.argsort(-rel[:, j], kind="stable")
        need = int(np.searchsorted(np.cumsum(rel[order, j]), share)) + 1
        keep[order[:need]] = True
    picked = np.flatnonzero(keep)
    if picked.size > cap:
        rank = np.argsort(-rel[picked].max(axis=1), kind="stable")[:cap]
        picked = np.sort(picked[rank])
    if picked.size == 0:
        picked = np.arange(min(v, cap))
    return picked.astype(np.int64)


def projection_arrays(forward: ForwardApproximator, indices: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The forward model's bases on vertices ``indices`` (S,): (basis A (R, 3S) float32,
    offset (3S,) float32, gram A A^T (R, R) float64), R = C + P."""
    idx = torch.as_tensor(np.asarray(indices, np.int64))
    cols = (idx[:, None] * 3 + torch.arange(3)).reshape(-1)
    with torch.no_grad():
        a = torch.cat([forward.linear_weight.detach()[:, cols], forward.basis[:, cols]], dim=0)
        offset = forward.neutral[cols] + forward.linear_bias.detach()[cols]
    a64 = a.double().numpy()
    return a.numpy().astype(np.float32), offset.numpy().astype(np.float32), a64 @ a64.T


def rest_vertices(vertex_count: int, refined: np.ndarray, stable: np.ndarray,
                  cap: int = 2048) -> np.ndarray:
    """The vertices the realignment fits besides the refinement's and the stable ones: every
    other vertex, or ``cap`` of them evenly spread over the index range. -> (W,) sorted int64.

    The realignment's rigid fit is only as steady as the vertices it reads: on the demo face
    the refinement and stable vertices leave out 727 of 3,714 that move a little, and fitting
    them too took the noisy take's error from 0.84x to 0.76x that of per-frame non-linear
    least squares. ``cap`` bounds the live cost on dense meshes, where a few thousand vertices
    already steady the fit."""
    keep = np.ones(vertex_count, bool)
    keep[np.asarray(refined, np.int64)] = False
    keep[np.asarray(stable, np.int64)] = False
    rest = np.flatnonzero(keep)
    if rest.size > cap:
        rest = rest[np.linspace(0, rest.size - 1, cap).round().astype(np.int64)]
    return rest.astype(np.int64)


def rest_of_mesh(forward: ForwardApproximator, refined: np.ndarray,
                 stable: np.ndarray) -> RestOfMesh | None:
    """The forward model's bases on :func:`rest_vertices` (None when there are none)."""
    rest = rest_vertices(forward.vertex_count, refined, stable)
    if rest.size == 0:
        return None
    basis, offset, _ = projection_arrays(forward, rest)
    return RestOfMesh(rest, basis, offset)


def projected_refine_parts(forward: ForwardApproximator, poses: np.ndarray,
                           example_points: np.ndarray | None = None, cap: int = 4096,
                           share: float = 0.995, stable: np.ndarray | None = None
                           ) -> tuple[bytes, np.ndarray, RefineProjection, float]:
    """What a bundle needs for the projected refinement: (refine.onnx bytes, hessian (C, C),
    the projection (vertex indices, graph and, given the ``stable`` indices, the rest of the
    mesh for the realignment), worst parity of the two graphs). poses (M, C): controls the
    curvature and the vertices' information are averaged over; example_points (E, V, 3):
    meshes for the exports' parity checks (poses through the forward model when None)."""
    from rigcast.export.bundling.moments_graph import moments_graph
    from rigcast.export.bundling.onnx_export import export_refine_core, export_refine_project

    info_poses = np.asarray(poses)[:: max(1, len(poses) // 32)][:32]
    indices = refine_vertices(vertex_information(forward, info_poses), share, cap)
    basis, offset, gram = projection_arrays(forward, indices)
    hessian = gauss_newton_matrix(forward, indices, poses)
    if example_points is None:
        with torch.no_grad():
            example_points = forward(torch.as_tensor(np.asarray(poses[:16], np.float32))).numpy()
    pts = np.ascontiguousarray(np.asarray(example_points, np.float32)[:, indices])
    project, parity_p = export_refine_project(moments_graph(basis, offset), pts,
                                              project_naive(pts, basis, offset))
    proj = project_naive(pts, basis, offset)[:, :-1].astype(np.float32)
    data, parity = export_refine_core(RefineCore(forward, gram), forward.lower.numpy(),
                                      forward.upper.numpy(), proj)
    log.info("projected refinement on %d of %d vertices (R = %d)", indices.size,
             forward.vertex_count, basis.shape[0])
    rest = None if stable is None else rest_of_mesh(forward, indices, stable)
    return data, hessian, RefineProjection(indices, project, rest), max(parity, parity_p)
