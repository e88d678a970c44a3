"""Where rig evaluation runs: in-process, in local worker processes, or on a dask cluster.

All three are ``concurrent.futures.Executor``s, so the dataset stage submits work the same way
to each. Rigs are pickled to the workers (the ``Rig`` contract requires it).
"""

from __future__ import annotations

import logging
import multiprocessing
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from contextlib import contextmanager
from typing import Any

import numpy as np
from rigcast.export.rigs.rig import Rig
from rigcast.runtime.errors import RigcastError

log = logging.getLogger(__name__)

DEFAULT_WORKERS = 2


class ExecutorError(RigcastError):
    """An executor setting is invalid, a scheduler cannot be reached, or a worker died."""

    advice = "check --workers and --scheduler; `rigcast build --help` describes them"


class SerialExecutor(Executor):
    """Runs each submitted call at once, in the calling thread. For tests and tiny rigs."""

    def __init__(self) -> None:
        self._shutdown = False

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        if self._shutdown:
            raise RuntimeError("cannot schedule new futures after shutdown")
        future: Future[Any] = Future()
        try:
            future.set_result(fn(*args, **kwargs))
        except Exception as exc:  # the caller sees it from future.result(), as with a pool
            future.set_exception(exc)
        return future

    def shutdown(self, wait: bool = True, *, cancel_futures: bool = False) -> None:
        self._shutdown = True


def evaluate_batch(rig: Rig, controls: np.ndarray) -> np.ndarray:
    """Evaluate one batch on a worker. controls: (B, C) -> (B, V, 3) float32."""
    return rig.evaluate(controls)


@contextmanager
def make_executor(workers: int | None = None, scheduler: str | None = None) -> Iterator[Executor]:
    """Yield an executor for rig evaluation and shut it down on exit.

    - ``scheduler`` given (e.g. ``"tcp://10.0.0.5:8786"``): the executor of a
      ``dask.distributed.Client`` connected to it; ``workers`` is then ignored.
    - ``workers == 0``: :class:`SerialExecutor`, in this process.
    - otherwise a ``ProcessPoolExecutor`` of ``workers`` (default 2) processes started with
      'spawn', which is safe even when this process already runs threads (dask, ZeroMQ, BLAS).
    """
    if scheduler is not None:
        if not isinstance(scheduler, str) or not scheduler:
            raise ExecutorError(f"scheduler must be a non-empty address, got {scheduler!r}")
        from dask.distributed import Client  # only this path needs dask

        try:
            client = Client(scheduler, timeout=30)
        except OSError as exc:
            raise ExecutorError(f"cannot reach dask scheduler {scheduler!r}: {exc}") from None
        log.info("evaluating on dask scheduler %s", scheduler)
        try:
            executor = client.get_executor(pure=False)
            try:
                yield executor
            finally:
                executor.shutdown(wait=True)
        finally:
            client.close()
        return
    if workers is None:
        workers = DEFAULT_WORKERS
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
        raise ExecutorError(f"workers must be an integer >= 0, got {workers!r}")
    if workers == 0:
        log.info("evaluating in-process")
        with SerialExecutor() as serial:
            yield serial
        return
    log.info("evaluating in %d local worker processes", workers)
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))
    try:
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
