"""The forward model's anchored linear layer (export/training/train_forward.py ``fit_anchored``).

On a rig with corrective shapes, least squares on sparse random poses folds the average of each
control's correctives into its own shape, so the forward model misstated a control alone (on the
demo face five expressions came back 6-8 % short of full). The anchored layer passes through the
rest pose and each control alone, exactly.
"""

from __future__ import annotations

import numpy as np
from rigcast.export.data.sampling import SparsityConfig, anchor_poses, sample_controls
from rigcast.export.training.train_forward import fit_anchored, fit_linear
from rigcast.runtime.schema import Control, ControlSchema


def _schema(c: int) -> ControlSchema:
    return ControlSchema(tuple(Control(f"shape_{i}", 0.0, 1.0, 0.0) for i in range(c)))


def test_anchored_layer_is_exact_for_each_control_alone_where_least_squares_is_not() -> None:
    rng = np.random.default_rng(0)
    c, d = 6, 30
    own = rng.normal(size=(c, d))  # each control's own shape
    pairs = [(0, 1), (2, 3), (1, 4)]
    corrective = {p: rng.normal(size=d) for p in pairs}  # products of two weights

    def rig(u: np.ndarray) -> np.ndarray:
        out = u @ own
        for (a, b), shape in corrective.items():
            out += (u[:, a] * u[:, b])[:, None] * shape[None]
        return out

    schema = _schema(c)
    anchors = anchor_poses(schema)
    assert anchors.shape == (c + 1, c) and (anchors[0] == 0).all()
    np.testing.assert_array_equal(anchors[1:], np.eye(c))  # each alone at its far bound
    w, b = fit_anchored(anchors, rig(anchors.astype(np.float64)))
    np.testing.assert_allclose(w, own, atol=1e-5)  # the control's own shape, nothing folded in
    np.testing.assert_allclose(b, 0.0, atol=1e-6)
    samples = sample_controls(schema, 2000, sparsity=SparsityConfig(), seed=1)
    w_lsq, _ = fit_linear(samples, rig(samples.astype(np.float64)).astype(np.float32))
    # least squares (the layer before) misstates the controls that take part in correctives
    assert np.abs(w_lsq[1] - own[1]).max() > 0.05 * np.abs(own[1]).max()
    # a control that does not move gets a zero shape, not a division by zero
    flat = rig(anchors.astype(np.float64))
    flat[3] = flat[0]
    w0, _ = fit_anchored(anchors, flat)
    assert np.all(np.isfinite(w0)) and np.abs(w0[2]).max() == 0.0
