"""The One Euro filter, vectorised over C controls, plus a zero-phase smoother for batch use.

Exactly as in Casiez, Roussel & Vogel, "1€ Filter: A Simple Speed-based Low-pass Filter for
Noisy Input in Interactive Systems", CHI 2012:

    te       = t_i - t_{i-1}                          (seconds, from the sender's timestamps)
    alpha(te, fc) = 1 / (1 + tau / te),  tau = 1 / (2 pi fc)
    dx_i     = (x_i - x̂_{i-1}) / te                  (x̂ is the previous *filtered* value)
    dx̂_i    = alpha(te, d_cutoff) dx_i + (1 - alpha(te, d_cutoff)) dx̂_{i-1}
    fc       = min_cutoff + beta |dx̂_i|
    x̂_i     = alpha(te, fc) x_i + (1 - alpha(te, fc)) x̂_{i-1}

The first sample passes through with dx̂ = 0.

The recurrence is written once, :func:`one_euro_step`: the update with 2 pi folded into
precomputed parameter arrays and alpha written as r / (1 + r), r = 2 pi fc te, which needs few
array operations per frame. :class:`OneEuroFilter` runs it for one stream, a frame at a time
(the live server, a batch of one) or over a run of frames (``rigcast solve``, a batch of many),
with the same reset rules; :func:`one_euro_step_naive` is its per-control twin for the tests.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from rigcast.runtime.errors import RigcastError
from rigcast.runtime.schema import ControlSchema

log = logging.getLogger(__name__)

_TWO_PI = 2.0 * math.pi


class FilterError(RigcastError, ValueError):
    """Bad filter parameters or input shapes; the message names the value."""


@dataclass(frozen=True)
class OneEuroParams:
    """Per-control parameters: min_cutoff (C,) Hz > 0, beta (C,) >= 0, d_cutoff (C,) Hz > 0."""

    min_cutoff: np.ndarray
    beta: np.ndarray
    d_cutoff: np.ndarray

    def __post_init__(self) -> None:
        arrays = {}
        for name in ("min_cutoff", "beta", "d_cutoff"):
            a = np.array(getattr(self, name), dtype=np.float64).reshape(-1)
            a.setflags(write=False)
            arrays[name] = a
            object.__setattr__(self, name, a)
        sizes = {a.shape[0] for a in arrays.values()}
        if len(sizes) != 1:
            raise FilterError(f"min_cutoff, beta, d_cutoff differ in length: {sorted(sizes)}")
        for name in ("min_cutoff", "d_cutoff"):
            a = arrays[name]
            if not np.all(np.isfinite(a) & (a > 0)):
                raise FilterError(f"{name} must be finite and > 0 Hz, got {a[~(a > 0)][:3]}")
        b = arrays["beta"]
        if not np.all(np.isfinite(b) & (b >= 0)):
            raise FilterError(f"beta must be finite and >= 0, got {b[~(b >= 0)][:3]}")

    def __len__(self) -> int:
        return int(self.min_cutoff.shape[0])

    def per_unit_range(self, span: np.ndarray) -> OneEuroParams:
        """These parameters with beta read as "per unit of each control's range": span (C,) > 0,
        the controls' max - min. fc = min_cutoff + beta |dx̂| has beta in 1 / (control unit), so
        dividing by the range lets one beta serve weights in 0..1 and angles in degrees alike."""
        span = np.asarray(span, dtype=np.float64).reshape(-1)
        if span.shape != self.beta.shape or not np.all(np.isfinite(span) & (span > 0)):
            raise FilterError(f"control ranges must be {len(self)} finite values > 0")
        return OneEuroParams(self.min_cutoff, self.beta / span, self.d_cutoff)

    @classmethod
    def uniform(
        cls, count: int, min_cutoff: float = 1.0, beta: float = 0.0, d_cutoff: float = 1.0
    ) -> OneEuroParams:
        if count < 1:
            raise FilterError(f"control count must be >= 1, got {count}")
        return cls(
            np.full(count, min_cutoff), np.full(count, beta), np.full(count, d_cutoff)
        )

    @classmethod
    def per_group(
        cls,
        schema: ControlSchema,
        settings: Mapping[str, tuple[float, float, float]],
        default: tuple[float, float, float] = (1.0, 0.0, 1.0),
    ) -> OneEuroParams:
        """Parameters from ``{group or control name: (min_cutoff, beta, d_cutoff)}``.

        A control name wins over its group; controls matched by neither get ``default``.
        A key that is neither a group nor a control is an error (it is almost always a typo).
        """
        names = set(schema.names)
        groups = set(schema.groups)
        unknown = [k for k in settings if k not in names and k not in groups]
        if unknown:
            raise FilterError(f"filter settings name no group or control: {sorted(unknown)}")
        rows = []
        for c in schema.controls:
            if c.name in settings:
                rows.append(tuple(settings[c.name]))
            elif c.group in settings:
                rows.append(tuple(settings[c.group]))
            else:
                rows.append(tuple(default))
        if any(len(r) != 3 for r in rows):
            raise FilterError("each filter setting must be (min_cutoff, beta, d_cutoff)")
        table = np.array(rows, dtype=np.float64)
        return cls(table[:, 0], table[:, 1], table[:, 2])


@dataclass(frozen=True)
class OneEuroState:
    """x_prev (C,) last filtered value, dx_prev (C,) last filtered derivative, t_prev_ns."""

    x_prev: np.ndarray
    dx_prev: np.ndarray
    t_prev_ns: int


@dataclass(frozen=True)
class OneEuroConstants:
    """Per-control constants of one_euro_step, each (C,) float64: 2 pi min_cutoff,
    2 pi beta and 2 pi d_cutoff."""

    two_pi_min: np.ndarray
    two_pi_beta: np.ndarray
    two_pi_d: np.ndarray

    @classmethod
    def of(cls, params: OneEuroParams) -> OneEuroConstants:
        return cls(_TWO_PI * params.min_cutoff, _TWO_PI * params.beta, _TWO_PI * params.d_cutoff)


@dataclass(frozen=True)
class OneEuroRun:
    """What one_euro_run returns: y (T, C) float64; state after the last frame (None when the
    run was empty and started from None); filtered (T,) bool, whether each frame was smoothed
    (not a start or restart); restarts, how many frames restarted the filter; last_frame."""

    y: np.ndarray
    state: OneEuroState | None
    filtered: np.ndarray
    restarts: int
    last_frame: int | None


def one_euro_run(
    state: OneEuroState | None, x: np.ndarray, t_ns: np.ndarray, consts: OneEuroConstants, *,
    gap_ns: int | None = None, frames: np.ndarray | None = None, last_frame: int | None = None,
    max_frame_jump: int | None = None, out: np.ndarray | None = None,
) -> OneEuroRun:
    """The One Euro recurrence over a run of frames, in order: x (T, C), t_ns (T,) int sender
    times, frames (T,) frame numbers or None -> OneEuroRun. The live server runs it on one frame,
    the batch solve on chunks of many, the state carried between calls.

    Per frame: with no state (start) the sample passes through with dx̂ = 0. A frame more than
    ``gap_ns`` after the previous one, or whose number goes back from ``last_frame`` or jumps
    ahead by more than ``max_frame_jump``, restarts the filter (it passes through). A timestamp
    not after the previous one (te <= 0) is a repeat: the previous output is held and the state
    is unchanged. Otherwise, with r = 2 pi fc te, alpha(te, fc) = 1 / (1 + 1 / (2 pi fc te)) =
    r / (1 + r) and 2 pi fc = 2 pi min_cutoff + 2 pi beta |dx̂|; each blend a x + (1 - a) p is
    p + a (x - p). The rules run on Python ints first; the recurrence then runs in place on
    three (C,) buffers, so a frame costs a fixed handful of array operations.
    """
    xv = np.asarray(x, dtype=np.float64)
    c = consts.two_pi_min.shape[0]
    if xv.ndim != 2 or xv.shape[1] != c:
        raise FilterError(f"x has shape {xv.shape}, filter has {c} controls")
    n = xv.shape[0]
    y = np.empty((n, c), np.float64) if out is None else out
    filtered = np.zeros(n, dtype=bool)
    times = [int(v) for v in np.asarray(t_ns).reshape(-1).tolist()]
    numbers = ([None] * n if frames is None
               else [int(v) for v in np.asarray(frames).reshape(-1).tolist()])
    # First pass, on Python ints: what each frame does (0 start, 1 hold, 2 update) and its te.
    kind = [0] * n
    te = [1.0] * n
    t_prev = None if state is None else state.t_prev_ns
    restarts = 0
    for i in range(n):
        t, frame = times[i], numbers[i]
        if t_prev is not None:
            jump = None if frame is None or last_frame is None else frame - last_frame
            if ((gap_ns is not None and t - t_prev > gap_ns)
                    or (jump is not None and (jump < 0 or (max_frame_jump is not None
                                                           and jump > max_frame_jump)))):
                t_prev, restarts = None, restarts + 1
                log.debug("filter reset at t=%d frame=%s", t, frame)
        if t_prev is None:
            t_prev = t
        elif t > t_prev:
            kind[i], te[i], t_prev = 2, (t - t_prev) * 1e-9, t
            filtered[i] = True
        else:
            kind[i] = 1
            filtered[i] = True
        if frame is not None:
            last_frame = frame
    # alpha_d = r_d / (1 + r_d), r_d = 2 pi d_cutoff te; dx̂ = dx̂_prev + alpha_d (dx - dx̂_prev);
    # r = 2 pi fc te; all in place on three (C,) buffers.
    two_pi_d, two_pi_beta, two_pi_min = consts.two_pi_d, consts.two_pi_beta, consts.two_pi_min
    if state is None:
        x_prev, dx_hat = None, np.zeros(c)
    else:
        x_prev, dx_hat = state.x_prev, state.dx_prev.copy()
    d = np.empty(c)
    r = np.empty(c)
    a = np.empty(c)
    for i in range(n):
        k = kind[i]
        if k == 0 or x_prev is None:
            y[i] = xv[i]
            dx_hat[:] = 0.0
        elif k == 1:
            y[i] = x_prev
        else:
            te_i = te[i]
            np.multiply(two_pi_d, te_i, out=r)
            np.add(r, 1.0, out=a)
            np.divide(r, a, out=a)  # alpha(te, d_cutoff)
            np.subtract(xv[i], x_prev, out=d)
            np.multiply(d, 1.0 / te_i, out=r)  # dx
            r -= dx_hat
            r *= a
            dx_hat += r
            np.abs(dx_hat, out=r)
            r *= two_pi_beta
            r += two_pi_min
            r *= te_i  # r = 2 pi fc te
            np.add(r, 1.0, out=a)
            r /= a  # alpha(te, fc)
            d *= r
            np.add(x_prev, d, out=y[i])
        x_prev = y[i]
    new_state = state if x_prev is None or t_prev is None else OneEuroState(
        x_prev.copy(), dx_hat, t_prev)
    return OneEuroRun(y, new_state, filtered, restarts, last_frame)


def one_euro_step(
    state: OneEuroState | None, x: np.ndarray, t_ns: int, consts: OneEuroConstants
) -> tuple[np.ndarray, OneEuroState]:
    """one_euro_run on one frame without reset rules: x (C,) -> (y (C,) float64, new state)."""
    run = one_euro_run(state, np.asarray(x).reshape(1, -1), np.array([t_ns]), consts)
    assert run.state is not None
    return run.y[0], run.state


def one_euro_step_naive(
    state: OneEuroState | None, x: np.ndarray, t_ns: int, params: OneEuroParams
) -> tuple[np.ndarray, OneEuroState]:
    """Twin of one_euro_step (with the plain parameters): a scalar loop over controls, written
    from the paper's pseudocode."""
    xs = [float(v) for v in np.asarray(x).reshape(-1)]
    if state is None:
        y0 = np.array(xs)
        return y0, OneEuroState(y0, np.zeros(len(xs)), int(t_ns))
    te = (int(t_ns) - state.t_prev_ns) / 1e9
    if te <= 0.0:
        return state.x_prev.copy(), state
    ys, dxs = [], []
    for c, xc in enumerate(xs):
        rate = 1.0 / te
        tau_d = 1.0 / (2.0 * math.pi * float(params.d_cutoff[c]))
        alpha_d = 1.0 / (1.0 + tau_d * rate)
        dx = (xc - float(state.x_prev[c])) * rate
        edx = alpha_d * dx + (1.0 - alpha_d) * float(state.dx_prev[c])
        fc = float(params.min_cutoff[c]) + float(params.beta[c]) * abs(edx)
        tau = 1.0 / (2.0 * math.pi * fc)
        alpha = 1.0 / (1.0 + tau * rate)
        ys.append(alpha * xc + (1.0 - alpha) * float(state.x_prev[c]))
        dxs.append(edx)
    y = np.array(ys)
    return y, OneEuroState(y, np.array(dxs), int(t_ns))


