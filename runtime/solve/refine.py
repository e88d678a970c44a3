"""Refinement: a few bounded, sparse Gauss-Newton steps after the inverse network.

The network's answer is close, but a regression is never exactly the least-squares optimum, and
it can miss a small, local expression. The bundle's refinement graph (export/training/refine.py) returns
the gradient g = J(u)^T r of the forward model's fit in normalised controls
u = (c - lo) / (hi - lo), and the residual's squared norm, on the vertices the refinement reads:

- **projected** (bundles since the all-vertex refinement): the S vertices that carry the rig's
  motion (all of them on most rigs). Each frame is projected once onto the forward model's bases,
  p = A y with y = x_S - offset, A = [W; B] (R, 3S); then every step works in R = C + P numbers:
  for z = [u; MLP(u)], A r = p - G z with G = A A^T, and |r|^2 = |y|^2 + z^T G z - 2 z^T p,
  exact on all S vertices at the cost of one projection per frame (the bundle's projection
  graph; ``project_naive`` is its twin);
- **input-vertex** (older bundles): the K input vertices of the network, through a graph that
  evaluates the forward model on them at every step. Fitting K of V vertices leaves the fit's
  noise about sqrt(V / K) times that of a fit on all of them.

Each step then:

1. **Active set.** A control takes part when it is away from its default, or when it is at its
   default and the residual correlates with its mesh effect beyond what noise explains:
   |g_c| > kappa * sqrt(H_cc) * sigma, sigma = |r| / sqrt(3K) (for white noise of std sigma,
   g_c / (sqrt(H_cc) sigma) is a standard normal, so kappa = 4 leaves a control at rest with
   probability ~6e-5 per frame; the correlation test of matching pursuit, Mallat & Zhang,
   IEEE TSP 41(12), 1993). A control on a bound whose gradient points outwards stays out.
   It must also explain at least ``wake_share`` of the residual's energy on its own
   (g_c^2 / H_cc >= wake_share |r|^2): a lost expression explains nearly all of it, while noise
   and the forward model's diffuse error explain little, and waking on significance alone
   woke controls to soak up that error (false activity) and noise (jitter).
   At-rest controls therefore stay exactly at rest, and a lost expression is brought back.
   At the first step (from the network's answer) both tests are taken on what the control adds
   to the controls already moved (``wake`` "given", ``active.given_moved_set``): g_c and H_cc
   become the conditional gradient and curvature given them (a Schur complement), |r|^2 what a
   step on them would leave; later steps take the tests on the control alone. Where
   the network put a joint's bend on its two neighbours, which together make nearly its mesh,
   the joint's own gradient explained 0.2-8 % of the residual and it was never woken; given
   its neighbours it explains nearly all of it (see ``RefineSettings``).
2. **Step.** A maximum a posteriori step with a Gaussian prior of standard deviation
   ``prior_sd`` (share of the range) around the network's answer u0:

       (H_AA + damping diag(H_AA) + lam I) delta_A = g_A - lam (u - u0)_A,
       lam = sigma^2 / prior_sd^2

   with H the bundle's fixed Gauss-Newton matrix (a chord method: the gradient is exact, the
   curvature fixed), then a clip to the bounds. sigma^2, the frame's noise variance per
   coordinate, is what the residual would keep after a full Gauss-Newton step on the active
   controls: (|r|^2 - g_A^T H_AA^-1 g_A) / (3K - |A|), the residual less the decrease the step
   predicts, per remaining degree of freedom. So the pull adapts to the frame: on a clean mesh
   almost nothing is left, the fit wins, and an expression the network shrank comes back in
   full; on a noisy mesh the fit on K vertices would chase the noise, and the network (trained
   on noisy inputs) tempers it. (Tikhonov regularisation weighted as in a Bayesian linear model,
   Bishop, "Pattern Recognition and Machine Learning", 2006, 3.3, with the noise variance
   estimated from the residual's degrees of freedom.) An older, fixed pull ``prior`` (relative
   to the curvature's diagonal) stays for bundles built with it. The prior holds every
   control (``pull`` "all"), woken ones too, towards the network's answer: a control the mesh
   woke on a noisy frame is held by its own evidence against the noise (a whole missed
   expression moves the mesh far more than the pull resists; the pull vanishes on a clean
   mesh), while one woken by the noise or the capture's smooth drift no longer follows it.
   Bundles built before keep ``pull`` "moved" (only the controls the network moved are held).
3. **Safeguard.** A frame whose cost (fit plus pull) grew tries half the step, then a quarter;
   if none lowers the cost it keeps its controls and stops.

Finally, controls within ``snap`` of their default (share of the range) return to it exactly.
Frames are independent: a batch of many (``rigcast solve``) gathers each frame's active system
and solves them in one batched call; a batch of one (live) takes the same steps on vectors, and
is tested to give the batch's controls. Both are in runtime/solve/curved.py; each step's
curvature is the bundle's fixed matrix H on the active controls (the chord method above,
gathered from H with no graph call in batch, factored once per active set live), or the frame's
own matrix at its current controls where the bundle's graph gives it and the settings ask for it
(``RefineSettings.curvature``).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.solve.active import given_moved_parts, wake_factor
from rigcast.runtime.solve.curved import (
    SYSTEMS,
    BindCurvatureFn,
    CurvatureFn,
    FactoredSystem,
    curved_steps,
    curved_steps_one,
)

log = logging.getLogger(__name__)


#: (controls (N, C) float32, per-frame state (N, ...)) -> (gradient (N, C), residual_sq (N,)),
#: and from a moment-form graph a third, the basis weights z (N, R) at the controls (the
#: realignment's target, which the graph makes on the way: ``Refiner.solve`` hands it on).
#: The state is what ``Refiner.prepare`` made of the frames (the frames themselves without it).
GradientFn = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, ...]]
#: frames' refinement vertices (N, S, 3) float32 -> per-frame state (N, ...)
PrepareFn = Callable[[np.ndarray], np.ndarray]
#: one frame's state (1, ...) -> the GradientFn on that frame, controls (1, C) float32 -> (gradient
#: (1, C), residual_sq (1,)[, z (1, R)]), with what depends on the frame alone made once (the
#: live path)
BindFn = Callable[[np.ndarray], Callable[[np.ndarray], tuple[np.ndarray, ...]]]


#: when a step's curvature is made (runtime/solve/curved.py): the bundle's fixed matrix, the
#: frame's own once, or at every step (bundles whose graph gives it; older ones keep "fixed")
CURVATURES = ("fixed", "frame", "step")
#: which controls the prior pulls towards the network's answer (runtime/solve/active.py,
#: ``pull_mask``): those it moved ("moved"), or every control ("all")
PULLS = ("moved", "all")
#: how an at-rest control is tested for waking (runtime/solve/active.py): on its gradient alone
#: ("alone", ``active_set``) or on what it adds to the controls already moved ("given",
#: ``given_moved_set``)
WAKES = ("alone", "given")


class RefineError(RigcastError, ValueError):
    """Refinement settings or inputs are unusable; the message names the bad value."""


@dataclass(frozen=True)
class RefineSettings:
    """steps: Gauss-Newton steps (0 = the network's answer as it is); kappa: the correlation
    test's threshold in noise standard deviations; wake_share: the share of the residual's energy
    one at-rest control must explain on its own to be woken (a lost expression explains nearly
    all of it; noise and the forward model's diffuse error explain little); prior: weight of a
    pull towards the network's answer, relative to the curvature's diagonal (the network was
    trained on noisy inputs, so it carries a prior the fit on K vertices lacks); damping:
    Levenberg-Marquardt damping relative to the curvature's diagonal; snap: share of the range
    within which a control returns to its default; prior_sd: the standard deviation, in shares of
    the range, of the Gaussian prior around the network's answer (0 = none); backtrack: step
    halvings tried when a full step raises the cost; tol: a frame whose next step moves no
    control by this share of the range is done (a tenth of the 1 % that counts as active).
    ``prior`` is the older fixed pull, 0 in new builds. The defaults are ours, chosen on the
    demo face and one zoo rig together (recoverability, noise-free error, false activity,
    noisy-take error and jitter) and checked on rigs not used to choose them. The step count
    is a trade with the live frame: each step is one more evaluation where a frame is still
    moving (on the latency bench's untrained network, every frame), see below. Damping
    0.001 (was 0.1): where two controls move the mesh alike (neighbouring joints, a lip control
    beside the jaw) the curvature's valley is narrow, and damping its diagonal turned each step
    across the valley, not along it: on the lantern arm 10 of 12 controls alone at their bound
    came back 5-15 % of the range short, none at 0.001; on the demo faces lip_press 5.6 %, under
    1 % at 0.001; noisy-take errors on the faces and two zoo rigs moved under 1.5 %. What is left
    keeps each system's smallest eigenvalue >= 0.001 x its smallest diagonal curvature.
    wake_share 0.1 (was 0.5) with no pull on woken controls: on noisy takes a missed expression
    explains a small share of |r|^2, most of which is noise, so several missed at once stayed
    lost (face and face-linear takes -8 % and -13 % error, off-manifold false flags 5.5 -> 2.8 %
    and 5.0 -> 2.4 %; zoo-269008 unchanged, zoo-899926 +5 %, lantern arm +3 %; 0.03 wakes more
    on the faces but cost the zoo rigs 20-30 %). Five steps and six halvings (were three and
    two): on non-linear rigs the fixed curvature points a full step the wrong way (a corrective
    partner jumps to its bound), every halving up to a quarter raised the cost, and the frame kept
    the network's answer. Noise-free held-out poses of a fresh zoo rig (seed 672635, 140
    controls): mean error 3.48e-4 -> 1.94e-4 (bounded linear least squares 2.0e-4, the forward
    model at the truth 7.4e-5); lantern arm 5.23e-3 -> 4.14e-3; noisy takes of the faces and
    three zoo rigs unchanged (within 0.3 %). Halvings cost evaluations only on a failing step;
    the two extra steps only on frames still moving by ``tol``. ``curvature`` (see CURVATURES
    and runtime/solve/curved.py): "step", Gauss-Newton at the current point, on bundles whose
    graph gives it. Noise-free held-out poses (300), fixed -> step: lantern arm mean error
    4.1e-3 -> 2.8e-3 and false activity 1.45 -> 0.57 (with the kinematic chain in the forward
    model 3.3e-3 -> 9.8e-4 and 1.25 -> 0.11), zoo-624017 1.21e-4 -> 8.9e-5, zoo-269008 2.4e-5 ->
    2.0e-5, zoo-899926 1.75e-5 -> 1.67e-5; the demo face 3.2e-5 -> 3.5e-5 (false activity 0.12
    -> 0.16; bounded linear least squares 1.8e-4), face-linear unchanged. Noisy takes (200
    frames) of the two faces and three zoo rigs: error against the clean mesh within 0.5 %,
    jitter within 0.03 of the per-frame optimiser's. "frame" (the frame's own matrix, made
    again only when a control wakes) was as good on the zoo rigs, worse on the arm (1.5e-3).
    The cost on a live frame of the demo face: 954 -> 1,258 us median (loaded machine).
    ``wake`` (see WAKES): "given" tests an at-rest control on what it adds to the moved ones;
    "alone" (before) on its own gradient. On zoo chain rig 294487 the network put a joint's bend
    on its two neighbours (c2_j01_x at -11.7: c2_j00_x -4.8, c2_j02_x -7.5); the joint alone
    explained 0.2-8 % of the residual, under ``wake_share``, and stayed at 0 while the wrong
    answer left 6-8 % of the probe's mean displacement (46-139x the forward model's error): 3
    controls lost alone, none with "given"; noise-free held-out poses (300) 4.5e-4 -> 9.7e-5
    (worst frame 9.9e-3 -> 4.8e-4), false activity 0.37 -> 0; a noisy take 0.46 -> 0.37x the
    per-frame optimiser's error, jitter 1.06 -> 0.76x.
    Zoo jaw_face 576132 unchanged (clean 6.42e-6 -> 6.48e-6, false activity 0.003, take 0.48x,
    jitter 1.10 -> 1.09x). Same bundles, 300 poses, 300-frame take, /tmp/helper-30/ab.py.
    Those figures are with the test at every step; it is taken at the first step only, where
    the network's answer is (each solve of a realigned frame has one), since at every step it
    cost the demo face's batch 12 % of its frames per CPU-second (a moved set of 17 of 46
    controls on average, 42 at most: a small solve per frame and step), and at the first
    step nothing measurable (822 -> 826). On zoo-294487, first step only: none lost, clean
    1.2e-4 (worst frame 6.3e-3), false activity 0.007, take 0.37x, jitter 0.78x; the demo face
    (none lost either way) clean 4.65e-6 -> 4.52e-6, false activity 0.217 -> 0.213, take
    0.350 -> 0.351x, jitter 0.312 -> 0.327x; zoo-576132 take 0.483 -> 0.485x, jitter 1.098
    -> 1.089x, clean and false activity as before; zoo chain 236895 (66 controls, twist axes,
    its forward model about 200x worse than 294487's: 3.3e-3 mean) lost 25 -> 21, clean 2.8e-3 ->
    2.6e-3, take 0.46 -> 0.41x, but false activity 9.2 -> 11.3 and jitter 0.42 -> 0.53x.
    ``pull`` "all" and ``prior_sd`` 0.007 (were "moved" and 0.02): the take's jitter against
    the truth, as a multiple of per-frame non-linear least squares' (limit 0.5), came mostly
    from controls the fit woke on noisy frames, which had no pull and followed the noise and the
    capture's drift (zoo-294487: the chain's tip joint c1_j05_x, curvature 0.35 against a median
    of 1.7, 0.041 RMS second difference of the take's 0.013). Same bundles, 300 poses, 300-frame
    take (/tmp/helper-30/ab.py), "moved" 0.02 -> "all" 0.007: zoo-294487 jitter 0.78 -> 0.44x,
    take 0.37 -> 0.52x; zoo-576132 0.56 -> 0.42x, take 0.44 -> 0.41x; the demo face 0.33 ->
    0.31x, take 0.35x both, false activity 0.21 -> 0.25; none lost on the three, noise-free
    error within 1.9x and under the limits. Tried: "moved" with a smaller ``prior_sd`` (0.005:
    zoo-294487 0.62x jitter for take 0.54x), a Huber prior (Huber 1964; corner 1.345 and 3 sd:
    zoo-294487 0.60-0.68x, the noise moves weak controls by several sd), and each control's sd
    measured as the network's error on held-out noisy poses (10 % of the range or more on
    zoo-576132, where the network's answer is far off along controls that move the mesh alike:
    jitter 1.03x). The cost: a small expression the network missed comes back only in part on a
    noisy frame (its curvature against sigma^2 / prior_sd^2); on a clean mesh in full.
    ``model_floor``: sigma^2 is the frame's residual variance less what the forward model's own
    error leaves on a clean frame (``Refiner.model_error``, from the build's held-out fit), so
    the pull follows the sensor noise, not the model's error. Without it, on zoo-812767 (a chain
    of 3-angle joints, an old build whose forward model misses 0.06 % of D) the pull held clean
    probes: lost controls 8 -> 22."""

    steps: int = 5
    kappa: float = 4.0
    wake_share: float = 0.1
    prior: float = 0.0
    damping: float = 0.001
    snap: float = 0.002
    prior_sd: float = 0.007
    backtrack: int = 6
    tol: float = 1e-3
    curvature: str = "step"
    wake: str = "given"
    pull: str = "all"
    model_floor: bool = True

    def __post_init__(self) -> None:
        if not isinstance(self.steps, int) or not 0 <= self.steps <= 50:
            raise RefineError(f"refine steps must be an integer in 0..50, got {self.steps!r}")
        for name in ("kappa", "wake_share", "prior", "damping", "snap", "prior_sd", "tol"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0):
                raise RefineError(f"refine {name} must be finite and >= 0, got {value!r}")
        if self.pull not in PULLS:
            raise RefineError(f"refine pull must be one of {PULLS}, got {self.pull!r}")
        if self.wake not in WAKES:
            raise RefineError(f"refine wake must be one of {WAKES}, got {self.wake!r}")
        if self.curvature not in CURVATURES:
            raise RefineError(f"refine curvature must be one of {CURVATURES}, got "
                              f"{self.curvature!r}")
        if not isinstance(self.backtrack, int) or not 0 <= self.backtrack <= 10:
            raise RefineError(f"refine backtrack must be an integer in 0..10, got "
                              f"{self.backtrack!r}")

    @classmethod
    def from_manifest(cls, section: Mapping[str, Any]) -> RefineSettings:
        """The settings a bundle's manifest ``refine`` section records. A bundle built before the
        adaptive prior has no ``prior_sd``, ``backtrack`` or ``tol``: it keeps the steps it was
        checked with (no adaptive prior, no halving, the old stopping rule). One built before
        ``wake`` takes the default: the test reads only the fixed matrix every bundle has. One
        built before ``pull`` keeps "moved"."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(section) - names)
        if unknown:
            raise RefineError(f"unknown refine setting(s) {unknown}")
        kw = dict(section)
        kw.setdefault("prior_sd", 0.0)
        kw.setdefault("backtrack", 0)
        kw.setdefault("tol", 1e-6)
        kw.setdefault("pull", "moved")
        kw.setdefault("model_floor", False)
        try:
            return cls(**kw)
        except TypeError as exc:
            raise RefineError(f"refine settings are invalid: {exc}") from None


