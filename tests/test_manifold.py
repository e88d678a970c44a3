"""Off-manifold detection: the vectorised thresholds, the live tracker and the definition agree;
planted off-manifold frames of a synthetic take are found by a real batch solve."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from rigcast.export.bundling.synthetic_bundle import build_synthetic_bundle, make_synthetic_rig
from rigcast.export.quality.take_synth import synth_take
from rigcast.runtime.bundle import load_bundle
from rigcast.runtime.solve.batch import SolveOptions, solve_take
from rigcast.runtime.solve.manifold import (
    ManifoldConfig,
    ManifoldError,
    ManifoldTracker,
    floor_for_bundle,
    off_manifold_thresholds,
    off_manifold_thresholds_naive,
    robust_threshold,
    training_fit_error,
)

CONFIGS = [
    ManifoldConfig(),
    ManifoldConfig(k=3.0, window=50, every=7, warmup=10, floor=0.0),
    ManifoldConfig(k=4.0, window=20, every=1, warmup=20, floor=1.2),
    ManifoldConfig(k=2.0, window=5, every=3, warmup=1, floor=0.0),
]


def _series(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = np.abs(rng.normal(1.0, 0.1, n)) + np.linspace(0.0, 0.5, n)  # noise on a slow drift
    x[rng.choice(n, min(n, 8), replace=False)] += 3.0  # spikes
    x[rng.choice(n, n // 10, replace=False)] = np.nan  # fit error not computed there
    return x


@pytest.mark.parametrize("config", CONFIGS)
@pytest.mark.parametrize("n", [3, 40, 700, 1500])
def test_vectorised_thresholds_equal_the_definition_and_the_tracker(
    config: ManifoldConfig, n: int
) -> None:
    x = _series(n, seed=n)
    fast = off_manifold_thresholds(x, config)
    slow = off_manifold_thresholds_naive(x, config)
    np.testing.assert_array_equal(np.isnan(fast), np.isnan(x))
    np.testing.assert_allclose(fast, slow, rtol=1e-12)
    tracker = ManifoldTracker(config)
    flags, used = [], []
    for v in x:
        flags.append(tracker.update(float(v)))
        used.append(tracker.threshold if math.isfinite(v) else math.nan)
    np.testing.assert_allclose(np.array(used), slow, rtol=1e-12)
    with np.errstate(invalid="ignore"):
        np.testing.assert_array_equal(np.array(flags), x > slow)
    assert tracker.flagged == int(np.sum(flags))
    assert tracker.count == int(np.isfinite(x).sum())


def test_tracker_flags_spikes_after_warm_up_and_follows_a_new_level() -> None:
    config = ManifoldConfig(k=5.0, window=100, every=10, warmup=20)
    tracker = ManifoldTracker(config)
    rng = np.random.default_rng(1)
    level = 1.0 + 0.01 * rng.normal(size=600)
    level[300:] += 1.0  # the stream's noise floor rises for good (new sensor, new lighting)
    spikes = {50, 150, 250, 450, 550}
    flagged = []
    for i, v in enumerate(level):
        if tracker.update(float(v + (0.5 if i in spikes else 0.0))):
            flagged.append(i)
    assert spikes <= set(flagged)
    # the level change is flagged only until the window has taken it in, not for ever
    assert all(i in spikes or 300 <= i < 400 for i in flagged)
    assert 0.0 < tracker.threshold - 2.0 < 0.2
    assert not ManifoldTracker(config).update(100.0)  # nothing is flagged during warm-up
    tracker.reset()
    assert tracker.count == 0 and tracker.threshold == math.inf


def test_floor_holds_when_the_fit_error_barely_varies() -> None:
    x = np.full(200, 1e-6)
    x[150] = 2e-6  # twice the usual, but far below anything that matters
    assert not (x > off_manifold_thresholds(x, ManifoldConfig(floor=1e-4))).any()
    assert (x > off_manifold_thresholds(x, ManifoldConfig(floor=0.0)))[150]
    assert robust_threshold(np.array([1.0, 1.0, 1.0]), 6.0, 0.5) == 1.0


def test_floor_comes_from_the_training_fit_error() -> None:
    neutral = np.array([[0.0, 0.0, 0.0], [3.0, 4.0, 0.0]])
    assert training_fit_error({"training": {"inverse_fit_rms": 0.002}}) == 0.002
    assert training_fit_error({"training": {"inverse": {"mean_err": 0.0003}}}) == 0.0003
    assert floor_for_bundle({"training": {"inverse_fit_rms": 0.002}}, neutral) == pytest.approx(0.006)
    assert floor_for_bundle({}, neutral) == pytest.approx(0.005)  # 0.1% of the diagonal 5


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"k": 0.0}, "k must be"), ({"window": 0}, "window"), ({"every": 0}, "every"),
    ({"warmup": 700}, "warmup"), ({"floor": -1.0}, "floor"), ({"k": math.inf}, "k must be"),
])
def test_bad_settings_are_refused_by_name(kwargs: dict[str, float], match: str) -> None:
    with pytest.raises(ManifoldError, match=match):
        ManifoldConfig(**kwargs)  # type: ignore[arg-type]
    with pytest.raises(ManifoldError, match=r"\(T,\)"):
        off_manifold_thresholds(np.zeros((3, 2)))


def test_planted_off_manifold_frames_are_found_in_a_batch_solve(tmp_path: Path) -> None:
    """Synthetic takes (export/quality/take_synth.py) with sensor noise, head motion and bulges on a few
    isolated frames, solved in batch with the detector's defaults: most bulges are flagged, few
    clean frames are. (The take's correlated wobble is off here: on this small sheet its peaks
    reach the bulges' level of max error; the demo face is where the defaults were tuned.)"""
    path = build_synthetic_bundle(tmp_path / "s.rcb", vertices=900, controls=8, inputs=120,
                                  stable=40, seed=0, inverse="lstsq", fit_rms=1e-4)
    bundle = load_bundle(path)
    rig = make_synthetic_rig(900, 8, inputs=120, stable=40, seed=0)
    hits = false = planted = frames = 0
    for seed in (1, 2, 3):
        take = synth_take(rig, frames=900, fps=60.0, seed=seed,  # type: ignore[arg-type]
                          head_motion=True, wobble_sigma=0.0, off_manifold_frames=6)
        for mode in ("subset", "full"):
            options = SolveOptions(filter="causal", fit_error_scope=mode, fit_sample=200)
            result = solve_take(bundle, take.vertices, take.times_s, options)
            assert result.fit_error_scope == mode
            hits += int((result.off_manifold & take.off_manifold).sum())
            false += int((result.off_manifold & ~take.off_manifold).sum())
            planted += int(take.off_manifold.sum())
            frames += take.frames
    assert planted == 36
    assert hits >= 0.8 * planted, (hits, planted)
    assert false <= 0.005 * frames, false
