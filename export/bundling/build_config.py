"""The build's configuration, result, error and small shared pieces.

Split from export/bundling/build.py so the later stages (build_finish, take_fit) import them without
importing the build itself: build.py re-exports every name here, so callers keep one import.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
from rigcast.export.data.sampling import SparsityConfig
from rigcast.runtime.errors import RigcastError

import rigcast

Progress = Callable[[str, int, int], None]
CHECKPOINT = "checkpoint.pt"
BUNDLE_NAME = "bundle.rcb"
_CHECK_SEED_OFFSET = 7919
#: Largest RMS motion of the stable vertices, as a share of the diagonal, for a rigid region.
RIGID_LIMIT = 1e-5


class BuildError(RigcastError, RuntimeError):
    """A build could not run or its result failed a check; the message names the stage."""

    advice = "check the build options; `rigcast build --help` lists them"


def _forward_default() -> Any:
    from rigcast.export.training.train import ForwardConfig

    return ForwardConfig()


def _inverse_default() -> Any:
    from rigcast.export.training.train import InverseConfig

    return InverseConfig()


def _take_default() -> Any:
    from rigcast.export.training.train import InverseConfig

    return InverseConfig(steps=800, lr=5e-4, supervised=0.0, fresh_fraction=0.0)


@dataclass(frozen=True)
class BuildConfig:
    """Everything a build depends on (and so everything its cache key covers).

    ``region_weights``: (vertex index, weight) pairs for the inverse's mesh loss; unlisted
    vertices weigh 1. ``input_count`` / ``stable_count``: K and S, None for the size-based
    defaults of ``reduction``. ``mode="take"`` fine-tunes on frames from ``take_path`` (.npy of
    (T, V, 3), or the first array of an .npz) or the ``frames`` given to ``build_bundle``.
    ``workers`` / ``scheduler`` choose the sampling executor (see ``executor.make_executor``).
    """

    samples: int = 16000
    sparsity: SparsityConfig = field(default_factory=SparsityConfig)
    seed: int = 0
    forward: Any = field(default_factory=_forward_default)  # train.ForwardConfig
    inverse: Any = field(default_factory=_inverse_default)  # train.InverseConfig
    take: Any = field(default_factory=_take_default)  # train.InverseConfig for take mode
    input_count: int | None = None
    stable_count: int | None = None
    region_weights: tuple[tuple[int, float], ...] | None = None
    mode: Literal["general", "take"] = "general"
    take_path: str | None = None
    check_samples: int = 256
    workers: int | None = None
    scheduler: str | None = None

    def __post_init__(self) -> None:
        if self.mode not in ("general", "take"):
            raise BuildError(f"build mode must be 'general' or 'take', got {self.mode!r}")
        if self.samples < 16:
            raise BuildError(f"samples must be at least 16, got {self.samples}")
        if self.check_samples < 1:
            raise BuildError(f"check_samples must be at least 1, got {self.check_samples}")

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def key_dict(self) -> dict[str, Any]:
        """The parts that change the result (not where it runs)."""
        d = self.to_dict()
        for k in ("workers", "scheduler"):
            d.pop(k)
        return d


@dataclass(frozen=True)
class BuildResult:
    bundle_path: Path
    forward: Any  # train.ForwardReport
    inverse: Any  # train.InverseReport
    timings: Mapping[str, float]
    seconds: float
    key: str
    cached: bool
    check_mean_err: float  # real-rig vertex error of the bundle's solve on held-out poses
    check_mean_err_pct_diag: float
    checkpoint: Path | None = field(default=None, compare=False)
    forward_model: Any = field(default=None, compare=False, repr=False)
    inverse_model: Any = field(default=None, compare=False, repr=False)
    # build_check.ServedCheck as a dict: the served solve beside lsq_linear, recoverability
    reference: Mapping[str, Any] | None = field(default=None, compare=False)


def build_key(rig_fingerprint: str, config: BuildConfig) -> str:
    h = hashlib.sha256(f"rigcast-build/{rigcast.__version__}/{rig_fingerprint}/".encode())
    h.update(json.dumps(config.key_dict(), sort_keys=True, default=str).encode())
    return h.hexdigest()[:16]


def region_weight_array(
    vertex_count: int, pairs: tuple[tuple[int, float], ...] | None
) -> np.ndarray | None:
    """(V,) float64 weights: 1 except at the listed (index, weight) pairs; None if no pairs."""
    if not pairs:
        return None
    w = np.ones(vertex_count)
    for idx, weight in pairs:
        if not 0 <= int(idx) < vertex_count:
            raise BuildError(f"region weight vertex {idx} is outside 0..{vertex_count - 1}")
        w[int(idx)] = float(weight)
    return w


def load_frames(path: str | Path) -> np.ndarray:
    """(T, V, 3) float32 frames from .npy, or the first array of an .npz."""
    p = Path(path)
    try:
        data = np.load(p, allow_pickle=False)
        arr = data[data.files[0]] if isinstance(data, np.lib.npyio.NpzFile) else data
    except (OSError, ValueError, IndexError) as exc:
        raise BuildError(f"take {p} could not be read as .npy/.npz frames: {exc}") from None
    arr = np.asarray(arr, np.float32)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise BuildError(f"take {p} must hold (T, V, 3) frames, got shape {arr.shape}")
    return arr


def _versions() -> dict[str, str]:
    import onnx
    import onnxruntime
    import torch

    return {
        "rigcast": rigcast.__version__,
        "torch": torch.__version__,
        "onnx": onnx.__version__,
        "onnxruntime": onnxruntime.__version__,
        "numpy": np.__version__,
    }
