"""A tiny Python-callable rig: the harbour pennant on Tamsin's lighthouse, a 5 x 4 vertex flag.

Use it with ``rigcast`` as ``py:examples/rig_callable.py:pennant`` and the schema file
``examples/rig_callable_schema.json``. The function maps controls (B, 3) to vertices (B, 20, 3).
"""

from __future__ import annotations

import numpy as np

COLUMNS, ROWS = 5, 4


def _rest() -> np.ndarray:
    """(20, 3) flat flag in the x-y plane, attached to the pole at x = 0."""
    x, y = np.meshgrid(np.linspace(0.0, 1.0, COLUMNS), np.linspace(0.0, 0.6, ROWS))
    return np.stack([x.ravel(), y.ravel(), np.zeros(x.size)], axis=1)


def pennant(controls: np.ndarray) -> np.ndarray:
    """controls: (B, 3) = (flutter [0, 1], droop [0, 1], gust [-1, 1]) -> (B, 20, 3)."""
    rest = _rest()
    flutter, droop, gust = controls[:, 0:1], controls[:, 1:2], controls[:, 2:3]
    x = rest[None, :, 0]
    out = np.repeat(rest[None], len(controls), axis=0)
    out[..., 2] += 0.15 * flutter * x * np.sin(2.0 * np.pi * x)
    out[..., 1] -= 0.4 * droop * x**2
    out[..., 2] += 0.3 * gust * x**2
    return out
