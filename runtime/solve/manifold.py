"""Off-manifold detection: an adaptive threshold on the per-frame fit error.

A frame is off-manifold when its fit error (the forward model on the solved controls against the
incoming mesh) stands out from the recent frames of the same stream:

    threshold = max(floor, median(window) + k * 1.4826 * MAD(window))

over the last ``window`` fit errors before the frame. This running median + k-MAD outlier rule is
common practice for robust outlier flagging; we cite no published source for it. 1.4826 * MAD
estimates the standard deviation of Gaussian noise (a value from memory), so ``k`` reads as
"robust standard deviations". The ``floor`` keeps the threshold above what the bundle achieves
on its own training data, so a stream whose fit error barely varies (MAD near 0) is not flagged
for numerical noise.

Why adaptive: a fixed multiple of the training fit error cannot know the stream's sensor noise.
Real (and the demo's) meshes are noisy, so every frame's fit error sits well above the training
figure and a bulge that no control can make adds little on top of that.

Why the worst vertex: feed the detector the frame's *max* vertex error, not the RMS. An
off-manifold shape is usually local (a bulge, a dent, a tracking blip), and the RMS over thousands
of vertices averages it away under the noise; the max does not. On the demo face with planted
bulges (``bench/batch.py``) the max finds all of them where the RMS finds about half.

Two forms with one definition:

- :class:`ManifoldTracker`, for a live stream: ``update(value) -> bool`` per frame. The median and
  MAD are recomputed every ``every`` frames from a fixed ring buffer, so a frame costs O(1) and a
  refresh O(window).
- :func:`off_manifold_thresholds`, for a whole take at once (vectorised), giving the thresholds the
  tracker would have used; :func:`off_manifold_thresholds_naive` is the definition as a loop.

A statistic that looks for a local bump (not wired in yet): :class:`LocalMeans` and
:func:`local_peak` give the frame's largest Gaussian-weighted neighbourhood mean of the residual
vectors (neighbourhoods of 2 % of the neutral's diagonal, around centres spaced as far apart).
White noise of sigma per coordinate averages down to about sigma / sqrt(n) over a neighbourhood
of n vertices, while a bump that spans the neighbourhood keeps most of its height; the max vertex
error keeps the whole noise tail. It is fed to the same adaptive rule in place of the max vertex
error. docs/quality.md gives what it did on the quality bench's rigs (mixed: better recall,
more false flags on frames the solve gets wrong). Its cost is the gather of every (centre,
vertex) pair: 35 k pairs on the demo face, 0.9-1.3 ms a frame in numpy on the shared 2-core
machine against 75 us for the fit error itself, too slow for the batch budget as it stands.

Semantics, shared by both: values are pushed in frame order; NaN values (fit error not computed)
are skipped entirely. The threshold in force for the n-th value (n = values pushed before it) is
``inf`` while n < ``warmup``; otherwise it comes from the ``window`` values before the latest
refresh point r <= n, where refresh points are ``warmup, warmup + every, warmup + 2 every, ...``.
Every value goes into the window, flagged or not (the median is robust to the few that are off,
and a lasting change of level is followed instead of flagged for ever).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)

MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(3/4): MAD -> standard deviation for Gaussian data (from memory)

# The floor is this many times the training fit error (the old fixed threshold's factor).
FLOOR_FACTOR = 3.0
# With no training figure: 0.1% of the neutral's bounding-box diagonal (a starting point of ours).
FALLBACK_FLOOR_OF_DIAGONAL = 0.001
# The local statistic's neighbourhood: a Gaussian of sigma 2 % of the diagonal, cut at 2.5 sigma,
# around centres about one sigma apart (our choice, from the bench's rigs; the planted bumps of
# bench/quality.py are Gaussians of sigma 6 % of the diagonal).
LOCAL_SCALE_OF_DIAGONAL = 0.02
LOCAL_CUTOFF = 2.5


class ManifoldError(RigcastError, ValueError):
    """A detector setting or input out of range; the message names it."""


@dataclass(frozen=True)
class ManifoldConfig:
    """Settings of the adaptive off-manifold threshold.

    k: robust standard deviations (1.4826 MAD) above the running median; window: fit errors the
    median and MAD are taken over; every: frames between refreshes of the median and MAD; warmup:
    fit errors seen before anything is flagged; floor: the threshold never goes below this (mesh
    units; 0 for none, see :func:`floor_for_bundle`).

    The defaults (k 6, a 600-frame window, i.e. 10 s at 60 fps) are our own choice, tuned on the
    demo face: on four 900-frame synthetic takes with sensor noise, wobble and head motion they
    flag all 24 planted bulges and no other frame.
    """

    k: float = 6.0
    window: int = 600
    every: int = 30
    warmup: int = 30
    floor: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.k) and self.k > 0):
            raise ManifoldError(f"k must be finite and > 0, got {self.k!r}")
        for name in ("window", "every", "warmup"):
            value = getattr(self, name)
            if not isinstance(value, int) or value < 1:
                raise ManifoldError(f"{name} must be an integer >= 1, got {value!r}")
        if self.warmup > self.window:
            raise ManifoldError(f"warmup ({self.warmup}) may not exceed window ({self.window})")
        if not (math.isfinite(self.floor) and self.floor >= 0):
            raise ManifoldError(f"floor must be finite and >= 0, got {self.floor!r}")


@dataclass(frozen=True)
class TrainingSection:
    """What the runtime reads of a bundle manifest's ``training`` section.

    inverse_fit_rms: the inverse's fit error on its training data, mesh units, or None. The
    build (export/bundling/build_finish.py) writes it as ``training.inverse.mean_err``, hand-built
    bundles (export/bundling/synthetic_bundle.py) as ``training.inverse_fit_rms``; nothing else does.
    """

    inverse_fit_rms: float | None

    @classmethod
    def read(cls, manifest: Mapping[str, Any]) -> TrainingSection:
        training = manifest.get("training")
        if not isinstance(training, Mapping):
            return cls(None)
        nested = training.get("inverse")
        value = training.get("inverse_fit_rms")
        if value is None and isinstance(nested, Mapping):
            value = nested.get("mean_err")
        if isinstance(value, int | float) and math.isfinite(value) and value > 0:
            return cls(float(value))
        return cls(None)


def training_fit_error(manifest: Mapping[str, Any]) -> float | None:
    """The inverse's fit error on its training data (mesh units) from a bundle manifest, if any."""
    return TrainingSection.read(manifest).inverse_fit_rms


