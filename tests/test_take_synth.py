"""The synthetic take generator: bounds, smoothness, sparsity, noise, determinism, head motion."""

from __future__ import annotations

import numpy as np
import pytest
from rigcast.export.quality.metrics import active_controls, jitter
from rigcast.export.quality.take_synth import (
    SynthError,
    bbox_diagonal,
    envelope,
    rotation_xyz,
    smoothstep,
    speech_track,
    synth_take,
)
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.schema import Control, ControlSchema


class SmallRig(Rig):
    """A 12-control blendshape rig on a 10 x 10 grid, with one product corrective."""

    def __init__(self) -> None:
        rng = np.random.default_rng(3)
        g = np.stack(np.meshgrid(np.linspace(0, 1, 10), np.linspace(0, 1, 10)), -1).reshape(-1, 2)
        self.name = "small"
        self.neutral = np.concatenate([g, np.zeros((100, 1))], axis=1).astype(np.float32)
        self.faces = np.zeros((0, 3), dtype=np.int32)
        ctrls = [Control(f"shape_{i}", 0.0, 1.0, 0.0) for i in range(10)]
        ctrls += [Control("tilt", -1.0, 1.0, 0.0), Control("squash", -0.5, 2.0, 0.5)]
        self.schema = ControlSchema(tuple(ctrls))
        self.shapes = rng.normal(0, 0.05, size=(12, 100, 3))

    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        w = controls
        out = self.neutral[None] + np.einsum("bc,cvx->bvx", w, self.shapes)
        return out + (w[:, 0] * w[:, 1])[:, None, None] * self.shapes[2][None]


@pytest.fixture(scope="module")
def rig() -> SmallRig:
    return SmallRig()


def test_smoothstep_matches_its_formula() -> None:
    # smoothstep(x) = 3x^2 - 2x^3 on [0, 1] (the GLSL definition), flat outside.
    x = np.array([-1.0, 0.0, 0.25, 0.5, 0.75, 1.0, 2.0])
    expected = np.array([0.0, 0.0, 0.15625, 0.5, 0.84375, 1.0, 1.0])
    np.testing.assert_allclose(smoothstep(x), expected)
    t = np.linspace(0, 3, 301)
    e = envelope(t, start=0.5, attack=0.5, hold=1.0, release=0.5)
    assert e[t <= 0.5].max() == 0.0
    assert np.all(e[(t >= 1.0) & (t <= 2.0)] == 1.0)
    assert e[t >= 2.5].max() == 0.0


def test_take_is_within_bounds_smooth_sparse_and_from_the_real_rig(rig: SmallRig) -> None:
    take = synth_take(
        rig, frames=600, fps=60, seed=1, noise_sigma=0.0, wobble_sigma=0.0, off_manifold_frames=0
    )
    lo, hi, d = rig.schema.lower, rig.schema.upper, rig.schema.defaults
    w = take.controls_true
    assert w.shape == (600, 12) and take.vertices.shape == (600, 100, 3)
    assert np.all(w >= lo) and np.all(w <= hi)
    np.testing.assert_array_equal(take.vertices_clean, rig.evaluate(w))
    np.testing.assert_allclose(take.vertices, take.vertices_clean, atol=1e-6)
    active = active_controls(w, d, lo, hi)
    assert 0.5 < active.mean() < 0.5 * 12
    assert len(np.unique(np.flatnonzero(np.abs(w - d).max(axis=0) > 0.01))) >= 6
    # Eased curves at 60 fps: second differences far below those of white noise in the bounds.
    assert jitter(w, lo, hi) < 0.01
    np.testing.assert_allclose(take.times_s[1] - take.times_s[0], 1 / 60)


def test_noise_level_and_off_manifold_frames(rig: SmallRig) -> None:
    take = synth_take(
        rig, frames=400, seed=2, noise_sigma=0.01, wobble_sigma=0.0, off_manifold_frames=3
    )
    diag = bbox_diagonal(rig.neutral)
    resid = take.vertices - take.vertices_clean
    clean_frames = ~take.off_manifold
    sd = resid[clean_frames].std()
    assert abs(sd - 0.01 * diag) < 0.05 * 0.01 * diag
    assert take.off_manifold.sum() == 3
    peak = np.linalg.norm(resid, axis=-1).max(axis=1)
    assert np.all(peak[take.off_manifold] > 0.02 * diag)  # the bulge is 3% of the diagonal
    quiet = synth_take(
        rig, frames=400, seed=2, noise_sigma=0.001, wobble_sigma=0.0, off_manifold_frames=3
    )
    peak = np.linalg.norm(quiet.vertices - quiet.vertices_clean, axis=-1).max(axis=1)
    assert np.all(peak[quiet.off_manifold] > 2 * peak[~quiet.off_manifold].max())