def project_naive(points: np.ndarray, basis: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """What the bundle's projection graph computes, in float64 frame by frame (its naive twin):
    points (N, S, 3); basis (R, 3S); offset (3S,) -> (N, R + 1): p = basis @ y and |y|^2,
    y = points - offset."""
    out = []
    for frame in np.asarray(points, np.float64):
        y = frame.reshape(-1) - np.asarray(offset, np.float64)
        out.append([*(np.asarray(basis, np.float64) @ y), float(y @ y)])
    return np.asarray(out, np.float64).reshape(len(out), basis.shape[0] + 1)


class Refiner:
    """Bounded sparse Gauss-Newton after the network; see the module docstring.

    gradient: the refinement graph as a function; hessian (C, C) its fixed Gauss-Newton matrix
    in normalised controls; lower, upper, defaults (C,); coords: 3 x the vertices it fits;
    prepare: what each frame becomes before the steps (its projection and |y|^2, (N, R + 1)
    float64, for a projected bundle; None: the frames themselves).
    """

    def __init__(self, gradient: GradientFn, hessian: np.ndarray, lower: np.ndarray,
                 upper: np.ndarray, defaults: np.ndarray, coords: int,
                 settings: RefineSettings | None = None,
                 prepare: PrepareFn | None = None, bind: BindFn | None = None,
                 curvature: CurvatureFn | None = None,
                 bind_curvature: BindCurvatureFn | None = None) -> None:
        c = lower.shape[0]
        h = np.asarray(hessian, np.float64)
        if h.shape != (c, c) or not np.isfinite(h).all():
            raise RefineError(f"refine hessian must be finite ({c}, {c}), got {h.shape}")
        self.gradient = gradient
        self.hessian = 0.5 * (h + h.T)
        # A control the rig never moves has no curvature; a tiny floor keeps systems solvable.
        floor = 1e-9 * max(float(np.max(np.diag(self.hessian))), 1e-30)
        self.hessian[np.diag_indices(c)] = np.maximum(np.diag(self.hessian), floor)
        self.diag = np.diag(self.hessian).copy()
        self.lower = np.asarray(lower, np.float64)
        self.span = np.asarray(upper, np.float64) - self.lower
        self.d = np.clip((np.asarray(defaults, np.float64) - self.lower) / self.span, 0.0, 1.0)
        self.coords = int(coords)
        self.prepare = prepare
        self.bind = bind
        self.curvature = curvature
        self.bind_curvature = bind_curvature
        self.settings = settings or RefineSettings()
        self.model_error = 0.0

    @property
    def model_var(self) -> float:
        """What the forward model's own error leaves per coordinate on a clean frame, taken off
        the frame's estimated noise variance before the pull (``RefineSettings.model_floor``);
        0 when the settings ask otherwise or the bundle gives no figure."""
        return self.model_error if self._settings.model_floor else 0.0

    @property
    def settings(self) -> RefineSettings:
        """The step settings; setting them also renews what the one-frame steps read."""
        return self._settings

    @settings.setter
    def settings(self, value: RefineSettings) -> None:
        self._settings = value
        # what the one-frame steps read on every step, made once per setting
        self.root_diag = np.sqrt(self.diag)
        self.wake = wake_factor(value.kappa, self.coords, value.wake_share)
        self.floor = 1e-6 * self.diag  # a control whose effect vanishes keeps a solvable system
        self.eye = np.eye(self.diag.shape[0], dtype=np.float32)  # one-hot tangents' rows
        self.pulled_all = np.ones(self.diag.shape[0])  # active.pull_mask's "all", read-only
        self.pulled_all.setflags(write=False)
        self._systems: dict[bytes, FactoredSystem] = {}
        self._given: dict[bytes, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self.tangent_cache: dict[bytes, np.ndarray] = {}  # curved.tangents_along's

    def fixed_system(self, a: np.ndarray) -> FactoredSystem:
        """The fixed matrix's system on active controls a (k,), factored once per set (a live
        stream's active set changes rarely; at most ``SYSTEMS`` sets are kept)."""
        key = a.tobytes()
        hit = self._systems.get(key)
        if hit is None:
            if len(self._systems) >= SYSTEMS:
                self._systems.clear()
            s = self._settings
            hit = FactoredSystem(self.hessian[a[:, None], a], 1.0 + s.damping + s.prior)
            self._systems[key] = hit
        return hit

    def given_parts(self, moved: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``active.given_moved_parts`` of the fixed matrix on moved controls (W,), made once
        per set (a live stream's moved set changes rarely; at most ``SYSTEMS`` sets kept)."""
        key = moved.tobytes()
        hit = self._given.get(key)
        if hit is None:
            if len(self._given) >= SYSTEMS:
                self._given.clear()
            hit = given_moved_parts(self.hessian, moved)
            self._given[key] = hit
        return hit

    @property
    def _curvature(self) -> CurvatureFn:
        assert self.curvature is not None
        return self.curvature

    def _bound(self, state: np.ndarray, current: bool) -> Callable[
            [np.ndarray, np.ndarray], tuple[np.ndarray, ...]]:
        """One frame's graph as ``curved_steps_one`` calls it: the bundle's curvature when
        ``current`` (unbound), else the gradient (bound once when the bundle allows) with the
        fixed matrix."""
        if current:
            return lambda c, t: self._curvature(c, state, t)
        gradient = self.bind(state) if self.bind is not None else (
            lambda c: self.gradient(c, state))
        hessian = self.hessian

        none = np.zeros((1, 0, 0))  # the matrix along no tangents (the chord steps send none)

        def run(controls: np.ndarray, tangents: np.ndarray) -> tuple[np.ndarray, ...]:
            out = gradient(controls)
            if tangents.shape[1] == 0:
                return out[0], out[1], none, *out[2:]
            t = tangents[0].astype(np.float64)
            return out[0], out[1], (t @ hessian @ t.T)[None], *out[2:]

        return run

    def controls(self, u: np.ndarray) -> np.ndarray:
        """u (N, C) normalised -> (N, C) float32 controls."""
        out: np.ndarray = (self.lower + self.span * u).astype(np.float32)
        return out

    def _evaluate(self, u: np.ndarray, mesh: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """u (N, C) -> (gradient (N, C) float64, |r|^2 (N,) float64, z (N, R) or None)."""
        out = self.gradient(self.controls(u), mesh)
        return (np.asarray(out[0], np.float64), np.asarray(out[1], np.float64),
                out[2] if len(out) > 2 else None)

    def refine(self, controls: np.ndarray, mesh: np.ndarray | None = None, *,
               state: np.ndarray | None = None) -> np.ndarray:
        """controls (N, C) the network's answer; mesh (N, S, 3) the vertices the refinement
        fits, in the neutral's frame, or ``state`` what ``prepare`` makes of them, already
        made -> (N, C) float32."""
        return self.solve(controls, mesh, state=state)[0]

    def solve(self, controls: np.ndarray, mesh: np.ndarray | None = None, *,
              state: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
        """:meth:`refine`, with the basis weights z (N, R) float32 the graph made at the
        controls it returns (what ``inference.MomentForm.weights`` would make of them, without
        another evaluation), or None when the graph gives none or no step ran. A frame the snap
        moved after its last evaluation has a row of NaN: its weights are still to be made."""
        s = self.settings
        # np.clip's numbers with two ufunc calls (its wrapper costs more than both on one frame)
        u = np.minimum(np.maximum((np.asarray(controls, np.float64) - self.lower) / self.span,
                                  0.0), 1.0)
        if s.steps == 0 or u.shape[0] == 0:
            return np.asarray(controls, np.float32), None
        if state is not None:
            mesh = state
        elif self.prepare is not None:
            assert mesh is not None
            mesh = self.prepare(mesh)
        assert mesh is not None
        current = self.curvature is not None and s.curvature != "fixed"
        mode = s.curvature if current else "fixed"
        if u.shape[0] == 1:  # the live path: the frame's graph bound once
            run = (self.bind_curvature(mesh) if current and self.bind_curvature is not None
                   else self._bound(mesh, current))
            u, z = curved_steps_one(self, run, u, mode)
        else:
            u, z = curved_steps(self, self._curvature if current else None, u, mesh, mode)
        snapped = np.where(np.abs(u - self.d) <= s.snap, self.d, u)
        if z is not None:
            moved = (snapped != u).any(axis=1)
            if moved.any():
                z = np.array(z, np.float32)
                z[moved] = np.nan
        out: np.ndarray = (self.lower + self.span * snapped).astype(np.float32)
        return out, z
