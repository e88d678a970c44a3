"""numpy's BLAS threads, held at a count for the length of a block (the batch solve's pool).

The batch solve (runtime/solve/batch.py) fills the cores with its own pool of chunk workers.
numpy's OpenBLAS runs a large product on threads of its own as well, which on top of the pool's
workers only compete for the same cores and then spin while they wait for the next product
(OpenBLAS's busy-wait): on the demo face about 50 us of CPU a frame on two cores (340 against 390). Holding
OpenBLAS at one thread while the pool runs keeps each product on its worker's thread; the
arithmetic and its result are the same (each product is computed by one thread instead of split
across several: OpenBLAS's split is by blocks of the output, so every output element is the same
sum in the same order; tests/test_batch.py checks a solve's bits with and without the hold).

OpenBLAS's thread count is process-wide; the hold restores the count it found. The library is
found among those numpy has loaded (``/proc/self/maps``) and called through ctypes, by the
names OpenBLAS exports (``openblas_set_num_threads``, and the ``scipy_openblas`` builds' prefixed
and ``64_``-suffixed names); where there is no OpenBLAS (another BLAS, another OS) the hold does
nothing.
"""

from __future__ import annotations

import ctypes
import logging
import os
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

log = logging.getLogger(__name__)

_PREFIXES = ("scipy_openblas", "openblas")
_SUFFIXES = ("64_", "")
_lock = threading.Lock()
_found: list[tuple[Callable[[], int], Callable[[int], None]]] | None = None
_holds = 0  # nested or concurrent holds: the first sets, the last restores
_saved: list[int] = []


def _loaded_openblas() -> list[str]:
    """Paths of the OpenBLAS libraries this process has loaded (Linux; [] elsewhere)."""
    maps = Path("/proc/self/maps")
    if not maps.exists():
        return []
    paths = set()
    for line in maps.read_text().splitlines():
        path = line.split(maxsplit=5)[-1] if line.count(" ") >= 5 else ""
        if "openblas" in os.path.basename(path).lower() and ".so" in path:
            paths.add(path)
    return sorted(paths)


def _controls() -> list[tuple[Callable[[], int], Callable[[int], None]]]:
    """(get, set) of every loaded OpenBLAS's thread count, found once (call it under _lock)."""
    global _found
    if _found is None:
        _found = []
        mode = getattr(os, "RTLD_NOLOAD", 0) | getattr(os, "RTLD_LAZY", 0)
        for path in _loaded_openblas():
            try:
                lib = ctypes.CDLL(path, mode=mode)
            except OSError:
                continue
            for prefix in _PREFIXES:
                names = [(f"{prefix}_get_num_threads{s}", f"{prefix}_set_num_threads{s}")
                         for s in _SUFFIXES]
                pair = next(((getattr(lib, g), getattr(lib, s)) for g, s in names
                             if hasattr(lib, g) and hasattr(lib, s)), None)
                if pair is not None:
                    get, put = pair
                    get.restype, get.argtypes = ctypes.c_int, []
                    put.restype, put.argtypes = None, [ctypes.c_int]
                    _found.append((get, put))
                    break
        log.debug("OpenBLAS thread controls found: %d", len(_found))
    return _found


def blas_thread_counts() -> list[int]:
    """The thread count of every loaded OpenBLAS ([] when there is none)."""
    with _lock:
        return [get() for get, _ in _controls()]


@contextmanager
def held_blas_threads(count: int = 1) -> Iterator[None]:
    """OpenBLAS at ``count`` threads inside the block, then as it was. Holds may nest or run on
    several threads at once: the first sets the count, the last to leave restores it."""
    if not isinstance(count, int) or count < 1:
        raise ValueError(f"BLAS thread count must be an integer >= 1, got {count!r}")
    global _holds
    with _lock:
        controls = _controls()
        if _holds == 0:
            _saved[:] = [get() for get, _ in controls]
            for _, put in controls:
                put(count)
        _holds += 1
    try:
        yield
    finally:
        with _lock:
            _holds -= 1
            if _holds == 0:
                for (_, put), was in zip(controls, _saved, strict=True):
                    put(was)
