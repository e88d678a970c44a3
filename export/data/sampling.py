"""Drawing control poses for sampling a rig: within bounds, sparse by default, quasi-random.

Pure functions over numpy arrays plus the frozen configs that drive them. The dataset stage
(``export/data/dataset.py``) calls :func:`sample_chunk` once per chunk, so chunk ``i`` depends only on
the config and ``i``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from rigcast.runtime.errors import EXIT_USAGE, RigcastError
from rigcast.runtime.schema import ControlSchema
from scipy.stats import qmc

METHODS = ("sobol", "lhs")


class SamplingError(RigcastError, ValueError):
    """A sampling config value is invalid; the message names the field and the value."""

    advice = "fix that sampling setting; `rigcast build --help` lists the build's options"
    exit_code = EXIT_USAGE


def _check_int(name: str, value: Any, minimum: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise SamplingError(f"{name} must be an integer >= {minimum}, got {value!r}")


def _check_unit(name: str, value: Any) -> None:
    ok = isinstance(value, int | float) and not isinstance(value, bool) and 0.0 <= value <= 1.0
    if not ok:
        raise SamplingError(f"{name} must be a number in [0, 1], got {value!r}")


@dataclass(frozen=True)
class SparsityConfig:
    """How many controls a pose moves away from their defaults.

    Each pose is *neutral* (all controls at default) with probability ``neutral_fraction``,
    *dense* (every control active) with probability ``dense_fraction``, and otherwise *sparse*:
    ``k ~ Poisson(mean_active)`` clipped to ``[min_active, min(max_active, C)]`` controls are
    active. The clip moves the mean slightly when ``mean_active`` is near a limit.
    Active controls are picked in random order; when a picked control has a ``pair`` twin, the twin
    is activated too with probability ``pair_probability`` (it counts toward ``k``, and gets its
    own value, so symmetric and asymmetric versions of a pair are both seen).
    """

    mean_active: float = 3.0
    min_active: int = 1
    max_active: int = 8
    pair_probability: float = 0.75
    dense_fraction: float = 0.05
    neutral_fraction: float = 0.01

    def __post_init__(self) -> None:
        _check_int("sparsity.min_active", self.min_active, 0)
        _check_int("sparsity.max_active", self.max_active, 1)
        if self.min_active > self.max_active:
            raise SamplingError(
                f"sparsity.min_active {self.min_active} exceeds max_active {self.max_active}"
            )
        m = self.mean_active
        if (
            isinstance(m, bool)
            or not isinstance(m, int | float)
            or not math.isfinite(m)
            or not self.min_active <= m <= self.max_active
            or m <= 0
        ):
            raise SamplingError(
                f"sparsity.mean_active must be a positive number in [min_active, max_active] = "
                f"[{self.min_active}, {self.max_active}], got {m!r}"
            )
        _check_unit("sparsity.pair_probability", self.pair_probability)
        _check_unit("sparsity.dense_fraction", self.dense_fraction)
        _check_unit("sparsity.neutral_fraction", self.neutral_fraction)
        if self.dense_fraction + self.neutral_fraction > 1.0:
            raise SamplingError(
                f"sparsity.dense_fraction {self.dense_fraction} + neutral_fraction "
                f"{self.neutral_fraction} exceeds 1"
            )


@dataclass(frozen=True)
class SamplingConfig:
    """What to sample: ``count`` poses in chunks of ``chunk_size``, drawn by ``method``."""

    count: int = 4096
    sparsity: SparsityConfig = field(default_factory=SparsityConfig)
    method: str = "sobol"
    seed: int = 0
    chunk_size: int = 512

    def __post_init__(self) -> None:
        _check_int("count", self.count, 1)
        _check_int("chunk_size", self.chunk_size, 1)
        _check_int("seed", self.seed, 0)
        if self.method not in METHODS:
            raise SamplingError(f"method must be one of {METHODS}, got {self.method!r}")
        if not isinstance(self.sparsity, SparsityConfig):
            raise SamplingError(f"sparsity must be a SparsityConfig, got {self.sparsity!r}")

    @property
    def chunk_count(self) -> int:
        return -(-self.count // self.chunk_size)

    def chunk_rows(self, index: int) -> int:
        """Number of poses in chunk ``index`` (the last chunk may be short)."""
        if not 0 <= index < self.chunk_count:
            raise SamplingError(f"chunk index {index} is outside [0, {self.chunk_count})")
        return min(self.chunk_size, self.count - index * self.chunk_size)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> SamplingConfig:
        try:
            d = dict(data)
            d["sparsity"] = SparsityConfig(**dict(d.get("sparsity", {})))
            return cls(**d)
        except TypeError as exc:
            raise SamplingError(f"bad sampling config {dict(data)!r}: {exc}") from None


def chunk_seed(seed: int, index: int) -> int:
    """A 63-bit seed for chunk ``index`` of a run seeded with ``seed`` (numpy SeedSequence)."""
    state = np.random.SeedSequence([seed, index]).generate_state(2, np.uint32)
    return int((int(state[0]) << 31) ^ int(state[1]))


def unit_points(n: int, d: int, *, method: str, seed: int) -> np.ndarray:
    """(n, d) float64 points in [0, 1): scrambled Sobol or Latin hypercube (scipy.stats.qmc).

    Sobol points are the first ``n`` of ``2**ceil(log2 n)``, so no balance warning is raised for
    short chunks; a prefix of a scrambled Sobol sequence is still low-discrepancy.
    """
    if method == "sobol":
        m = max(0, math.ceil(math.log2(n))) if n > 0 else 0
        return qmc.Sobol(d, scramble=True, rng=seed).random_base2(m)[:n]
    if method == "lhs":
        return qmc.LatinHypercube(d, rng=seed).random(n)
    raise SamplingError(f"method must be one of {METHODS}, got {method!r}")


def map_unit_to_controls(u: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                         default: np.ndarray) -> np.ndarray:
    """Map unit points to control values.

    u: (N, C) in [0, 1]; lower, upper, default: (C,).
    returns: (N, C) float64 in [lower, upper].
    A bipolar control (lower < default < upper) maps u < 0.5 to [lower, default) and u >= 0.5 to
    [default, upper], so both sides get half the active values whatever their lengths; other
    controls map u linearly onto [lower, upper].
    """
    lo, hi, df = (np.asarray(a, dtype=np.float64) for a in (lower, upper, default))
    linear = lo + u * (hi - lo)
    below = df - (1.0 - 2.0 * u) * (df - lo)
    above = df + (2.0 * u - 1.0) * (hi - df)
    bipolar = (lo < df) & (df < hi)
    out = np.where(bipolar, np.where(u < 0.5, below, above), linear)
    return np.clip(out, lo, hi)


def twin_indices(schema: ControlSchema) -> np.ndarray:
    """(C,) int64 index of each control's pair twin, or -1. Symmetric even if declared one way."""
    twin = np.full(len(schema), -1, dtype=np.int64)
    for i, c in enumerate(schema.controls):
        if c.pair:
            j = schema.index(c.pair)
            if j != i:
                twin[i] = j
                if twin[j] < 0:
                    twin[j] = i
    return twin


