"""What the take readers share (``rigcast.readers.takes`` and ``rigcast.readers.gltf_take``): their error
type, the default frame rate and the rate of evenly spaced times. Kept apart so that neither reader
imports the other."""

from __future__ import annotations

import numpy as np

from rigcast.runtime.errors import RigcastError

DEFAULT_FPS = 60.0  # the one default of `send` and `solve` (live capture rate, common practice)


class TakeError(RigcastError, ValueError):
    """A take cannot be read; the message names the file and the problem."""

    advice = "check the take's path and format; `rigcast solve --help` lists the formats"


def rate_of(steps: np.ndarray) -> float:
    """Frames per second of time steps (N,): 1 / median, to 9 significant digits (so that
    steps of 1/30 s read as 30, not 30.000000000000007)."""
    return float(f"{1.0 / float(np.median(steps)):.9g}")