def floor_for_bundle(
    manifest: Mapping[str, Any], neutral: np.ndarray, factor: float = FLOOR_FACTOR
) -> float:
    """The detector's floor for a bundle: ``factor`` (3) x its training fit error, else 0.1% of the
    neutral's (V, 3) bounding-box diagonal."""
    fit = training_fit_error(manifest)
    if fit is not None:
        return factor * fit
    span = np.ptp(np.asarray(neutral, dtype=np.float64), axis=0)
    return FALLBACK_FLOOR_OF_DIAGONAL * float(np.linalg.norm(span))


def robust_threshold(window: np.ndarray, k: float, floor: float) -> float:
    """window (W,) finite fit errors -> max(floor, median + k * 1.4826 * MAD)."""
    med = float(np.median(window))
    mad = float(np.median(np.abs(window - med)))
    return max(floor, med + k * MAD_TO_SIGMA * mad)


class ManifoldTracker:
    """The adaptive threshold for one live stream.

    Call ``update(fit_error)`` once per frame whose fit error was computed (the frame's max vertex
    error, mesh units); it returns whether that frame is off-manifold. ``threshold`` is the value
    the last frame was compared with (``inf`` during warm-up). ``reset()`` forgets the stream, e.g.
    on a bundle reload. Not thread-safe: one tracker per stream, driven by the stream's loop.
    """

    def __init__(self, config: ManifoldConfig | None = None) -> None:
        self.config = config or ManifoldConfig()
        self._ring = np.empty(self.config.window, dtype=np.float64)
        self.reset()

    def reset(self) -> None:
        self.count = 0  # values pushed so far
        self.flagged = 0
        self.threshold = math.inf

    def update(self, value: float) -> bool:
        """Compare ``value`` with the threshold in force, then add it to the window."""
        if not math.isfinite(value):
            return False
        cfg = self.config
        n = self.count
        if n >= cfg.warmup and (n - cfg.warmup) % cfg.every == 0:
            filled = min(n, cfg.window)
            self.threshold = robust_threshold(self._ring[:filled], cfg.k, cfg.floor)
        off = value > self.threshold
        self._ring[n % cfg.window] = value
        self.count = n + 1
        self.flagged += int(off)
        return off

    def snapshot(self) -> dict[str, float | int]:
        """Plain numbers for telemetry."""
        return {"threshold": self.threshold, "frames": self.count, "flagged": self.flagged}


