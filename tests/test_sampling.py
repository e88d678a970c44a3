"""Sampling: bounds, sparsity, pairs, determinism, and the two quasi-random designs."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.export.data.sampling import (
    SamplingConfig,
    SamplingError,
    SparsityConfig,
    active_mask,
    chunk_seed,
    map_unit_to_controls,
    sample_chunk,
    sample_controls,
    twin_indices,
)
from rigcast.runtime.schema import Control, ControlSchema
from scipy.stats import poisson


def paired_schema(pairs: int, lo: float = -1.0, hi: float = 1.0, default: float = 0.0):
    controls = []
    for i in range(pairs):
        controls.append(Control(f"lid_{i}_l", lo, hi, default, group="lid", pair=f"lid_{i}_r"))
        controls.append(Control(f"lid_{i}_r", lo, hi, default, group="lid", pair=f"lid_{i}_l"))
    return ControlSchema(tuple(controls))


def unipolar_schema(n: int) -> ControlSchema:
    return ControlSchema(tuple(Control(f"pull_{i}", 0.0, 1.0, 0.0) for i in range(n)))


@st.composite
def schemas(draw):
    n = draw(st.integers(1, 8))
    controls = []
    for i in range(n):
        lo = draw(st.floats(-50, 50, allow_nan=False))
        span = draw(st.floats(1e-3, 100, allow_nan=False))
        hi = float(lo + span)
        where = draw(st.sampled_from(["lo", "hi", "inside"]))
        t = draw(st.floats(0.01, 0.99))
        default = {"lo": lo, "hi": hi, "inside": lo + t * span}[where]
        controls.append(Control(f"k{i}", float(lo), hi, float(default)))
    if n >= 2 and draw(st.booleans()):
        controls[0] = Control("k0", controls[0].minimum, controls[0].maximum,
                              controls[0].default, pair="k1")
    return ControlSchema(tuple(controls))


sparsities = st.builds(
    lambda lo, extra, frac, p, dense, neutral: SparsityConfig(
        mean_active=lo + frac * extra, min_active=lo, max_active=max(1, lo + extra),
        pair_probability=p, dense_fraction=dense, neutral_fraction=neutral * (1 - dense)),
    st.integers(0, 3), st.integers(1, 6), st.floats(0.01, 1.0), st.floats(0, 1),
    st.floats(0, 1), st.floats(0, 1),
)


@settings(max_examples=60, deadline=None)
@given(schemas(), st.integers(0, 70), sparsities, st.integers(0, 2**32),
       st.sampled_from(["sobol", "lhs"]))
def test_samples_stay_within_bounds(schema, n, sparsity, seed, method):
    x = sample_controls(schema, n, sparsity=sparsity, seed=seed, method=method)
    assert x.shape == (n, len(schema)) and x.dtype == np.float32
    assert np.all(np.isfinite(x))
    assert np.all(x >= schema.lower) and np.all(x <= schema.upper)


def test_mean_active_count_matches_the_clipped_poisson_mean():
    schema = paired_schema(20)
    sp = SparsityConfig(mean_active=4.0, min_active=1, max_active=10, pair_probability=0.5,
                        dense_fraction=0.1, neutral_fraction=0.05)
    x = sample_controls(schema, 8000, sparsity=sp, seed=3)
    active = (x != schema.defaults).sum(axis=1)
    dense, neutral = active == len(schema), active == 0
    assert abs(dense.mean() - 0.1) < 0.015
    assert abs(neutral.mean() - 0.05) < 0.01
    sparse = active[~dense & ~neutral]
    assert sparse.min() >= 1 and sparse.max() <= 10
    # Expected count: E[clip(K, 1, 10)] with K ~ Poisson(4), from scipy.stats.poisson's pmf.
    k = np.arange(0, 60)
    expected = float(np.sum(np.clip(k, 1, 10) * poisson.pmf(k, 4.0)))
    stderr = sparse.std() / np.sqrt(sparse.size)
    assert abs(sparse.mean() - expected) < 4 * stderr
    # Most of each sparse pose stays exactly at default.
    at_default = (x[~dense & ~neutral] == schema.defaults).mean()
    assert abs(at_default - (1 - expected / len(schema))) < 0.01


def test_pairs_are_activated_together():
    schema = paired_schema(10)
    twin = twin_indices(schema)
    rng = np.random.default_rng(0)

    def twin_rate(p: float) -> float:
        sp = SparsityConfig(mean_active=4, min_active=4, max_active=4, pair_probability=p,
                            dense_fraction=0, neutral_fraction=0)
        mask = active_mask(schema, 2000, sparsity=sp, rng=rng)
        assert np.all(mask.sum(axis=1) == 4)
        return float((mask & mask[:, twin]).sum() / mask.sum())

    assert twin_rate(1.0) == 1.0
    # With p = 0 a twin is active only by chance: about 3 other actives among 19 controls.
    assert abs(twin_rate(0.0) - 3 / 19) < 0.03


def test_twin_indices_are_symmetric_when_declared_one_way():
    schema = ControlSchema((Control("a", 0, 1, 0, pair="b"), Control("b", 0, 1, 0),
                            Control("c", 0, 1, 0)))
    assert twin_indices(schema).tolist() == [1, 0, -1]


def test_bipolar_controls_spread_on_both_sides():
    schema = ControlSchema((Control("tilt", -0.25, 1.0, 0.0), Control("open", 0.0, 1.0, 0.0)))
    sp = SparsityConfig(mean_active=2, min_active=2, max_active=2, dense_fraction=0,
                        neutral_fraction=0)
    x = sample_controls(schema, 1024, sparsity=sp, seed=1)
    tilt = x[:, 0]
    assert abs((tilt < 0).mean() - 0.5) < 0.01 and abs((tilt > 0).mean() - 0.5) < 0.01
    assert tilt.min() < -0.2 and tilt.max() > 0.95
    assert x[:, 1].min() >= 0


def test_map_unit_to_controls_hits_the_ends_and_the_default():
    u = np.array([[0.0, 0.0], [0.5, 0.5], [1.0, 1.0]])
    out = map_unit_to_controls(u, np.array([-2.0, 1.0]), np.array([4.0, 3.0]),
                               np.array([0.0, 1.0]))
    np.testing.assert_allclose(out, [[-2.0, 1.0], [0.0, 2.0], [4.0, 3.0]])


@pytest.mark.parametrize("method", ["sobol", "lhs"])
def test_designs_stratify_every_control(method):
    # Latin hypercube (McKay, Beckman & Conover 1979): each 1-D projection has one point per
    # stratum of width 1/n. A scrambled Sobol' set of 2**m points is a (0, m, 1)-net in each
    # coordinate (Owen scrambling keeps the net property), so it has the same property.
    n, schema = 64, unipolar_schema(5)
    sp = SparsityConfig(dense_fraction=1.0, neutral_fraction=0.0)
    x = sample_controls(schema, n, sparsity=sp, seed=11, method=method)
    for col in x.T:
        strata = np.minimum(np.floor(col.astype(np.float64) * n), n - 1).astype(int)
        assert sorted(strata) == list(range(n))


def test_same_seed_same_samples_other_seed_other_samples():
    schema, sp = paired_schema(6), SparsityConfig()
    a = sample_controls(schema, 200, sparsity=sp, seed=5)
    b = sample_controls(schema, 200, sparsity=sp, seed=5)
    c = sample_controls(schema, 200, sparsity=sp, seed=6)
    d = sample_controls(schema, 200, sparsity=sp, seed=5, method="lhs")
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c) and not np.array_equal(a, d)


def test_chunks_depend_only_on_seed_and_index():
    schema = paired_schema(4)
    small = SamplingConfig(count=100, chunk_size=32, seed=2)
    big = SamplingConfig(count=1000, chunk_size=32, seed=2)
    assert np.array_equal(sample_chunk(schema, small, 1), sample_chunk(schema, big, 1))
    assert not np.array_equal(sample_chunk(schema, big, 1), sample_chunk(schema, big, 2))
    assert sample_chunk(schema, small, 3).shape == (4, len(schema))
    assert chunk_seed(2, 1) != chunk_seed(1, 2)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"count": 0}, "count"),
        ({"chunk_size": 0}, "chunk_size"),
        ({"seed": -1}, "seed"),
        ({"method": "grid"}, "method"),
        ({"count": True}, "count"),
    ],
)
def test_bad_sampling_config_names_the_field(kwargs, field):
    with pytest.raises(SamplingError, match=field):
        SamplingConfig(**kwargs)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"mean_active": 0.0, "min_active": 0}, "mean_active"),
        ({"mean_active": 9.0}, "mean_active"),
        ({"min_active": 5, "max_active": 2, "mean_active": 3}, "min_active"),
        ({"pair_probability": 1.5}, "pair_probability"),
        ({"dense_fraction": 0.7, "neutral_fraction": 0.7}, "dense_fraction"),
        ({"neutral_fraction": -0.1}, "neutral_fraction"),
    ],
)
def test_bad_sparsity_names_the_field(kwargs, field):
    with pytest.raises(SamplingError, match=field):
        SparsityConfig(**kwargs)


def test_config_round_trips_through_a_dict():
    cfg = SamplingConfig(count=77, chunk_size=9, method="lhs", seed=4,
                         sparsity=SparsityConfig(mean_active=2.5, pair_probability=0.1))
    assert SamplingConfig.from_dict(cfg.to_dict()) == cfg
    with pytest.raises(SamplingError, match="bad sampling config"):
        SamplingConfig.from_dict({"count": 3, "colour": "red"})
