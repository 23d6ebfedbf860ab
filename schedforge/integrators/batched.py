"""Stacked small-matrix linear algebra, split across the machine's cores.

NumPy runs a stack of small matrix operations (``inv``, ``matmul``, ``eigh`` over
the leading axis) in one thread: BLAS threads only help large matrices.  The
eigenframe integrator spends much of a multi-qubit step on such stacks (thousands
of 9 x 9 collocation blocks), so here they are cut into one slice per thread; NumPy
releases the GIL inside these loops, so the slices run in parallel.

The number of threads follows the caps a parallel sweep sets for its workers
(``OMP_NUM_THREADS``; one thread per worker process, see
:mod:`schedforge.executors`), else ``SCHEDFORGE_THREADS``, else the number of CPUs
(at most ``MAX_THREADS``).  Stacks smaller than ``MIN_SPLIT`` matrices per thread
are not split: the hand-over costs tens of microseconds.
"""

from __future__ import annotations

import itertools
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from functools import cache
from typing import Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["batched_eigh", "batched_inv", "batched_matmul", "thread_count"]

#: Most threads used for one stack.
MAX_THREADS = 4
#: Fewest matrices per slice worth a thread of its own.
MIN_SPLIT = 256


def thread_count() -> int:
    """Threads for stacked operations (see the module docstring)."""
    for name in ("OMP_NUM_THREADS", "SCHEDFORGE_THREADS"):
        value = os.environ.get(name, "").strip()
        if value.isdigit() and int(value) > 0:
            return min(int(value), MAX_THREADS)
    return max(1, min(os.cpu_count() or 1, MAX_THREADS))


@cache
def _pool(threads: int) -> ThreadPoolExecutor:
    return ThreadPoolExecutor(max_workers=threads - 1, thread_name_prefix="schedforge-stack")


def _split(
    fn: Callable[..., Any], arrays: tuple[NDArray[Any], ...], min_split: int
) -> list[Any] | None:
    """``fn`` on slices of the leading axis, in parallel; None if not worth it."""
    n = arrays[0].shape[0]
    threads = min(thread_count(), n // min_split)
    if threads < 2:
        return None
    edges = np.linspace(0, n, threads + 1).astype(int)
    pool = _pool(threads)
    futures = [
        pool.submit(fn, *(a[lo:hi] for a in arrays)) for lo, hi in itertools.pairwise(edges[1:])
    ]
    first = fn(*(a[edges[0] : edges[1]] for a in arrays))
    return [first, *(f.result() for f in futures)]


def batched_inv(mats: NDArray[Any]) -> NDArray[Any]:
    """``numpy.linalg.inv`` of a stack (n, k, k), in slices across threads."""
    parts = _split(np.linalg.inv, (mats,), MIN_SPLIT)
    return np.linalg.inv(mats) if parts is None else np.concatenate(parts)


def batched_matmul(a: NDArray[Any], b: NDArray[Any]) -> NDArray[Any]:
    """``a @ b`` for stacks with the same leading length, in slices across threads."""
    if a.ndim < 3 or b.ndim < 3 or a.shape[0] != b.shape[0]:
        return a @ b
    parts = _split(np.matmul, (a, b), 4 * MIN_SPLIT)
    return a @ b if parts is None else np.concatenate(parts)


def batched_eigh(mats: NDArray[Any], min_split: int = 2) -> tuple[NDArray[Any], NDArray[Any]]:
    """``numpy.linalg.eigh`` of a stack (n, d, d), in slices across threads.

    Worth splitting from a couple of matrices once d is a few dozen (the caller
    decides through ``min_split``).
    """
    parts = _split(np.linalg.eigh, (mats,), min_split)
    if parts is None:
        return np.linalg.eigh(mats)
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
