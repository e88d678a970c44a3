"""numpy's BLAS threads, held at a count for the length of a block (the batch solve's pool).

The batch solve (runtime/solve/batch.py) fills the cores with its own pool of chunk workers.
numpy's OpenBLAS runs a large product on threads of its own as well, which on top of the pool's
workers only compete for the same cores and then spin while they wait for the next product
(OpenBLAS's busy-wait): on the demo face about 50 us of CPU a frame on two cores (340 against
390). Holding the BLAS at one thread while the pool runs keeps each product on its worker's
thread; the arithmetic and its result are the same (each product is computed by one thread
instead of split across several: OpenBLAS's split is by blocks of the output, so every output
element is the same sum in the same order; tests/test_batch_blas.py checks a solve's bits with
and without the hold).

Finding the loaded BLAS libraries and setting their thread counts is threadpoolctl's job (the
``batch`` extra); this module only counts holds, so that holds may nest or overlap on several
threads: the first sets the count, the last to leave restores what the first found (so
threadpoolctl's own rule for OpenBLAS's process-wide pool, that only the thread which first set a
limit may change it, is released before each change: the counting here already keeps the threads
from fighting). Without threadpoolctl the hold does nothing (the solve's result is the same
either way).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

log = logging.getLogger(__name__)

_lock = threading.Lock()
_controller: Any = None  # threadpoolctl's controller of the loaded BLAS libraries, made once
_searched = False
_holds = 0  # nested or concurrent holds: the first sets, the last restores
_limiter: Any = None


def _blas() -> Any:
    """threadpoolctl's controller of the BLAS libraries this process has loaded, or None
    without threadpoolctl (call under _lock: it scans the process's libraries once)."""
    global _controller, _searched
    if not _searched:
        _searched = True
        try:
            from threadpoolctl import ThreadpoolController
        except ImportError:
            log.debug("threadpoolctl is not installed: BLAS threads are left as they are")
        else:
            _controller = ThreadpoolController().select(user_api="blas")
    return _controller


def _release(blas: Any) -> None:
    """Let the calling thread change the limits (threadpoolctl's controlling-thread rule)."""
    for lib in blas.lib_controllers:
        clear = getattr(type(lib), "clear_controlling_thread", None)
        if clear is not None:
            clear(force=True)


def blas_thread_counts() -> list[int]:
    """The thread count of every loaded BLAS library ([] when none is found)."""
    with _lock:
        blas = _blas()
        return [] if blas is None else [int(lib.num_threads) for lib in blas.lib_controllers]


@contextmanager
def held_blas_threads(count: int = 1) -> Iterator[None]:
    """The BLAS at ``count`` threads inside the block, then as it was. Holds may nest or run on
    several threads at once: the first sets the count, the last to leave restores it."""
    if not isinstance(count, int) or count < 1:
        raise ValueError(f"BLAS thread count must be an integer >= 1, got {count!r}")
    global _holds, _limiter
    with _lock:
        blas = _blas()
        if _holds == 0 and blas is not None:
            _release(blas)
            _limiter = blas.limit(limits=count)
        _holds += 1
    try:
        yield
    finally:
        with _lock:
            _holds -= 1
            if _holds == 0 and _limiter is not None:
                _release(_blas())
                _limiter.restore_original_limits()
                _limiter = None