def off_manifold_thresholds(values: np.ndarray, config: ManifoldConfig | None = None
                            ) -> np.ndarray:
    """values (T,) fit errors in frame order, NaN where not computed -> (T,) float64 thresholds.

    The threshold each frame was compared with, exactly as :class:`ManifoldTracker` would have
    used it (``inf`` during warm-up, NaN where the value is NaN). Vectorised: the median and MAD
    are computed for all refresh points at once over a strided window view.
    """
    cfg = config or ManifoldConfig()
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1:
        raise ManifoldError(f"values must be (T,), got shape {x.shape}")
    out = np.full(x.shape, np.nan)
    finite = np.flatnonzero(np.isfinite(x))
    seen = x[finite]  # (M,) the values the tracker is given
    m = seen.shape[0]
    thr = np.full(m, np.inf)
    refresh = np.arange(cfg.warmup, m, cfg.every)  # (R,) value counts at which stats refresh
    if refresh.size:
        w = cfg.window
        stats = np.empty(refresh.size)
        full = refresh >= w
        # Refresh points with a full window: rows of a (M - W + 1, W) strided view.
        if full.any():
            rows = np.lib.stride_tricks.sliding_window_view(seen, w)[refresh[full] - w]  # (F, W)
            med = np.median(rows, axis=1)
            mad = np.median(np.abs(rows - med[:, None]), axis=1)
            stats[full] = med + cfg.k * MAD_TO_SIGMA * mad
        # The few early ones (fewer than W values so far) one by one.
        for j in np.flatnonzero(~full):
            stats[j] = robust_threshold(seen[: refresh[j]], cfg.k, 0.0)
        stats = np.maximum(stats, cfg.floor)
        # Value n uses the latest refresh point <= n.
        after = np.arange(cfg.warmup, m)
        thr[cfg.warmup :] = stats[(after - cfg.warmup) // cfg.every]
    out[finite] = thr
    return out


def off_manifold_thresholds_naive(values: np.ndarray, config: ManifoldConfig | None = None
                                  ) -> np.ndarray:
    """Twin of off_manifold_thresholds, straight from the definition: one median per value."""
    cfg = config or ManifoldConfig()
    x = np.asarray(values, dtype=np.float64)
    out = np.full(x.shape, np.nan)
    seen: list[float] = []
    for t, v in enumerate(x):
        if not math.isfinite(v):
            continue
        n = len(seen)
        if n < cfg.warmup:
            out[t] = math.inf
        else:
            r = cfg.warmup + cfg.every * ((n - cfg.warmup) // cfg.every)
            window = np.array(seen[max(0, r - cfg.window) : r])
            out[t] = robust_threshold(window, cfg.k, cfg.floor)
        seen.append(float(v))
    return out


def flag_off_manifold(values: np.ndarray, config: ManifoldConfig | None = None) -> np.ndarray:
    """values (T,) fit errors, NaN where not computed -> (T,) bool off-manifold flags."""
    x = np.asarray(values, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.asarray(x > off_manifold_thresholds(x, config))  # NaN compares False


def farthest_points(points: np.ndarray, spacing: float) -> np.ndarray:
    """points (M, 3), spacing > 0 -> (P,) int64 indices of centres picked by farthest-point
    sampling (from the point of least x, then always the point farthest from those picked) until
    every point lies within ``spacing`` of a centre. Deterministic."""
    p = np.asarray(points, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] != 3 or p.shape[0] == 0:
        raise ManifoldError(f"points must be (M, 3) with M >= 1, got shape {p.shape}")
    if not (math.isfinite(spacing) and spacing > 0):
        raise ManifoldError(f"spacing must be finite and > 0, got {spacing!r}")
    picked = [int(np.argmin(p[:, 0]))]
    gap = np.linalg.norm(p - p[picked[0]], axis=1)
    while float(gap.max()) > spacing:
        i = int(np.argmax(gap))
        picked.append(i)
        np.minimum(gap, np.linalg.norm(p - p[i], axis=1), out=gap)
    return np.asarray(picked, dtype=np.int64)


@dataclass(frozen=True)
class LocalMeans:
    """Gaussian-weighted neighbourhood means over a fixed set of M points (e.g. the neutral's
    vertices the fit error reads), in sparse form: centre p owns pairs ``starts[p]`` up to the
    next start; pair i reads point ``members[i]`` with weight ``weights[i]`` (a centre's weights
    sum to 1). centres (P,) int64 point indices; members (N,) int64; weights (N,) float32;
    starts (P,) int64, increasing, starts[0] = 0."""

    centres: np.ndarray
    members: np.ndarray
    weights: np.ndarray
    starts: np.ndarray

    @classmethod
    def build(cls, points: np.ndarray, scale: float | None = None,
              cutoff: float = LOCAL_CUTOFF) -> LocalMeans:
        """points (M, 3) -> neighbourhoods of sigma ``scale`` (mesh units; None: 2 % of the
        points' bounding-box diagonal), cut at ``cutoff`` sigma, centres ``scale`` apart."""
        p = np.asarray(points, dtype=np.float64)
        if p.ndim != 2 or p.shape[1] != 3 or p.shape[0] == 0:
            raise ManifoldError(f"points must be (M, 3) with M >= 1, got shape {p.shape}")
        if scale is None:
            scale = LOCAL_SCALE_OF_DIAGONAL * float(np.linalg.norm(np.ptp(p, axis=0)))
        if not (math.isfinite(scale) and scale > 0):
            raise ManifoldError(f"scale must be finite and > 0, got {scale!r}")
        centres = farthest_points(p, scale)
        members, weights, starts = [], [], []
        count = 0
        for c in centres:
            d2 = np.sum((p - p[c]) ** 2, axis=1)
            near = np.flatnonzero(d2 <= (cutoff * scale) ** 2)
            w = np.exp(-d2[near] / (2.0 * scale * scale))
            members.append(near)
            weights.append(w / w.sum())
            starts.append(count)
            count += near.shape[0]
        return cls(centres, np.concatenate(members).astype(np.int64),
                   np.concatenate(weights).astype(np.float32), np.asarray(starts, np.int64))

    @property
    def pairs(self) -> int:
        return int(self.members.shape[0])

    def means(self, diff: np.ndarray) -> np.ndarray:
        """diff (B, M, 3) residual vectors -> (B, P, 3) float32 neighbourhood means."""
        gathered = np.take(np.asarray(diff, np.float32), self.members, axis=1)  # (B, N, 3)
        gathered *= self.weights[None, :, None]
        out: np.ndarray = np.add.reduceat(gathered, self.starts, axis=1)
        return out


def local_peak(diff: np.ndarray, local: LocalMeans) -> np.ndarray:
    """diff (B, M, 3) residual vectors (observed minus the forward model's mesh, over the points
    ``local`` was built on) -> (B,) float64: each frame's largest neighbourhood-mean length."""
    m = local.means(diff)
    return np.sqrt(np.max(np.einsum("bpx,bpx->bp", m, m), axis=1).astype(np.float64))


def local_peak_naive(diff: np.ndarray, local: LocalMeans) -> np.ndarray:
    """Twin of local_peak: loops over frames and centres, in float64."""
    d = np.asarray(diff, dtype=np.float64)
    ends = np.append(local.starts[1:], local.pairs)
    out = np.zeros(d.shape[0])
    for b in range(d.shape[0]):
        for s, e in zip(local.starts, ends, strict=True):
            mean = np.zeros(3)
            for i in range(int(s), int(e)):
                mean += float(local.weights[i]) * d[b, local.members[i]]
            out[b] = max(out[b], float(np.linalg.norm(mean)))
    return out
