"""The per-frame pieces of the live pipeline against their plain twins."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.runtime.align import RigidTransform
from rigcast.runtime.pipeline import gather, transform_subset
from scipy.spatial.transform import Rotation


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1), scale=st.floats(0.5, 2.0))
def test_transform_subset_equals_apply_on_the_gathered_rows(seed: int, scale: float) -> None:
    rng = np.random.default_rng(seed)
    vertices = rng.normal(size=(500, 3)).astype(np.float32)
    indices = rng.choice(500, size=64, replace=False)
    pose = RigidTransform(Rotation.random(random_state=rng).as_matrix(),
                          rng.normal(size=3), scale)
    out = np.full((64, 3), np.nan, np.float32)
    got = transform_subset(vertices, indices, pose, out)
    assert got is out
    # Twin: apply the transform row by row in float64.
    want = np.array([scale * (pose.rotation @ vertices[i].astype(np.float64)) + pose.translation
                     for i in indices])
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5)
    np.testing.assert_array_equal(gather(vertices, indices, np.empty((64, 3), np.float32)),
                                  vertices[indices])
