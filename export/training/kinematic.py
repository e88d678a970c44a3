"""A learned kinematic chain: the forward approximator's structure for skinned joints.

Linear blend skinning moves each vertex by a weighted sum of its joints' transforms, so the mesh
is linear in the 12 entries of each joint's 3 x 4 world transform; along a chain each transform
is the product of its parents' local rotations. A plain MLP has to learn those products of sines
and cosines from samples that mostly move a few controls at a time, and misses them where many
move at once (dense poses). Here the product is built in:

    theta_c = s_c (u_c - r_c)                               angle of control c (r: rest)
    R_c     = I + sin(theta_c) K_c + (1 - cos(theta_c)) K_c^2     (Rodrigues), K_c = [a_c]_x
    t_c     = p_c - R_c p_c                                 rotation about the pivot p_c
    A_k     = A_q R_k,  b_k = b_q + A_q t_k                 prefix transforms, q = parent(k),
                                                            A = I, b = 0 above a root
    F_k     = [vec(A_k - I), b_k]                           (12,) per control k
    out     = [F_1 .. F_C, u - r] L^T + l                    (P,) residual-basis coefficients

with a learned unit axis a_c, pivot p_c and angle scale s_c per control, composed in the
schema's order (a rig's controls listed root to tip, as joint chains are; a control that is no
rotation learns s_c near 0 and its F_k only repeats its parent's). Each control's parent is an
earlier one (by default the one before it: a single serial chain); ``chain_from_anchors`` picks
it from the anchors (the latest earlier control that moves every vertex this one moves), so
several chains (tubes hanging from a fixed hub, fingers from a palm) are a forest, not one
chain through all. The mesh stays linear in the
residual basis (offset + basis weights, as the refinement's moment form needs); only the
coefficients' function of u changes, so everything that differentiates the coefficients needs
this module's hand-written ``jacobian`` (forward mode) and ``vjp`` (reverse mode): both are
plain matrix products and element-wise ops, so they export to ONNX like the MLP's.
(Rodrigues' rotation formula; the prefix products are the forward kinematics of a serial chain,
e.g. Craig, "Introduction to Robotics", ch. 3.)
"""

from __future__ import annotations

import logging
from collections.abc import Callable

import numpy as np
import torch
from rigcast.export.training.joint_fit import (
    blend_residual,
    joint_groups,
    joint_order,
    polish_turn,
    rotation_fit,
    same_joint,
    turned_vertices,
)
from torch import nn

log = logging.getLogger(__name__)


def skew(a: torch.Tensor) -> torch.Tensor:
    """a: (..., 3) -> (..., 3, 3) the cross-product matrix [a]_x (so [a]_x v = a x v)."""
    z = torch.zeros_like(a[..., 0])
    return torch.stack(
        [
            torch.stack([z, -a[..., 2], a[..., 1]], -1),
            torch.stack([a[..., 2], z, -a[..., 0]], -1),
            torch.stack([-a[..., 1], a[..., 0], z], -1),
        ],
        -2,
    )