def active_mask(schema: ControlSchema, n: int, *, sparsity: SparsityConfig,
                rng: np.random.Generator) -> np.ndarray:
    """(n, C) bool: which controls each pose moves away from default (see SparsityConfig)."""
    c = len(schema)
    twin = twin_indices(schema)
    kind = rng.random(n)
    dense = kind < sparsity.dense_fraction
    neutral = (~dense) & (kind < sparsity.dense_fraction + sparsity.neutral_fraction)
    hi = min(sparsity.max_active, c)
    counts = np.clip(rng.poisson(sparsity.mean_active, n), min(sparsity.min_active, hi), hi)
    mask = np.zeros((n, c), dtype=bool)
    mask[dense] = True
    for row in np.flatnonzero(~(dense | neutral)):
        k, picked = int(counts[row]), 0
        for j in rng.permutation(c):
            if picked >= k:
                break
            if mask[row, j]:
                continue
            mask[row, j] = True
            picked += 1
            t = twin[j]
            pair_on = rng.random() < sparsity.pair_probability
            if t >= 0 and picked < k and not mask[row, t] and pair_on:
                mask[row, t] = True
                picked += 1
    return mask


def sample_controls(schema: ControlSchema, n: int, *, sparsity: SparsityConfig, seed: int,
                    method: str = "sobol") -> np.ndarray:
    """Draw ``n`` poses within the schema's bounds.

    returns: (n, C) float32; inactive controls sit exactly at their default, active ones take
    quasi-random values from ``method`` (see :func:`map_unit_to_controls`). Deterministic in
    (schema, n, sparsity, seed, method).
    """
    _check_int("n", n, 0)
    _check_int("seed", seed, 0)
    c = len(schema)
    if n == 0:
        return np.zeros((0, c), dtype=np.float32)
    seeds = np.random.SeedSequence(seed).spawn(2)
    u = unit_points(n, c, method=method, seed=int(seeds[0].generate_state(1)[0]))
    values = map_unit_to_controls(u, schema.lower, schema.upper, schema.defaults)
    mask = active_mask(schema, n, sparsity=sparsity, rng=np.random.default_rng(seeds[1]))
    out = np.where(mask, values, schema.defaults.astype(np.float64))
    return out.astype(np.float32)


def anchor_poses(schema: ControlSchema) -> np.ndarray:
    """The rest pose, then each control alone at the bound farthest from its default:
    (C + 1, C) float32. The forward model's linear layer passes through these exactly
    (``train_forward.fit_anchored``), so every control alone is what the rig makes of it."""
    d = np.asarray(schema.defaults, np.float32)
    lo, hi = np.asarray(schema.lower, np.float32), np.asarray(schema.upper, np.float32)
    out = np.tile(d, (len(schema) + 1, 1))
    far = np.where(hi - d >= d - lo, hi, lo)
    out[np.arange(1, len(schema) + 1), np.arange(len(schema))] = far
    return out


def sample_chunk(schema: ControlSchema, config: SamplingConfig, index: int) -> np.ndarray:
    """(rows, C) float32 controls of chunk ``index``: a function of (config, index) only."""
    return sample_controls(
        schema,
        config.chunk_rows(index),
        sparsity=config.sparsity,
        seed=chunk_seed(config.seed, index),
        method=config.method,
    )
