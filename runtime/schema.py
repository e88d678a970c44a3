"""Control schema: the names, bounds and defaults of a rig's animator controls.

Shared by the offline pipeline (which writes it into a bundle) and the runtime (which clamps,
filters and publishes against it). Pure data; no heavy imports.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from rigcast.runtime.errors import EXIT_USAGE, RigcastError


class SchemaError(RigcastError, ValueError):
    """A control schema is malformed; the message names the control and the bad field."""

    advice = "fix the control schema (each control needs name, min and max)"
    exit_code = EXIT_USAGE


@dataclass(frozen=True)
class Control:
    """One animator control.

    ``group`` clusters controls for shared filter settings (e.g. ``"brow"``); ``pair`` names the
    mirrored twin of a left/right control, or is empty.
    """

    name: str
    minimum: float
    maximum: float
    default: float
    group: str = ""
    pair: str = ""

    @property
    def span(self) -> float:
        return self.maximum - self.minimum


@dataclass(frozen=True)
class ControlSchema:
    controls: tuple[Control, ...]

    def __post_init__(self) -> None:
        if not self.controls:
            raise SchemaError("control schema has no controls")
        seen: set[str] = set()
        for c in self.controls:
            if not c.name or not isinstance(c.name, str):
                raise SchemaError(f"control name must be a non-empty string, got {c.name!r}")
            if c.name in seen:
                raise SchemaError(f"control {c.name!r} appears twice")
            seen.add(c.name)
            for field in ("minimum", "maximum", "default"):
                v = getattr(c, field)
                if not isinstance(v, int | float) or not math.isfinite(v):
                    raise SchemaError(f"control {c.name!r}: {field} must be a finite number, got {v!r}")
            if not c.minimum < c.maximum:
                raise SchemaError(
                    f"control {c.name!r}: minimum {c.minimum} must be below maximum {c.maximum}"
                )
            if not c.minimum <= c.default <= c.maximum:
                raise SchemaError(
                    f"control {c.name!r}: default {c.default} is outside [{c.minimum}, {c.maximum}]"
                )
        for c in self.controls:
            if c.pair and c.pair not in seen:
                raise SchemaError(f"control {c.name!r}: pair {c.pair!r} is not a control")

    def __len__(self) -> int:
        return len(self.controls)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.controls)

    @property
    def lower(self) -> np.ndarray:
        """(C,) float32 minimum of each control."""
        return np.array([c.minimum for c in self.controls], dtype=np.float32)

    @property
    def upper(self) -> np.ndarray:
        """(C,) float32 maximum of each control."""
        return np.array([c.maximum for c in self.controls], dtype=np.float32)

    @property
    def defaults(self) -> np.ndarray:
        """(C,) float32 default (rest) value of each control."""
        return np.array([c.default for c in self.controls], dtype=np.float32)

    @property
    def groups(self) -> tuple[str, ...]:
        return tuple(c.group for c in self.controls)

    def index(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise SchemaError(f"no control named {name!r}") from None

    def to_dict(self) -> dict[str, Any]:
        return {
            "controls": [
                {
                    "name": c.name,
                    "min": c.minimum,
                    "max": c.maximum,
                    "default": c.default,
                    "group": c.group,
                    "pair": c.pair,
                }
                for c in self.controls
            ]
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> ControlSchema:
        """Parse ``{"controls": [{"name", "min", "max", "default"?, "group"?, "pair"?}, ...]}``.

        ``default`` falls back to ``min`` when 0 is out of range, else 0.
        """
        if not isinstance(data, Mapping) or "controls" not in data:
            raise SchemaError("control schema must be a mapping with a 'controls' list")
        items = data["controls"]
        if not isinstance(items, Sequence) or isinstance(items, str | bytes):
            raise SchemaError("'controls' must be a list")
        out = []
        for i, item in enumerate(items):
            if not isinstance(item, Mapping):
                raise SchemaError(f"controls[{i}] must be a mapping, got {type(item).__name__}")
            for key in ("name", "min", "max"):
                if key not in item:
                    raise SchemaError(f"controls[{i}] is missing {key!r}")
            lo, hi = item["min"], item["max"]
            default = item.get("default")
            if default is None:
                default = 0.0 if _num(lo) <= 0.0 <= _num(hi) else lo
            out.append(
                Control(
                    name=str(item["name"]),
                    minimum=_num(lo, f"controls[{i}].min"),
                    maximum=_num(hi, f"controls[{i}].max"),
                    default=_num(default, f"controls[{i}].default"),
                    group=str(item.get("group", "") or ""),
                    pair=str(item.get("pair", "") or ""),
                )
            )
        return cls(tuple(out))


def _num(value: Any, where: str = "value") -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise SchemaError(f"{where} must be a number, got {value!r}")
    return float(value)