class KinematicChain(nn.Module):
    """u (N, C) normalised controls -> (N, P) coefficients, by the chain of the module docstring
    over the J controls ``controls`` (J,) (all C when None), in that order.

    pivots: (J, 3) starting pivots in mesh units; axes (J, 3), scales (J,): starting axes and
    angles per unit of u (random axes and 1 when None); rest: (C,) the rest pose in u; length:
    the mesh's size (pivots are stored in its units, so the parameters are of order 1);
    parents: (J,) each joint's parent, an earlier joint's index or -1 for a root (None: each
    the one before, one serial chain). The output layer starts at zero: an untrained chain adds
    nothing.
    """

    rest: torch.Tensor
    select: torch.Tensor
    parent: torch.Tensor

    def __init__(self, pivots: np.ndarray, rest: np.ndarray, outputs: int, length: float = 1.0,
                 seed: int = 0, controls: np.ndarray | None = None,
                 axes: np.ndarray | None = None, scales: np.ndarray | None = None,
                 parents: np.ndarray | None = None) -> None:
        super().__init__()
        c = int(np.asarray(rest).shape[0])
        idx = np.arange(c) if controls is None else np.asarray(controls, np.int64)
        j = int(idx.shape[0])
        self.control_count = c
        self.joint_count = j
        self.length = float(length) if length > 0 else 1.0
        gen = torch.Generator().manual_seed(seed)
        self.axis = nn.Parameter(torch.randn(j, 3, generator=gen) if axes is None else
                                 torch.as_tensor(np.asarray(axes, np.float32)).clone())
        self.pivot = nn.Parameter(
            torch.as_tensor(np.asarray(pivots, np.float32) / self.length).reshape(j, 3).clone())
        self.scale = nn.Parameter(torch.ones(j) if scales is None else
                                  torch.as_tensor(np.asarray(scales, np.float32)).clone())
        sel = np.zeros((j, c), np.float32)
        sel[np.arange(j), idx] = 1.0
        self.register_buffer("select", torch.from_numpy(sel))  # (J, C): u_J = u @ select^T
        self.register_buffer("rest", torch.as_tensor(
            np.asarray(rest, np.float32)[idx]).clone())
        par = np.arange(j) - 1 if parents is None else np.asarray(parents, np.int64)
        if par.shape != (j,) or np.any(par >= np.arange(j)) or np.any(par < -1):
            raise ValueError(f"parents must be (J,) = ({j},) earlier joints or -1, got {par}")
        self.register_buffer("parent", torch.as_tensor(par, dtype=torch.int64))
        self._parents = [int(x) for x in par]
        self.out = nn.Linear(13 * j, outputs)
        nn.init.zeros_(self.out.weight)
        nn.init.zeros_(self.out.bias)

    def _load_from_state_dict(self, state_dict: dict, prefix: str, *args: object) -> None:
        # A checkpoint from before parents were kept holds one serial chain.
        state_dict.setdefault(prefix + "parent", torch.arange(self.joint_count) - 1)
        super()._load_from_state_dict(state_dict, prefix, *args)
        self._parents = [int(x) for x in self.parent.tolist()]

    def _parts(self, u: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """u (N, C) -> (R (N, J, 3, 3), t (N, J, 3), dR/du (N, J, 3, 3), dt/du (N, J, 3))."""
        k = skew(self.axis / self.axis.norm(dim=1, keepdim=True))  # (C, 3, 3)
        kk = k @ k
        th = self.scale * (u @ self.select.T - self.rest)  # (N, J)
        s, co = torch.sin(th)[..., None, None], torch.cos(th)[..., None, None]
        eye = torch.eye(3, dtype=u.dtype)
        r = eye + s * k + (1.0 - co) * kk
        dr = self.scale[:, None, None] * (co * k + s * kk)
        p = self.pivot[..., None]  # (C, 3, 1)
        t = self.pivot - (r @ p)[..., 0]
        dt = -(dr @ p)[..., 0]
        return r, t, dr, dt

    def features(self, u: torch.Tensor) -> torch.Tensor:
        """u: (N, C) -> (N, 13J) the prefix transforms [vec(A_k - I), b_k], k = 1..J, then the
        chain's own controls u_J - r (the residual the chain fits is the mesh less the linear
        layer's u W, linear in u and so in no span of rotations)."""
        r, t, _, _ = self._parts(u)
        n = u.shape[0]
        eye = torch.eye(3, dtype=u.dtype)
        root = (eye.expand(n, 3, 3), u.new_zeros((n, 3)))
        ab: list[tuple[torch.Tensor, torch.Tensor]] = []
        feats = []
        for j, q in enumerate(self._parents):
            a, b = root if q < 0 else ab[q]
            b = b + (a @ t[:, j, :, None])[..., 0]
            a = a @ r[:, j]
            ab.append((a, b))
            feats.append(torch.cat([(a - eye).reshape(n, 9), b], 1))
        feats.append(u @ self.select.T - self.rest)
        return torch.cat(feats, 1)

    def forward(self, u: torch.Tensor) -> torch.Tensor:
        out: torch.Tensor = self.out(self.features(u))
        return out

    def _twists(self, u: torch.Tensor) -> torch.Tensor:
        """u (N, C) -> (N, J, J, 12) d F_k / d theta_j-scaled, the geometric Jacobian: turning
        joint j moves everything below it about its world axis w_j = A_q a_j through its world
        pivot c_j = A_q p_j + b_q (q its parent), so for k at or below j
        dA_k = s_j [w_j]_x A_k and db_k = s_j w_j x (b_k - c_j) (zero elsewhere)."""
        r, t, _, _ = self._parts(u)
        n, j = u.shape[0], self.joint_count
        eye = torch.eye(3, dtype=u.dtype)
        root = (eye.expand(n, 3, 3), u.new_zeros((n, 3)))
        ab: list[tuple[torch.Tensor, torch.Tensor]] = []
        up: list[tuple[torch.Tensor, torch.Tensor]] = []
        for k, q in enumerate(self._parents):
            a, b = root if q < 0 else ab[q]
            up.append((a, b))
            ab.append((a @ r[:, k], b + (a @ t[:, k, :, None])[..., 0]))
        a_k = torch.stack([x[0] for x in ab], 1)  # (N, J, 3, 3)
        b_k = torch.stack([x[1] for x in ab], 1)  # (N, J, 3)
        a_q = torch.stack([x[0] for x in up], 1)
        b_q = torch.stack([x[1] for x in up], 1)
        w = a_q @ (self.axis / self.axis.norm(dim=1, keepdim=True))[None, :, :, None]
        centre = (a_q @ self.pivot[None, :, :, None])[..., 0] + b_q  # (N, J, 3)
        sw = skew(w[..., 0]) * self.scale[:, None, None]  # (N, J, 3, 3): s_j [w_j]_x
        below = np.zeros((j, j), np.float32)  # [j, k] = 1 when k is j or below it
        for k, q in enumerate(self._parents):
            below[k, k] = 1.0
            while q >= 0:
                below[q, k], q = 1.0, self._parents[q]
        mask = torch.from_numpy(below).to(u.dtype)[None, :, :, None]
        da = (sw[:, :, None] @ a_k[:, None]).reshape(n, j, j, 9)
        db = (sw[:, :, None] @ (b_k[:, None] - centre[:, :, None])[..., None])[..., 0]
        return torch.cat([da, db], 3) * mask

    def jacobian(self, u: torch.Tensor) -> torch.Tensor:
        """d out / du for u (N, C) -> (N, C, P) from the geometric Jacobian (``_twists``): a
        few batched ops whatever J (``jacobian_steps`` is its step-by-step twin)."""
        n, j = u.shape[0], self.joint_count
        feats = torch.cat([self._twists(u).reshape(n, j, 12 * j),
                           torch.eye(j, dtype=u.dtype).expand(n, j, j)], 2)
        jac = feats @ self.out.weight.T  # (N, J, 13J) -> (N, J, P)
        return torch.einsum("jc,njp->ncp", self.select, jac)  # (N, C, P)

    def vjp(self, u: torch.Tensor, back: torch.Tensor) -> torch.Tensor:
        """(d out / du)^T back for u (N, C), back (N, P) -> (N, C) from the geometric Jacobian
        (``vjp_steps`` is its reverse-mode twin)."""
        n, j = u.shape[0], self.joint_count
        full = back @ self.out.weight  # (N, 13J): adjoints of each F_k, then of u_J
        g = full[:, : 12 * j].reshape(n, 1, j * 12)
        cols = (self._twists(u).reshape(n, j, 12 * j) * g).sum(2)
        return (cols + full[:, 12 * j :]) @ self.select  # (N, C)

    def jacobian_steps(self, u: torch.Tensor) -> torch.Tensor:
        """d out / du for u (N, C) -> (N, C, P), in forward mode by hand (one tangent per
        control): dA_k = dA_q R_k + [c = k] A_q dR_k, db_k = db_q + dA_q t_k + [c = k] A_q dt_k,
        q = parent(k)."""
        r, t, dr, dt = self._parts(u)
        n, c = u.shape[0], self.joint_count
        eye = torch.eye(3, dtype=u.dtype)
        root = (eye.expand(n, 3, 3), u.new_zeros((n, c, 3, 3)), u.new_zeros((n, c, 3)))
        chain: list[tuple[torch.Tensor, torch.Tensor, torch.Tensor]] = []
        onehot = torch.eye(c, dtype=u.dtype)
        feats = []
        for j, q in enumerate(self._parents):
            a, da, db = root if q < 0 else chain[q]
            hit = onehot[j][None, :, None]  # (1, C, 1): the tangent of control j
            db = db + (da @ t[:, j, None, :, None])[..., 0] \
                + hit * (a @ dt[:, j, :, None])[:, None, :, 0]
            da = da @ r[:, j, None] + hit[..., None] * (a @ dr[:, j])[:, None]
            a = a @ r[:, j]
            chain.append((a, da, db))
            feats.append(torch.cat([da.reshape(n, c, 9), db], 2))
        feats.append(onehot.expand(n, c, c))  # d (u_J - r) / d u_J
        jac = torch.cat(feats, 2) @ self.out.weight.T  # (N, J, 13J) -> (N, J, P)
        return torch.einsum("jc,njp->ncp", self.select, jac)  # (N, C, P)

    def vjp_steps(self, u: torch.Tensor, back: torch.Tensor) -> torch.Tensor:
        """(d out / du)^T back for u (N, C), back (N, P) -> (N, C), in reverse mode by hand."""
        r, t, dr, dt = self._parts(u)
        n, c = u.shape[0], self.joint_count
        full = back @ self.out.weight  # (N, 13J): adjoints of each F_k, then of u_J
        g = full[:, : 12 * c].reshape(n, c, 12)
        eye = torch.eye(3, dtype=u.dtype)
        pars = self._parents
        a_of: list[torch.Tensor] = []  # A_k
        for j, q in enumerate(pars):
            a_of.append((eye.expand(n, 3, 3) if q < 0 else a_of[q]) @ r[:, j])
        # adjoints of A_k, b_k from k's descendants, summed in as each child is passed
        ga = [u.new_zeros((n, 3, 3)) for _ in pars]
        gb = [u.new_zeros((n, 3)) for _ in pars]
        cols = []
        for j in range(c - 1, -1, -1):
            q = pars[j]
            gaj = ga[j] + g[:, j, :9].reshape(n, 3, 3)
            gbj = gb[j] + g[:, j, 9:]
            ap = eye.expand(n, 3, 3) if q < 0 else a_of[q]
            g_r = ap.transpose(1, 2) @ gaj  # d/dR_j of <ga, A_q R_j>
            g_t = (ap.transpose(1, 2) @ gbj[..., None])[..., 0]
            cols.append((g_r * dr[:, j]).sum((1, 2)) + (g_t * dt[:, j]).sum(1))
            if q >= 0:
                ga[q] = ga[q] + (gaj @ r[:, j].transpose(1, 2) + gbj[:, :, None] * t[:, j, None, :])
                gb[q] = gb[q] + gbj
        return (torch.stack(cols[::-1], 1) + full[:, 12 * c :]) @ self.select  # (N, C)


#: Largest relative residual of a control's rotation fit (weighted RMS misfit over weighted RMS
#: displacement) for it to join the chain. Measured on the demo rigs: the lantern arm's joints
#: 0.0000-0.0015 (rigid up to the blend region), the face's skinned jaw with its correctives
#: 0.18, its blendshapes 0.25 and more. A rule of thumb between them.
RIGID_TOL = 0.1
#: Largest ``joint_fit.blend_residual`` for a further angle of a joint in the chain to join it.
#: Measured: zoo-236895's twists 0.000-0.032, its last joints' bends up to 0.10 (no vertex follows
#: them alone; they join by ``RIGID_TOL``); blendshapes fit as far-pivot turns 0.001-0.99 but
#: never move a joint's vertices. A rule of thumb.
BLEND_TOL = 0.05
#: Smallest rotation (radians) of a control alone at its far bound for it to join the chain.
MIN_ANGLE = 0.01
#: A joint's parent is the latest earlier joint that moves all but this share of its squared
#: displacement. An ancestor carries its descendants' vertices and leaves still only those on
#: its own axis; a joint on another branch moves none of them. Measured on zoo chains: at most
#: 0.004 for ancestors, 1.0 across branches (zoo seeds 30, 35, 48, 80, 175); a rule of thumb.
PARENT_TOL = 0.5


def parents_from_motion(d2: np.ndarray) -> np.ndarray:
    """d2 (J, V): each joint's squared vertex displacement alone -> (J,) the latest earlier joint
    whose moved vertices (over 1e-10 of its largest squared displacement) hold all but
    ``PARENT_TOL`` of this joint's displacement, or -1 (a root)."""
    j = d2.shape[0]
    moved = d2 > 1e-10 * d2.max(axis=1, keepdims=True)
    total = d2.sum(axis=1)
    out = np.full(j, -1, np.int64)
    for k in range(j):
        for q in range(k - 1, -1, -1):
            if d2[k, ~moved[q]].sum() <= PARENT_TOL * total[k]:
                out[k] = q
                break
    return out


def hangs_below(mine: np.ndarray, other: np.ndarray) -> bool:
    """mine, other (V,): two controls' squared displacements at their anchors -> whether every
    vertex the first moves (beyond 1e-8 of its largest) the second moves too: the first's
    joint hangs below the second's on a chain. A chain's last joint moves few vertices, each
    partly (its blend region is much of what it moves), so no rigid fit takes it and no angle of
    its joint is rigid: zoo-156277's 32nd joint (3 angles) stayed out of the chain, and the
    chain alone missed dense poses by up to 13 % of D."""
    m = mine > 1e-8 * float(mine.max()) if mine.max() > 0 else np.zeros(mine.shape, bool)
    o = other > 1e-8 * float(other.max()) if other.max() > 0 else np.zeros(other.shape, bool)
    return bool(m.any() and np.all(o[m]))


def chain_from_anchors(u: np.ndarray, offsets: np.ndarray, neutral: np.ndarray, rest: np.ndarray,
                       outputs: int, seed: int = 0,
                       samples: tuple[np.ndarray, Callable[[np.ndarray], np.ndarray]] | None = None
                       ) -> KinematicChain | None:
    """A chain over the controls that turn the mesh rigidly, started from their anchors.

    u (C + 1, C), offsets (C + 1, 3V): the rest pose then each control alone at its far bound
    (``sampling.anchor_poses``), normalised, as offsets from ``neutral`` (V, 3); rest (C,) the
    rest pose in u. Each control's rotation about an axis is fitted to its anchor
    (``joint_fit.rotation_fit``); those within ``RIGID_TOL`` join the chain with that axis,
    pivot and angle per unit of u, each under the parent ``parents_from_motion`` finds. So does
    a further angle of a joint that joined (it moves the same vertices) when one skinned joint
    explains it (``joint_fit.blend_residual`` within ``BLEND_TOL``): a twist about a tube's own
    axis, whose blend region carries most of its motion (zoo-236895's 18 twists, 0.13-0.26 by
    the first test). samples: (u (N, C) normalised, rows -> (M, V, 3) those samples' vertices),
    the rig's samples, from which each joint's angles take the order they compose in
    (``joint_fit.joint_order``; schema order without them). None when no control turns the
    mesh (a blendshape face: its forward model is then exactly the MLP's)."""
    v = neutral.shape[0]
    base = np.asarray(neutral, np.float64) + np.asarray(offsets[0], np.float64).reshape(v, 3)
    fits = []
    for c in range(u.shape[1]):
        step = float(u[c + 1, c] - rest[c])
        if abs(step) < 1e-6:
            continue
        moved = np.asarray(neutral, np.float64) + np.asarray(offsets[c + 1], np.float64
                                                             ).reshape(v, 3)
        rotvec, pivot, resid = rotation_fit(base, moved)
        angle = float(np.linalg.norm(rotvec))
        log.debug("chain: control %d turns %.3g rad, rigid residual %.3g", c, angle, resid)
        if angle < MIN_ANGLE:
            continue
        fits.append((c, rotvec, pivot, resid, step, moved))
    d2 = {f[0]: np.square(f[5] - base).sum(axis=1) for f in fits}
    turn = {f[0]: (f[1] / np.linalg.norm(f[1]), f[2]) for f in fits}
    length = float(np.linalg.norm(neutral.max(axis=0) - neutral.min(axis=0))) or 1.0
    rigid = [f[0] for f in fits if f[3] <= RIGID_TOL]
    picked, axes, pivots, scales, own = [], [], [], [], []
    for c, rotvec, pivot, resid, step, moved in fits:
        if resid > RIGID_TOL:
            if any(same_joint(d2[k], d2[c], turn[k], turn[c], length) for k in rigid):
                joins = blend_residual(base, moved, rotvec, pivot) <= BLEND_TOL
            elif any(hangs_below(d2[c], d2[k]) for k in rigid):
                rotvec, pivot = polish_turn(base, moved, rotvec, pivot)
                joins = blend_residual(base, moved, rotvec, pivot) <= BLEND_TOL
            else:
                joins = False
            if not joins:
                continue
        rotvec, pivot = polish_turn(base, moved, rotvec, pivot)
        angle = float(np.linalg.norm(rotvec))
        picked.append(c)
        axes.append(rotvec / angle)
        pivots.append(pivot)
        scales.append(angle / step)
        own.append(turned_vertices(base, moved, rotvec, pivot))
    if not picked:
        return None
    motion = np.array([d2[c] for c in picked])
    parents = parents_from_motion(motion)
    if samples is not None:
        groups = joint_groups(motion, parents, np.array(axes), np.array(pivots), length)
        angles = (samples[0][:, picked] - rest[picked]) * np.array(scales)
        order = [k for g in joint_order(groups, parents, np.array(axes), np.array(pivots),
                                        angles, np.array(own), base, samples[1],
                                        moved=motion > 1e-8 * motion.max()) for k in g]
        picked, axes, pivots, scales = ([x[k] for k in order]
                                        for x in (picked, axes, pivots, scales))
        parents = parents_from_motion(motion[order])
    log.info("forward: kinematic chain over %d of %d controls, %d root(s)", len(picked),
             u.shape[1], int((parents < 0).sum()))
    return KinematicChain(np.array(pivots), rest, outputs, length, seed=seed,
                          controls=np.array(picked), axes=np.array(axes),
                          scales=np.array(scales), parents=parents)