class OneEuroFilter:
    """One stream's filter: one_euro_step with its state and reset rules.

    ``gap_ns``: a sample more than this after the previous one restarts the filter (the new sample
    passes through). ``frame``, when given, also restarts it if the frame number goes backwards or
    jumps forward by more than ``max_frame_jump`` (None: forward jumps are allowed, since the
    server's newest-frame-wins policy skips frames under load). ``passthrough`` returns x as is.
    After each call, ``filtered`` says whether the output was actually smoothed.
    """

    def __init__(
        self,
        params: OneEuroParams,
        *,
        passthrough: bool = False,
        gap_ns: int | None = 250_000_000,
        max_frame_jump: int | None = None,
    ) -> None:
        self.params = params
        self.consts = OneEuroConstants.of(params)
        self.passthrough = passthrough
        self.gap_ns = gap_ns
        self.max_frame_jump = max_frame_jump
        self.state: OneEuroState | None = None
        self.last_frame: int | None = None
        self.resets = 0
        self.filtered = False

    def reset(self) -> None:
        self.state = None
        self.last_frame = None

    def __call__(self, x: np.ndarray, t_ns: int, frame: int | None = None) -> np.ndarray:
        """x (C,) -> y (C,) float64."""
        y, _ = self.run(np.asarray(x).reshape(1, -1), np.array([t_ns]),
                        None if frame is None else np.array([frame]))
        return y[0]

    def run(self, x: np.ndarray, t_ns: np.ndarray, frames: np.ndarray | None = None,
            out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """A run of frames, in order, state carried: x (T, C), t_ns (T,) int sender times,
        frames (T,) or None -> (y (T, C) float64 (into ``out`` when given), filtered (T,)
        bool). ``filtered`` (the attribute) says whether the last frame was smoothed."""
        if self.passthrough:
            y = np.array(x, dtype=np.float64) if out is None else out
            if out is not None:
                out[...] = x
            self.filtered = False
            return y, np.zeros(y.shape[0], dtype=bool)
        run = one_euro_run(self.state, x, t_ns, self.consts, gap_ns=self.gap_ns, frames=frames,
                           last_frame=self.last_frame, max_frame_jump=self.max_frame_jump,
                           out=out)
        self.state, self.last_frame = run.state, run.last_frame
        self.resets += run.restarts
        if run.filtered.shape[0]:
            self.filtered = bool(run.filtered[-1])
        return run.y, run.filtered


def zero_phase_smooth(x: np.ndarray, times_s: np.ndarray, cutoff_hz: float) -> np.ndarray:
    """Non-causal smoothing for batch use: a first-order low pass run forward, then backward.

    x (T, C), times_s (T,) increasing seconds (irregular spacing allowed), cutoff_hz > 0.
    Each interval uses alpha(te, fc) as in the One Euro filter with beta = 0; the backward pass
    reuses the same per-interval alphas, so a uniformly sampled signal gets the same result as
    ``filtfilt`` with b = [alpha], a = [1, alpha - 1] and steady-state edges.
    Returns (T, C) float64.
    """
    xv = np.asarray(x, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    if xv.ndim != 2 or t.shape != (xv.shape[0],):
        raise FilterError(f"x must be (T, C) and times_s (T,), got {xv.shape} and {t.shape}")
    if not cutoff_hz > 0:
        raise FilterError(f"cutoff_hz must be > 0, got {cutoff_hz}")
    if xv.shape[0] < 2:
        return xv.copy()
    te = np.diff(t)
    if not np.all(te > 0):
        raise FilterError("times_s must be strictly increasing")
    alphas = _alpha_series(te, cutoff_hz)
    fwd = np.empty_like(xv)
    fwd[0] = xv[0]
    for i, a in enumerate(alphas, start=1):
        fwd[i] = a * xv[i] + (1.0 - a) * fwd[i - 1]
    out = np.empty_like(xv)
    out[-1] = fwd[-1]
    for i in range(xv.shape[0] - 2, -1, -1):
        a = alphas[i]
        out[i] = a * fwd[i] + (1.0 - a) * out[i + 1]
    return out


def _alpha_series(te: np.ndarray, cutoff_hz: float) -> list[float]:
    return [float(a) for a in 1.0 / (1.0 + 1.0 / (_TWO_PI * te * cutoff_hz))]