def test_wobble_is_low_frequency(rig: SmallRig) -> None:
    take = synth_take(
        rig, frames=600, seed=4, noise_sigma=0.0, wobble_sigma=0.01, off_manifold_frames=0
    )
    resid = (take.vertices - take.vertices_clean).astype(np.float64)
    rms = np.sqrt(np.mean(resid**2))
    assert 0.005 * bbox_diagonal(rig.neutral) < rms
    step = np.sqrt(np.mean(np.diff(resid, axis=0) ** 2))
    assert step < 0.2 * rms  # white noise would give sqrt(2) * rms


def test_same_seed_same_take_other_seed_other_take(rig: SmallRig) -> None:
    a = synth_take(rig, frames=100, seed=7)
    b = synth_take(rig, frames=100, seed=7)
    c = synth_take(rig, frames=100, seed=8)
    np.testing.assert_array_equal(a.vertices, b.vertices)
    assert not np.array_equal(a.controls_true, c.controls_true)


def test_head_motion_is_rigid_and_applied(rig: SmallRig) -> None:
    take = synth_take(
        rig,
        frames=200,
        seed=5,
        noise_sigma=0.0,
        wobble_sigma=0.0,
        off_manifold_frames=0,
        head_motion=True,
    )
    pose = take.head_pose
    assert pose is not None and pose.shape == (200, 4, 4)
    r = pose[:, :3, :3]
    np.testing.assert_allclose(
        np.einsum("tji,tjk->tik", r, r), np.tile(np.eye(3), (200, 1, 1)), atol=1e-12
    )
    np.testing.assert_allclose(np.linalg.det(r), 1.0, atol=1e-12)
    moved = np.einsum("tij,tvj->tvi", r, take.vertices_clean) + pose[:, None, :3, 3]
    np.testing.assert_allclose(take.vertices, moved, atol=1e-5)
    angle = np.degrees(np.arccos(np.clip((np.trace(r, axis1=1, axis2=2) - 1) / 2, -1, 1)))
    assert 0.1 < angle.max() < 10.0


def test_rotation_matches_scipy() -> None:
    from scipy.spatial.transform import Rotation  # outside reference: SciPy's extrinsic "xyz"

    angles = np.random.default_rng(0).uniform(-1, 1, size=(5, 3))
    expected = Rotation.from_euler("xyz", angles).as_matrix()
    np.testing.assert_allclose(rotation_xyz(angles), expected, atol=1e-12)


def test_pick_weights_choose_the_controls(rig: SmallRig) -> None:
    weights = np.zeros(12)
    weights[[3, 10]] = 1.0
    take = synth_take(rig, frames=300, seed=9, pick_weights=weights)
    moved = np.flatnonzero(np.abs(take.controls_true - rig.schema.defaults).max(axis=0) > 0)
    assert set(moved) == {3, 10}
    with pytest.raises(SynthError, match="pick_weights"):
        synth_take(rig, frames=300, pick_weights=-weights)


@pytest.mark.parametrize(
    ("kwargs", "word"),
    [
        ({"frames": 1}, "frames"),
        ({"fps": 0.0}, "fps"),
        ({"noise_sigma": -0.1}, "noise_sigma"),
        ({"off_manifold_frames": 50, "frames": 100}, "off_manifold_frames"),
    ],
)
def test_bad_parameters_are_named(rig: SmallRig, kwargs: dict, word: str) -> None:
    with pytest.raises(SynthError, match=word):
        synth_take(rig, **kwargs)


def test_speech_track_is_syllabic_bounded_and_pauses() -> None:
    t = np.arange(600) / 60.0
    talk = speech_track(t, np.random.default_rng(1))
    assert talk.min() >= 0.0 and talk.max() <= 1.0 and talk.max() > 0.3
    # Syllables at 2.5-4 Hz: the opening crosses half its peak several times per second of
    # speech, and there are pauses (runs of closed frames) between phrases.
    opened = talk > 0.15
    rises = np.count_nonzero(opened[1:] & ~opened[:-1])
    assert 10 * 1.0 <= rises <= 10 * 4.5
    closed_runs = np.diff(np.flatnonzero(np.diff(opened.astype(int)) != 0))
    assert closed_runs.max() >= 0.25 * 60 * 0.9


def test_talk_control_moves_only_that_control_and_leaves_the_rest_of_the_take() -> None:
    rig = SmallRig()
    plain = synth_take(rig, frames=240, seed=5)
    talky = synth_take(rig, frames=240, seed=5, talk_control=3)
    others = [i for i in range(rig.control_count) if i != 3]
    np.testing.assert_array_equal(plain.controls_true[:, others], talky.controls_true[:, others])
    assert np.all(talky.controls_true[:, 3] >= plain.controls_true[:, 3])
    assert talky.controls_true[:, 3].max() > 0.3
    with pytest.raises(SynthError, match="talk_control"):
        synth_take(rig, frames=240, talk_control=99)
