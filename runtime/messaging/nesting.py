"""How deep maps and lists nest in a decoded message header, found without recursion."""

from __future__ import annotations

from typing import Any


def nesting_within(value: Any, limit: int) -> bool:
    """True when maps and lists in ``value`` nest at most ``limit`` deep (iterative: a deep value
    cannot exhaust the stack here)."""
    stack: list[tuple[Any, int]] = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict):
            children: Any = [*item.keys(), *item.values()]
        elif isinstance(item, list | tuple):
            children = item
        else:
            continue
        if depth > limit:
            return False
        stack.extend((c, depth + 1) for c in children)
    return True
