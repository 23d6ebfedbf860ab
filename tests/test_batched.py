"""Stacked linear algebra split across threads gives NumPy's results (reference: NumPy)."""

from __future__ import annotations

import numpy as np
import pytest

from schedforge.integrators import batched


@pytest.fixture
def two_threads(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("OMP_NUM_THREADS", "2")
    monkeypatch.setattr(batched, "MIN_SPLIT", 2)


def test_split_stacks_equal_numpy(two_threads: None) -> None:
    rng = np.random.default_rng(7)
    mats = rng.normal(size=(37, 9, 9)) + 1j * rng.normal(size=(37, 9, 9)) + 4 * np.eye(9)
    vecs = rng.normal(size=(37, 9, 1)) + 0j
    # the same LAPACK and BLAS call per matrix: identical to the last bit
    assert np.array_equal(batched.batched_inv(mats), np.linalg.inv(mats))
    big = np.repeat(mats, 4, axis=0)  # matmul splits from 4 * MIN_SPLIT matrices
    big_vecs = np.repeat(vecs, 4, axis=0)
    assert np.array_equal(batched.batched_matmul(big, big_vecs), big @ big_vecs)
    herm = rng.normal(size=(5, 40, 40))
    herm = herm + herm.transpose(0, 2, 1)
    values, vectors = batched.batched_eigh(herm)
    ref_values, ref_vectors = np.linalg.eigh(herm)
    assert np.array_equal(values, ref_values) and np.array_equal(vectors, ref_vectors)


def test_thread_count_follows_the_worker_cap(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("OMP_NUM_THREADS", "1")  # what a sweep's worker processes set
    monkeypatch.setenv("SCHEDFORGE_THREADS", "3")
    assert batched.thread_count() == 1
    monkeypatch.delenv("OMP_NUM_THREADS")
    assert batched.thread_count() == 3
    monkeypatch.setenv("SCHEDFORGE_THREADS", "64")
    assert batched.thread_count() == batched.MAX_THREADS
