"""The batch solve's hold on numpy's OpenBLAS threads (runtime/solve/blas_threads.py)."""

from __future__ import annotations

import threading

import numpy as np
import pytest
from rigcast.runtime.solve.blas_threads import blas_thread_counts, held_blas_threads


def _openblas() -> list[int]:
    counts = blas_thread_counts()
    if not counts:
        pytest.skip("numpy's BLAS here is not OpenBLAS")
    return counts


def test_hold_sets_one_thread_and_restores() -> None:
    before = _openblas()
    with held_blas_threads(1):
        assert blas_thread_counts() == [1] * len(before)
        with held_blas_threads(1):
            pass
        assert blas_thread_counts() == [1] * len(before)  # a nested hold leaves it held
    assert blas_thread_counts() == before


def test_overlapping_holds_on_two_threads_restore_once_both_leave() -> None:
    """Thread a leaves its hold while thread b still holds: the count stays held until b leaves
    (a hold that restored what it found would give b's product the threads back, and leave the
    count at 1 when b, which found 1, restores last)."""
    before = _openblas()
    a_in, b_in, a_out = threading.Event(), threading.Event(), threading.Event()
    seen: dict[str, list[int]] = {}

    def a() -> None:
        with held_blas_threads(1):
            a_in.set()
            b_in.wait(5)
        a_out.set()

    def b() -> None:
        a_in.wait(5)
        with held_blas_threads(1):
            b_in.set()
            a_out.wait(5)
            seen["b after a left"] = blas_thread_counts()

    threads = [threading.Thread(target=a), threading.Thread(target=b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(10)
    assert seen["b after a left"] == [1] * len(before)
    assert blas_thread_counts() == before


def test_held_products_give_the_same_bits() -> None:
    """A product large enough for OpenBLAS to split over threads: the same bits held at one
    (OpenBLAS splits a product by blocks of its output; each element's sum is the same)."""
    _openblas()
    rng = np.random.default_rng(5)
    a = rng.standard_normal((1024, 142)).astype(np.float32)
    b = rng.standard_normal((142, 2175)).astype(np.float32)
    free = a @ b
    with held_blas_threads(1):
        held = a @ b
    assert np.array_equal(free, held)


def test_bad_count_is_refused() -> None:
    with pytest.raises(ValueError, match="BLAS thread count"), held_blas_threads(0):
        pass
