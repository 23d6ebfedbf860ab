"""Tests of the executors (serial, local processes, Dask LocalCluster).

The reference for every executor is the plain Python call ``fn(item)`` in this
process: results must be identical bit for bit, whichever executor ran them.
"""

from __future__ import annotations

import math
import os
import sys
from functools import partial
from pathlib import Path

import pytest

from schedforge.errors import InputError
from schedforge.executors import (
    THREAD_ENV_VARS,
    DaskExecutor,
    ProcessExecutor,
    SerialExecutor,
    TaskLost,
    make_executor,
)

ITEMS = [0.1 * i for i in range(1, 9)]


def work(x: float) -> float:
    """A pure, deterministic function (a truncated Fourier sum)."""
    return math.fsum(math.sin(n * x) / n for n in range(1, 2000))


def thread_env(_: object) -> dict[str, str | None]:
    return {name: os.environ.get(name) for name in THREAD_ENV_VARS}


def die_once(marker_dir: str, x: float) -> float:
    """Kill the worker process the first time it sees x = 0.3; compute otherwise."""
    marker = Path(marker_dir) / f"died-{x!r}"
    if abs(x - 0.30000000000000004) < 1e-12 and not marker.exists():
        marker.write_text("x")
        os._exit(7)
    return work(x)


def die_always(x: float) -> float:
    if abs(x - 0.30000000000000004) < 1e-12:
        os._exit(7)
    return work(x)


def _collect(ex, fn, items):
    return dict(ex.map_unordered(fn, items))


def test_serial_matches_direct_calls_in_order():
    with SerialExecutor() as ex:
        pairs = list(ex.map_unordered(work, ITEMS))
    assert [p[0] for p in pairs] == ITEMS
    assert all(r == work(x) for x, r in pairs)


def test_processes_identical_and_single_threaded():
    before = thread_env(None)
    with make_executor("processes", workers=2) as ex:
        assert ex.workers == 2 and ex.describe() == "processes (2 workers)"
        got = _collect(ex, work, ITEMS)
        envs = list(dict(ex.map_unordered(thread_env, [1, 2])).values())
    assert got == {x: work(x) for x in ITEMS}  # exact equality
    for env in envs:
        for name in THREAD_ENV_VARS:
            assert env[name] == os.environ.get(name, "1")
    assert thread_env(None) == before  # the parent's environment is restored


def test_processes_restart_after_worker_death(tmp_path):
    with ProcessExecutor(2) as ex:
        got = _collect(ex, partial(die_once, str(tmp_path)), ITEMS)
    assert (tmp_path / "died-0.30000000000000004").exists()
    assert got == {x: work(x) for x in ITEMS}


def test_processes_gives_up_with_task_lost(tmp_path):
    with ProcessExecutor(2, max_restarts=1) as ex:
        got = _collect(ex, die_always, ITEMS)
    assert set(got) == set(ITEMS)
    assert isinstance(got[ITEMS[2]], TaskLost) and "died" in got[ITEMS[2]].reason
    for x, r in got.items():
        assert isinstance(r, TaskLost) or r == work(x)


@pytest.mark.parametrize(
    ("kwargs", "field", "rule"),
    [
        ({"kind": "threads"}, "--executor", "must be one of serial, processes, dask"),
        ({"workers": 0}, "--workers", "integer >= 1"),
        ({"workers": 2.5}, "--workers", "integer >= 1"),
        ({"kind": "dask", "dask_local": -1}, "--dask-local", "integer >= 1"),
        ({"scheduler": "tcp://x:1", "dask_local": 2}, "--scheduler", "cannot be combined"),
        ({"kind": "serial", "workers": 2}, "--workers", "processes only"),
        ({"kind": "serial", "dask_local": 2}, "--executor", "cannot use"),
    ],
)
def test_make_executor_rejects_bad_options(kwargs, field, rule):
    with pytest.raises(InputError) as info:
        make_executor(**kwargs)
    assert info.value.field == field and rule in str(info.value)


def test_dask_missing_gives_install_hint(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)
    with pytest.raises(InputError, match=r'pip install -e "\.\[dask\]"'):
        make_executor("dask", dask_local=1)


# -- Dask ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def dask_cluster():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
    )
    yield cluster
    cluster.close()


def test_dask_joins_scheduler_and_matches(dask_cluster):
    with make_executor(scheduler=dask_cluster.scheduler_address) as ex:
        assert ex.kind == "dask" and ex.workers == 2
        got = _collect(ex, work, ITEMS)
    assert got == {x: work(x) for x in ITEMS}


def test_dask_task_rescheduled_when_worker_dies(dask_cluster, tmp_path):
    with make_executor("dask", scheduler=dask_cluster.scheduler_address) as ex:
        got = _collect(ex, partial(die_once, str(tmp_path)), ITEMS)
    assert (tmp_path / "died-0.30000000000000004").exists()  # a worker really died
    assert got == {x: work(x) for x in ITEMS}


def test_dask_unreachable_scheduler_is_input_error():
    pytest.importorskip("distributed")
    with pytest.raises(InputError) as info:
        DaskExecutor(scheduler="tcp://127.0.0.1:9", connect_timeout_s=1.0)
    assert info.value.field == "--scheduler"
