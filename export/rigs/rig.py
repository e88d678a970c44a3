"""The rig interface: every rig source (demo, glTF, Python callable, external process, dataset)
is a ``Rig``. The pipeline treats it as a deterministic black box.
"""

from __future__ import annotations

import hashlib
import logging
from abc import ABC, abstractmethod
from collections.abc import Callable

import numpy as np
from rigcast.runtime.errors import EXIT_USAGE, RigcastError
from rigcast.runtime.schema import ControlSchema

log = logging.getLogger(__name__)


class RigError(RigcastError):
    """A rig could not be loaded or evaluated; the message names the source and the problem."""

    advice = "check the rig spec; `rigcast build --help` lists the sources and their forms"
    exit_code = EXIT_USAGE


def evaluate_in_chunks(chunk_fn: Callable[[np.ndarray], np.ndarray], controls: np.ndarray,
                       vertex_count: int, chunk: int) -> np.ndarray:
    """controls (B, C) -> (B, V, 3) float32 by ``chunk_fn`` on ``chunk`` poses at a time, so a
    rig's temporaries stay bounded however large the batch."""
    out = np.empty((controls.shape[0], vertex_count, 3), dtype=np.float32)
    for start in range(0, controls.shape[0], chunk):
        out[start : start + chunk] = chunk_fn(controls[start : start + chunk])
    return out


class Rig(ABC):
    """A deterministic map from controls to meshes.

    Subclasses set ``name``, ``schema``, ``neutral`` (V, 3) float32 and ``faces`` (F, 3) int32,
    and implement ``_evaluate``. Instances must be picklable so that process and dask executors
    can evaluate batches elsewhere.
    """

    name: str
    schema: ControlSchema
    neutral: np.ndarray
    faces: np.ndarray
    #: True when vertices are an affine function of the controls (used by the quality report).
    linear: bool = False

    @property
    def vertex_count(self) -> int:
        return int(self.neutral.shape[0])

    @property
    def control_count(self) -> int:
        return len(self.schema)

    def evaluate(self, controls: np.ndarray) -> np.ndarray:
        """Evaluate a batch of poses.

        controls: (B, C) float, within the schema's bounds.
        returns:  (B, V, 3) float32 vertex positions.
        """
        controls = np.asarray(controls, dtype=np.float64)
        if controls.ndim != 2 or controls.shape[1] != self.control_count:
            raise RigError(
                f"rig {self.name!r} expects controls of shape (B, {self.control_count}), "
                f"got {controls.shape}"
            )
        out = np.asarray(self._evaluate(controls), dtype=np.float32)
        expected = (controls.shape[0], self.vertex_count, 3)
        if out.shape != expected:
            raise RigError(f"rig {self.name!r} returned shape {out.shape}, expected {expected}")
        if not np.all(np.isfinite(out)):
            raise RigError(f"rig {self.name!r} returned NaN or Inf vertices")
        return out

    @abstractmethod
    def _evaluate(self, controls: np.ndarray) -> np.ndarray:
        """controls: (B, C) float64 -> (B, V, 3)."""

    def fingerprint(self) -> str:
        """A digest of the schema, the neutral mesh and the rig's response to fixed probe poses.

        Probing makes the fingerprint change when the rig's behaviour changes, even for black-box
        sources whose internals we cannot hash.
        """
        h = hashlib.sha256()
        h.update(repr(self.schema.to_dict()).encode())
        h.update(np.ascontiguousarray(self.neutral, dtype=np.float32).tobytes())
        rng = np.random.default_rng(0)
        lo, hi = self.schema.lower.astype(np.float64), self.schema.upper.astype(np.float64)
        probes = lo + (hi - lo) * rng.random((4, self.control_count))
        h.update(np.round(self.evaluate(probes), 5).tobytes())
        return h.hexdigest()[:16]

    def close(self) -> None:  # noqa: B027 - optional hook, most rigs hold no resources
        """Release resources (external processes). Safe to call twice."""
