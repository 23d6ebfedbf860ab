"""Run one pure function over many items: serially, in local processes, or on Dask.

All executors share one interface::

    with make_executor("processes", workers=2) as ex:
        for item, result in ex.map_unordered(fn, items):
            ...

``fn`` must be a picklable, module-level pure function (``functools.partial`` of one
is fine) and ``items`` picklable.  Results arrive in completion order; the caller
(the single writer) stores each as it arrives, so a crash loses at most the items in
flight.  The result of an item does not depend on which executor ran it.

When the executor itself loses a task (a worker process died and the retries are
used up), the pair ``(item, TaskLost(reason))`` is yielded instead of a result, so
the caller can report it without stopping the other items.

Worker processes run with one BLAS/OpenMP thread each (``OMP_NUM_THREADS`` and
friends set to 1 unless already set), so that N workers on N cores do not
oversubscribe the machine.  Dask is an optional extra (:data:`DASK_INSTALL_HINT`)
imported only when asked for.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any

from .errors import InputError

__all__ = [
    "DASK_INSTALL_HINT",
    "DASK_WORKER_TIMEOUT_S",
    "EXECUTOR_KINDS",
    "THREAD_ENV_VARS",
    "DaskExecutor",
    "Executor",
    "ProcessExecutor",
    "SerialExecutor",
    "TaskLost",
    "check_scheduler_address",
    "make_executor",
    "single_thread_env",
]

EXECUTOR_KINDS = ("serial", "processes", "dask")

#: Environment variables that cap the threads of BLAS / OpenMP libraries.
THREAD_ENV_VARS = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)


@dataclass(frozen=True)
class TaskLost:
    """Marker yielded instead of a result when the executor could not run an item.

    Attributes
    ----------
    reason : str
        Why (e.g. "worker process died 3 times").
    """

    reason: str


@contextlib.contextmanager
def single_thread_env() -> Iterator[None]:
    """Temporarily set :data:`THREAD_ENV_VARS` to 1 (those not set by the user).

    Child processes started inside the block inherit the setting; the parent's
    own environment is restored on exit (its already-loaded BLAS is unaffected).
    """
    added = [name for name in THREAD_ENV_VARS if name not in os.environ]
    for name in added:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


class Executor:
    """Base class: a context manager with :meth:`map_unordered`.

    Attributes
    ----------
    kind : str
        ``"serial"``, ``"processes"`` or ``"dask"``.
    workers : int
        Number of items that can run at once.
    """

    kind: str = ""
    workers: int = 1

    def map_unordered(
        self, fn: Callable[[Any], Any], items: Iterable[Any]
    ) -> Iterator[tuple[Any, Any]]:
        """Apply ``fn`` to every item; yield ``(item, result)`` as each finishes.

        Parameters
        ----------
        fn : callable
            Picklable pure function of one argument.
        items : iterable
            Picklable items.

        Yields
        ------
        tuple
            ``(item, fn(item))``, or ``(item, TaskLost(...))`` when the executor
            lost the task.  An exception raised by ``fn`` propagates.
        """
        raise NotImplementedError

    def describe(self) -> str:
        """One-line description for logs, e.g. ``"processes (2 workers)"``."""
        plural = "s" if self.workers != 1 else ""
        return f"{self.kind} ({self.workers} worker{plural})"

    def close(self) -> None:
        """Release workers (idempotent)."""

    def __enter__(self) -> Executor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class SerialExecutor(Executor):
    """Run items one after another in this process (reference and debugging)."""

    kind = "serial"
    workers = 1

    def map_unordered(
        self, fn: Callable[[Any], Any], items: Iterable[Any]
    ) -> Iterator[tuple[Any, Any]]:
        """See :meth:`Executor.map_unordered`; results come in input order."""
        for item in items:
            yield item, fn(item)


# -- local processes -------------------------------------------------------------
def _watch_parent(parent_pid: int, interval: float = 1.0) -> None:
    """Exit this worker when its parent is gone (e.g. killed with SIGKILL)."""
    while True:
        time.sleep(interval)
        if os.getppid() != parent_pid:
            os._exit(3)


def _init_worker(parent_pid: int) -> None:
    """Initializer of local worker processes.

    Caps BLAS/OpenMP threads (effective because the environment is set before
    the worker imports NumPy), ignores Ctrl-C (the parent handles it and stops
    the pool) and starts a watchdog so that an orphaned worker exits.
    """
    import signal

    for name in THREAD_ENV_VARS:
        os.environ.setdefault(name, "1")
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True).start()


class ProcessExecutor(Executor):
    """Local worker processes (``concurrent.futures.ProcessPoolExecutor``, spawn).

    Parameters
    ----------
    workers : int, optional
        Number of processes; default all cores (``os.cpu_count()``).
    max_restarts : int, optional
        How many times a pool broken by a dying worker is restarted; items still
        unfinished after that are yielded as :class:`TaskLost`.
    """

    kind = "processes"

    def __init__(self, workers: int | None = None, *, max_restarts: int = 2) -> None:
        self.workers = int(workers) if workers is not None else (os.cpu_count() or 1)
        self.max_restarts = int(max_restarts)
        self._ctx = multiprocessing.get_context("spawn")
        self._pool: ProcessPoolExecutor | None = None

    def _new_pool(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(
            max_workers=self.workers,
            mp_context=self._ctx,
            initializer=_init_worker,
            initargs=(os.getpid(),),
        )

    def map_unordered(
        self, fn: Callable[[Any], Any], items: Iterable[Any]
    ) -> Iterator[tuple[Any, Any]]:
        """See :meth:`Executor.map_unordered`."""
        pending = list(items)
        restarts = 0
        while pending:
            self._pool = self._new_pool()
            with single_thread_env():
                futures: dict[Future[Any], Any] = {
                    self._pool.submit(fn, item): item for item in pending
                }
            pending = []
            broken = False
            not_done = set(futures)
            try:
                while not_done:
                    done, not_done = wait(not_done, return_when=FIRST_COMPLETED)
                    for fut in done:
                        try:
                            result = fut.result()
                        except BrokenProcessPool:
                            broken = True
                            pending.append(futures[fut])
                            continue
                        yield futures[fut], result
            except BaseException:
                self._abort()
                raise
            self._pool.shutdown(wait=True)
            self._pool = None
            if broken:
                restarts += 1
                if restarts > self.max_restarts:
                    reason = (
                        f"a worker process died and the pool was restarted "
                        f"{self.max_restarts} times"
                    )
                    for item in pending:
                        yield item, TaskLost(reason)
                    return

    def _abort(self) -> None:
        """Stop at once: cancel queued tasks and terminate the workers."""
        pool = self._pool
        if pool is None:
            return
        # ProcessPoolExecutor has no public terminate(); its process table is private.
        procs = list(getattr(pool, "_processes", {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for p in procs:
            with contextlib.suppress(Exception):
                p.terminate()
        for p in procs:
            with contextlib.suppress(Exception):
                p.join(timeout=5)
        self._pool = None

    def close(self) -> None:
        """Shut the pool down (terminating workers if a map was abandoned)."""
        self._abort()


# -- Dask distributed --------------------------------------------------------------
#: How to install the optional Dask extra (schedforge is installed from its checkout).
DASK_INSTALL_HINT = (
    'install it with pip install "dask[distributed]>=2024.1" (or, from the schedforge '
    'checkout, pip install -e ".[dask]")'
)


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError as exc:
        raise InputError(
            "--executor",
            f"dask is not installed ({exc}); {DASK_INSTALL_HINT}",
        ) from None
    return distributed


#: Seconds to wait for a first Dask worker, or with no worker left during a sweep.
DASK_WORKER_TIMEOUT_S = 60.0
#: Address schemes Dask's communication layer knows.
DASK_SCHEMES = ("tcp", "tls", "inproc", "ucx", "ws", "wss")


def check_scheduler_address(address: str) -> str:
    """Check that ``address`` looks like a Dask scheduler address; return it.

    ``scheme://host:port`` with a scheme of :data:`DASK_SCHEMES`, or ``host:port``.

    Raises
    ------
    InputError
        Naming ``--scheduler``.
    """
    import urllib.parse

    shown = address if len(address) <= 80 else address[:77] + "..."
    rule = f"must be a Dask scheduler address such as tcp://host:8786, got {shown!r}"
    text = address.strip()
    if not text or any(c.isspace() for c in text):
        raise InputError("--scheduler", rule)
    if "://" not in text:
        text = f"tcp://{text}"
    try:
        parts = urllib.parse.urlsplit(text)
        port = parts.port
    except ValueError:
        raise InputError("--scheduler", rule) from None
    if parts.scheme not in DASK_SCHEMES or (parts.scheme != "inproc" and not parts.hostname):
        raise InputError("--scheduler", rule)
    if parts.scheme in ("tcp", "tls") and port is None:
        raise InputError("--scheduler", f"{rule} (the port is missing)")
    return address


class DaskExecutor(Executor):
    """Dask distributed: join a running cluster or start a LocalCluster.

    Parameters
    ----------
    scheduler : str, optional
        Address of an existing scheduler (``tcp://host:8786``).
    dask_local : int, optional
        Start a LocalCluster with this many single-threaded worker processes.
        Exactly one of ``scheduler`` and ``dask_local`` is needed.
    retries : int, optional
        Extra attempts for a task whose function raised.  A worker that dies
        mid-task is handled by the scheduler itself: the task is rescheduled on
        another worker (up to Dask's ``distributed.scheduler.allowed-failures``);
        past that the item is yielded as :class:`TaskLost`.
    connect_timeout_s : float, optional
        How long to wait for ``scheduler``.
    worker_timeout_s : float, optional
        How long to wait for a first worker when the cluster has none, and how
        long a sweep waits with no worker at all (all died) before the
        remaining items are yielded as :class:`TaskLost`.
    """

    kind = "dask"

    def __init__(
        self,
        scheduler: str | None = None,
        dask_local: int | None = None,
        *,
        retries: int = 2,
        connect_timeout_s: float = 20.0,
        worker_timeout_s: float = DASK_WORKER_TIMEOUT_S,
    ) -> None:
        if (scheduler is None) == (dask_local is None):
            raise InputError(
                "--executor dask", "needs exactly one of --scheduler ADDRESS or --dask-local N"
            )
        if scheduler is not None:
            check_scheduler_address(scheduler)
        distributed = _import_distributed()
        self.retries = int(retries)
        self.worker_timeout_s = float(worker_timeout_s)
        self._cluster = None
        self._client = None
        if dask_local is not None:
            with single_thread_env():
                self._cluster = distributed.LocalCluster(
                    n_workers=int(dask_local),
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=None,
                )
            address = self._cluster.scheduler_address
        else:
            address = scheduler
        try:
            self._client = distributed.Client(address, timeout=connect_timeout_s)
        except (OSError, TimeoutError, ValueError, TypeError) as exc:
            self.close()
            raise InputError(
                "--scheduler",
                f"could not connect to a Dask scheduler at {address!r}: "
                f"{type(exc).__name__}: {str(exc)[:200]}",
            ) from None
        self.address = address
        try:
            self._client.wait_for_workers(1, timeout=self.worker_timeout_s)
        except (TimeoutError, OSError):
            self.close()
            raise InputError(
                "--scheduler",
                f"names a Dask scheduler ({address}) with no workers: none joined within "
                f"{self.worker_timeout_s:g} s; start workers for it (they need the same "
                "schedforge installed) or use --dask-local N",
            ) from None
        nthreads = self._client.nthreads()
        self.workers = max(1, sum(nthreads.values()))

    def describe(self) -> str:
        """E.g. ``"dask at tcp://127.0.0.1:8786 (4 workers)"``."""
        where = "LocalCluster" if self._cluster is not None else self.address
        return f"dask {where} ({self.workers} worker threads)"

    def _n_workers(self) -> int:
        try:
            return len(self._client.scheduler_info().get("workers", {}))
        except Exception:  # scheduler gone: counts as no worker
            return 0

    def map_unordered(
        self, fn: Callable[[Any], Any], items: Iterable[Any]
    ) -> Iterator[tuple[Any, Any]]:
        """See :meth:`Executor.map_unordered`.

        When the cluster has had no worker for ``worker_timeout_s`` (all died),
        the items not finished are yielded as :class:`TaskLost`.
        """
        distributed = _import_distributed()
        items = list(items)
        futures = [
            self._client.submit(fn, item, pure=False, retries=self.retries) for item in items
        ]
        index = {fut.key: i for i, fut in enumerate(futures)}
        pending = set(futures)
        idle_since: float | None = None
        poll = min(5.0, max(0.1, self.worker_timeout_s / 4))
        try:
            while pending:
                try:
                    done = set(
                        distributed.wait(
                            list(pending), timeout=poll, return_when="FIRST_COMPLETED"
                        ).done
                    )
                except TimeoutError:
                    done = set()
                if not done:
                    if self._n_workers() > 0:
                        idle_since = None
                        continue
                    now = time.monotonic()
                    idle_since = now if idle_since is None else idle_since
                    if now - idle_since < self.worker_timeout_s:
                        continue
                    reason = (
                        f"no Dask worker left for {self.worker_timeout_s:g} s (all died or "
                        "left); rerun when the cluster has workers"
                    )
                    for fut in list(pending):
                        yield items[index[fut.key]], TaskLost(reason)
                    self._client.cancel(list(pending))
                    return
                idle_since = None
                for fut in done:
                    pending.discard(fut)
                    item = items[index[fut.key]]
                    try:
                        result = fut.result()
                    except distributed.KilledWorker as exc:
                        result = TaskLost(f"Dask workers died running it: {exc}")
                    yield item, result
                    fut.release()
        except BaseException:
            self._client.cancel(list(pending))
            raise

    def close(self) -> None:
        """Close the client (and the LocalCluster this executor started)."""
        client = getattr(self, "_client", None)
        if client is not None:
            with contextlib.suppress(Exception):
                client.close()
            self._client = None
        if self._cluster is not None:
            with contextlib.suppress(Exception):
                self._cluster.close()
            self._cluster = None


def make_executor(
    kind: str = "processes",
    workers: int | None = None,
    scheduler: str | None = None,
    dask_local: int | None = None,
) -> Executor:
    """Create an executor.

    Parameters
    ----------
    kind : {"serial", "processes", "dask"}
        Which executor.  ``scheduler`` or ``dask_local`` imply ``"dask"``.
    workers : int, optional
        Processes for ``"processes"`` (default: all cores).
    scheduler : str, optional
        Dask scheduler address to join.
    dask_local : int, optional
        Start a Dask LocalCluster with this many workers.

    Returns
    -------
    Executor

    Raises
    ------
    InputError
        Unknown kind, a non-positive number, or options that do not go together.
    """
    if kind not in EXECUTOR_KINDS:
        raise InputError("--executor", f"must be one of {', '.join(EXECUTOR_KINDS)}, got {kind!r}")
    for name, value in (("--workers", workers), ("--dask-local", dask_local)):
        if value is not None and (isinstance(value, bool) or int(value) != value or value < 1):
            raise InputError(name, f"must be an integer >= 1, got {value!r}")
    if scheduler is not None and not str(scheduler).strip():
        raise InputError("--scheduler", "must be a scheduler address such as tcp://host:8786")
    if scheduler is not None and dask_local is not None:
        raise InputError("--scheduler", "cannot be combined with --dask-local (pick one)")
    if (scheduler is not None or dask_local is not None) and kind != "dask":
        if kind == "processes":
            kind = "dask"
        else:
            raise InputError("--executor", f"{kind} cannot use --scheduler or --dask-local")
    if workers is not None and kind != "processes":
        raise InputError("--workers", f"applies to --executor processes only, not {kind}")
    if kind == "serial":
        return SerialExecutor()
    if kind == "processes":
        return ProcessExecutor(workers)
    if scheduler is None and dask_local is None:
        dask_local = os.cpu_count() or 1
    return DaskExecutor(scheduler=scheduler, dask_local=dask_local)
