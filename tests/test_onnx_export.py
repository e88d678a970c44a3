"""ONNX export: onnx.checker, the pinned opset, and onnxruntime-vs-torch parity within 1e-4."""

from __future__ import annotations

import numpy as np
import onnx
import pytest
import torch
from rigcast.export.bundling import onnx_export
from rigcast.export.training.models import ForwardApproximator, InverseNetwork
from rigcast.runtime.bundle import FORWARD_INPUT, FORWARD_OUTPUT, INVERSE_INPUT, INVERSE_OUTPUT


def small_forward(seed: int = 0) -> ForwardApproximator:
    rng = np.random.default_rng(seed)
    v, c, p = 30, 5, 6
    basis = np.linalg.qr(rng.standard_normal((3 * v, p)))[0].T
    model = ForwardApproximator(
        rng.standard_normal((v, 3)),
        -np.ones(c),
        2 * np.ones(c),
        0.1 * rng.standard_normal((c, 3 * v)),
        0.01 * rng.standard_normal(3 * v),
        basis,
        hidden=(16, 16),
    )
    with torch.no_grad():  # a non-zero correction, so the MLP path is exercised
        for prm in model.parameters():
            prm.add_(0.05 * torch.randn_like(prm))
    return model.eval()


def small_inverse(seed: int = 0) -> InverseNetwork:
    rng = np.random.default_rng(seed)
    lo = np.array([0.0, -1.0, 0.0, 2.0])
    hi = np.array([1.0, 1.0, 10.0, 3.0])
    return InverseNetwork(
        rng.standard_normal((12, 3)), 0.05, lo, hi, np.array([0.0, 0.0, 5.0, 3.0]), hidden=(32, 32)
    ).eval()


def run(data: bytes, x: np.ndarray) -> np.ndarray:
    sess = onnx_export.session(data)
    return sess.run(None, {sess.get_inputs()[0].name: x.astype(np.float32)})[0]


def test_inverse_graph_checks_and_matches_torch() -> None:
    model = small_inverse()
    data, worst = onnx_export.export_inverse(model)
    proto = onnx.load_from_string(data)
    onnx.checker.check_model(proto, full_check=True)  # ONNX's own validator
    assert [o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")] == [
        onnx_export.OPSET
    ]
    assert [i.name for i in proto.graph.input] == [INVERSE_INPUT]
    assert [o.name for o in proto.graph.output] == [INVERSE_OUTPUT]
    assert worst <= onnx_export.PARITY_TOL
    rng = np.random.default_rng(1)
    for n in (1, 7, 50):  # dynamic batch, including 1 and 7
        x = model.neutral_inputs.numpy().reshape(12, 3) + 0.05 * rng.standard_normal((n, 12, 3))
        with torch.no_grad():
            ref = model(torch.from_numpy(x.astype(np.float32))).numpy()
        got = run(data, x)
        assert got.shape == (n, 4)
        assert np.max(np.abs(got - ref)) <= 1e-4


def test_forward_graph_checks_and_matches_torch() -> None:
    model = small_forward()
    data, _ = onnx_export.export_forward(model)
    proto = onnx_export.check_graph(data, "forward")
    assert [i.name for i in proto.graph.input] == [FORWARD_INPUT]
    assert [o.name for o in proto.graph.output] == [FORWARD_OUTPUT]
    rng = np.random.default_rng(2)
    for n in (1, 7):
        c = rng.uniform(-1, 2, (n, 5)).astype(np.float32)
        with torch.no_grad():
            ref = model(torch.from_numpy(c)).numpy()
        got = run(data, c)
        assert got.shape == (n, 30, 3)
        assert np.max(np.abs(got - ref)) <= 1e-4


def test_exported_inverse_stays_in_bounds_for_extreme_meshes() -> None:
    model = small_inverse()
    data, _ = onnx_export.export_inverse(model)
    x = np.concatenate([np.full((1, 12, 3), s) for s in (-1e6, -10.0, 0.0, 10.0, 1e6)])
    got = run(data, x)
    assert np.all(got >= model.lower.numpy()) and np.all(got <= model.upper.numpy())


def test_wrong_opset_is_rejected() -> None:
    data, _ = onnx_export.export_forward(small_forward())
    proto = onnx.load_from_string(data)
    proto.opset_import[0].version = onnx_export.OPSET + 1
    with pytest.raises(onnx_export.ExportError, match="opset"):
        onnx_export.check_graph(proto.SerializeToString(), "forward")


def test_parity_failure_raises() -> None:
    model = small_inverse()
    data, _ = onnx_export.export_inverse(model)
    other = small_inverse(seed=3)  # different neutral: the graph no longer matches this module
    x = [np.zeros((2, 12, 3), np.float32)]
    with torch.no_grad():
        for prm in other.parameters():
            prm.add_(1.0)
    with pytest.raises(onnx_export.ExportError, match="differs from torch"):
        onnx_export.check_parity(other, data, x, "inverse")


def test_export_emits_no_warnings(recwarn: pytest.WarningsRecorder) -> None:
    onnx_export.export_inverse(small_inverse())
    assert not [str(w.message) for w in recwarn]
