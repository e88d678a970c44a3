"""A synthetic performance take: known controls, the real rig's meshes, sensor-like noise.

The quality report and the demo use it. Every take is a pure function of the rig and a seed.

- Control trajectories are sparse, overlapping "expressions": each one moves one to three controls
  from their default toward a target inside the bounds, eased on and off with smoothstep envelopes.
- The clean meshes come from the REAL rig (``rig.evaluate``), never an approximator.
- The observed meshes add Gaussian noise per vertex and a low-frequency, spatially correlated
  wobble (a few smooth blobs that drift over time), like the residual of a capture system.
- A few isolated frames are pushed off the rig's manifold by a localised bulge or dent that no
  combination of controls is meant to produce; ``off_manifold`` marks them.
- Optional speech: one control (a jaw) opens and closes per syllable, in phrases with pauses, on
  top of the expressions. This keeps a jaw-driven rig's non-linear part in play most of the take.
- Optional rigid head motion: a smooth small rotation and translation of the whole mesh.
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass

import numpy as np
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.errors import EXIT_USAGE, RigcastError

log = logging.getLogger(__name__)


class SynthError(RigcastError, ValueError):
    """A synthetic-take parameter is out of range; the message names it and its value."""

    advice = "choose values in the ranges named above"
    exit_code = EXIT_USAGE


@dataclass(frozen=True)
class SynthTake:
    """A synthetic take. T frames, C controls, V vertices.

    controls_true: (T, C) float32, the controls that made ``vertices_clean``.
    vertices_clean: (T, V, 3) float32, ``rig.evaluate(controls_true)``.
    vertices: (T, V, 3) float32, observed: clean + noise + wobble (+ bulges) (+ head motion).
    times_s: (T,) float64, frame times in seconds from 0.
    off_manifold: (T,) bool, frames with a bulge or dent added.
    head_pose: (T, 4, 4) float64 or None; maps neutral-frame points to observed points.
    """

    controls_true: np.ndarray
    vertices_clean: np.ndarray
    vertices: np.ndarray
    times_s: np.ndarray
    off_manifold: np.ndarray
    head_pose: np.ndarray | None
    fps: float
    seed: int

    @property
    def frames(self) -> int:
        return int(self.controls_true.shape[0])


def bbox_diagonal(points: np.ndarray) -> float:
    """points: (V, 3) -> length of the axis-aligned bounding-box diagonal."""
    p = np.asarray(points, dtype=np.float64)
    return float(np.linalg.norm(p.max(axis=0) - p.min(axis=0)))


def smoothstep(x: np.ndarray) -> np.ndarray:
    """(...,) -> (...,) cubic smoothstep 3x^2 - 2x^3 on x clipped to [0, 1]."""
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


def envelope(t: np.ndarray, start: float, attack: float, hold: float, release: float) -> np.ndarray:
    """t: (T,) seconds -> (T,) in [0, 1]: eased on over ``attack``, held, eased off after."""
    up = smoothstep((t - start) / attack)
    down = smoothstep((start + attack + hold + release - t) / release)
    return np.minimum(up, down)


def control_trajectories(
    lower: np.ndarray,
    upper: np.ndarray,
    defaults: np.ndarray,
    times_s: np.ndarray,
    rng: np.random.Generator,
    *,
    events_per_second: float = 1.2,
    controls_per_event: tuple[int, int] = (1, 3),
    amount: tuple[float, float] = (0.3, 1.0),
    pick_weights: np.ndarray | None = None,
) -> np.ndarray:
    """Sparse, smooth control curves within bounds.

    lower, upper, defaults: (C,); times_s: (T,) -> (T, C) float64.

    Each event picks 1-3 controls and a target for each, a fraction ``amount`` of the way from the
    default to one of the bounds; the curve is
    ``default + sum_events envelope * (target - default)``,
    clipped to the bounds where overlapping events push the same control the same way.
    ``pick_weights`` (C,) >= 0 makes some controls more likely to be picked (uniform if None).
    """
    lo, hi, d = (np.asarray(a, dtype=np.float64) for a in (lower, upper, defaults))
    c = lo.shape[0]
    t = np.asarray(times_s, dtype=np.float64)
    out = np.broadcast_to(d, (t.shape[0], c)).copy()
    duration = float(t[-1] - t[0]) if t.shape[0] > 1 else 0.0
    n_events = max(1, rng.poisson(events_per_second * max(duration, 1.0)))
    kmin, kmax = controls_per_event
    p = None
    if pick_weights is not None:
        pw = np.asarray(pick_weights, dtype=np.float64)
        if pw.shape != (c,) or np.any(pw < 0) or not pw.sum() > 0:
            raise SynthError(f"pick_weights must be (C,) = ({c},) non-negative, got {pw.shape}")
        p = pw / pw.sum()
    for _ in range(n_events):
        attack, hold, release = (
            rng.uniform(0.12, 0.45),
            rng.uniform(0.0, 0.8),
            rng.uniform(0.15, 0.5),
        )
        start = rng.uniform(t[0] - attack, t[0] + duration - attack)
        env = envelope(t, start, attack, hold, release)
        kcap = min(kmax, c, int(np.count_nonzero(p)) if p is not None else c)
        k = int(rng.integers(min(kmin, kcap), kcap + 1))
        for i in rng.choice(c, size=k, replace=False, p=p):
            room_hi, room_lo = hi[i] - d[i], d[i] - lo[i]
            # Push toward the side with room; pick at random when both sides have it.
            up = room_lo <= 0 or (room_hi > 0 and rng.random() < room_hi / (room_hi + room_lo))
            target = d[i] + rng.uniform(*amount) * (room_hi if up else -room_lo)
            out[:, i] += env * (target - d[i])
    return np.clip(out, lo, hi)


def speech_track(
    times_s: np.ndarray,
    rng: np.random.Generator,
    *,
    syllables_hz: tuple[float, float] = (2.5, 4.0),
    phrase_s: tuple[float, float] = (1.0, 2.5),
    pause_s: tuple[float, float] = (0.25, 0.7),
    amount: tuple[float, float] = (0.3, 0.95),
) -> np.ndarray:
    """times_s: (T,) -> (T,) in [0, 1]: a syllabic opening curve.

    Phrases of ``phrase_s`` seconds, separated by pauses, hold syllables at a rate drawn from
    ``syllables_hz``; each syllable is a raised-cosine bump one syllable long with a peak drawn
    from ``amount``. (A cartoon of speech jaw motion: rates of a few syllables per second are
    common knowledge, no source.)
    """
    t = np.asarray(times_s, dtype=np.float64)
    out = np.zeros_like(t)
    if t.size == 0:
        return out
    now = float(t[0]) + rng.uniform(*pause_s)
    while now < t[-1]:
        end = now + rng.uniform(*phrase_s)
        rate = rng.uniform(*syllables_hz)
        width = 1.0 / rate
        start = now
        while start + width <= end:
            x = (t - start) / width
            bump = np.where((x >= 0) & (x <= 1), 0.5 - 0.5 * np.cos(2 * np.pi * x), 0.0)
            out = np.maximum(out, rng.uniform(*amount) * bump)
            start += width * rng.uniform(0.9, 1.1)
        now = end + rng.uniform(*pause_s)
    return np.clip(out, 0.0, 1.0)


def smooth_noise(
    times_s: np.ndarray, rng: np.random.Generator, n: int, *, max_hz: float
) -> np.ndarray:
    """(T,) -> (T, n): zero-mean, unit-RMS smooth signals, each a sum of 3 random sinusoids below
    ``max_hz``."""
    t = np.asarray(times_s, dtype=np.float64)[:, None, None]
    freq = rng.uniform(0.1, max_hz, size=(1, n, 3))
    phase = rng.uniform(0.0, 2 * np.pi, size=(1, n, 3))
    amp = rng.uniform(0.5, 1.0, size=(1, n, 3))
    s = (amp * np.sin(2 * np.pi * freq * t + phase)).sum(axis=2)
    return s / np.sqrt((amp**2).sum(axis=2) / 2.0)


def blob_field(points: np.ndarray, centres: np.ndarray, radius: float) -> np.ndarray:
    """points (V, 3), centres (K, 3) -> (K, V) Gaussian falloff exp(-|p - c|^2 / (2 r^2))."""
    d2 = ((points[None, :, :] - centres[:, None, :]) ** 2).sum(axis=2)
    return np.exp(-d2 / (2.0 * radius * radius))


def rotation_xyz(angles: np.ndarray) -> np.ndarray:
    """angles (T, 3) radians -> (T, 3, 3) rotation R = Rz @ Ry @ Rx."""
    cx, cy, cz = np.cos(angles).T
    sx, sy, sz = np.sin(angles).T
    r = np.empty((angles.shape[0], 3, 3))
    r[:, 0] = np.stack([cy * cz, sx * sy * cz - cx * sz, cx * sy * cz + sx * sz], axis=1)
    r[:, 1] = np.stack([cy * sz, sx * sy * sz + cx * cz, cx * sy * sz - sx * cz], axis=1)
    r[:, 2] = np.stack([-sy, sx * cy, cx * cy], axis=1)
    return r


def head_motion_poses(
    times_s: np.ndarray, rng: np.random.Generator, centre: np.ndarray, diag: float
) -> np.ndarray:
    """(T,) -> (T, 4, 4) smooth rigid poses: up to ~4 degrees about ``centre`` (3,),
    and up to ~2% of ``diag`` in translation."""
    angles = np.deg2rad(2.0) * smooth_noise(times_s, rng, 3, max_hz=0.4)
    shift = 0.01 * diag * smooth_noise(times_s, rng, 3, max_hz=0.3)
    rot = rotation_xyz(angles)
    pose = np.tile(np.eye(4), (times_s.shape[0], 1, 1))
    pose[:, :3, :3] = rot
    # p' = R (p - c) + c + shift
    pose[:, :3, 3] = centre - np.einsum("tij,j->ti", rot, centre) + shift
    return pose


def pick_off_manifold(frames: int, count: int, rng: np.random.Generator) -> np.ndarray:
    """(frames,) bool with ``count`` isolated frames set, spread out, away from the ends."""
    mask = np.zeros(frames, dtype=bool)
    if count <= 0:
        return mask
    edges = np.linspace(0, frames, count + 1)
    for a, b in itertools.pairwise(edges):
        lo, hi = int(a + 0.25 * (b - a)), int(a + 0.75 * (b - a))
        mask[int(rng.integers(lo, max(hi, lo + 1)))] = True
    return mask


def synth_take(
    rig: Rig,
    *,
    frames: int = 600,
    fps: float = 60.0,
    seed: int = 0,
    noise_sigma: float = 0.001,
    wobble_sigma: float = 0.001,
    off_manifold_frames: int = 4,
    bulge_size: float = 0.03,
    head_motion: bool = False,
    events_per_second: float = 1.2,
    pick_weights: np.ndarray | None = None,
    talk_control: int | None = None,
) -> SynthTake:
    """Make a synthetic take of ``rig``.

    ``noise_sigma``, ``wobble_sigma`` and ``bulge_size`` are fractions of the neutral's bounding-box
    diagonal: per-axis Gaussian noise per vertex and frame, RMS amplitude of the correlated wobble,
    and peak displacement of an off-manifold bulge (or dent). ``pick_weights`` (C,) biases which
    controls the expressions use (e.g. more jaw for a speech-like take).
    """
    if frames < 2:
        raise SynthError(f"frames must be at least 2, got {frames}")
    if not fps > 0:
        raise SynthError(f"fps must be positive, got {fps}")
    for name, value in (
        ("noise_sigma", noise_sigma),
        ("wobble_sigma", wobble_sigma),
        ("bulge_size", bulge_size),
    ):
        if not 0.0 <= value < 1.0:
            raise SynthError(f"{name} is a fraction of the bbox diagonal in [0, 1), got {value}")
    if not 0 <= off_manifold_frames <= frames // 4:
        raise SynthError(
            f"off_manifold_frames must be in [0, frames // 4 = {frames // 4}], "
            f"got {off_manifold_frames}"
        )
    rng = np.random.default_rng(seed)
    schema = rig.schema
    times = np.arange(frames, dtype=np.float64) / fps
    controls = control_trajectories(
        schema.lower,
        schema.upper,
        schema.defaults,
        times,
        rng,
        events_per_second=events_per_second,
        pick_weights=pick_weights,
    )
    if talk_control is not None:
        if not 0 <= talk_control < len(schema):
            raise SynthError(f"talk_control must be a control index in [0, {len(schema)}), "
                             f"got {talk_control}")
        j = talk_control
        talk = speech_track(times, np.random.default_rng(seed + 104_729))
        room = float(schema.upper[j] - schema.defaults[j])
        controls[:, j] = np.clip(controls[:, j] + talk * room, schema.lower[j], schema.upper[j])
    controls = controls.astype(np.float32)
    clean = rig.evaluate(controls)
    neutral = np.asarray(rig.neutral, dtype=np.float64)
    diag = bbox_diagonal(neutral)
    observed = clean.astype(np.float64)

    # Correlated wobble: K smooth blobs, each with its own drifting 3-D amplitude.
    k = 6
    centres = neutral[rng.choice(neutral.shape[0], size=k, replace=False)]
    field = blob_field(neutral, centres, radius=0.2 * diag)  # (K, V)
    amp = smooth_noise(times, rng, 3 * k, max_hz=1.5).reshape(frames, k, 3)  # (T, K, 3)
    # wobble[t, v, :] = sum_k field[k, v] * amp[t, k, :]
    wobble = np.einsum("kv,tkx->tvx", field, amp)
    rms = np.sqrt(np.mean(wobble**2))
    if rms > 0:
        observed += wobble * (wobble_sigma * diag / rms)

    observed += rng.normal(0.0, noise_sigma * diag, size=observed.shape)

    off = pick_off_manifold(frames, off_manifold_frames, rng)
    for t in np.flatnonzero(off):
        centre = clean[t, int(rng.integers(neutral.shape[0]))].astype(np.float64)
        fall = blob_field(observed[t], centre[None], radius=0.06 * diag)[0]  # (V,)
        direction = observed[t] - observed[t].mean(axis=0)
        direction /= np.maximum(np.linalg.norm(direction, axis=1, keepdims=True), 1e-12)
        sign = 1.0 if rng.random() < 0.5 else -1.0
        observed[t] += sign * bulge_size * diag * fall[:, None] * direction

    pose = None
    if head_motion:
        pose = head_motion_poses(times, rng, neutral.mean(axis=0), diag)
        observed = np.einsum("tij,tvj->tvi", pose[:, :3, :3], observed) + pose[:, None, :3, 3]
    log.info(
        "synthetic take: %d frames at %g fps, %d off-manifold, seed %d",
        frames,
        fps,
        int(off.sum()),
        seed,
    )
    return SynthTake(
        controls_true=controls,
        vertices_clean=clean,
        vertices=observed.astype(np.float32),
        times_s=times,
        off_manifold=off,
        head_pose=pose,
        fps=float(fps),
        seed=seed,
    )
