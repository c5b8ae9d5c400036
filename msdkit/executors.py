"""Executors: run one function over many batch tasks, serially, in local processes or on a Dask cluster.

All executors share one interface::

    with make_executor(executor_config, n_tasks=len(tasks)) as ex:
        for task, result in ex.run(fn, tasks, crash_result=..., on_frames=..., on_idle=...):
            ...

``fn(task, report)`` is called once per task, where ``report(stack, frames_done, frames_total)`` forwards
frame counts to the batch's progress display (or is ``None``); ``fn`` must catch its own exceptions and
return a result for every task. The executor's job is the machinery: it yields ``(task, result)`` pairs in
completion order and turns failures of the machinery itself — a worker process that dies (segfault, out of
memory), a Dask worker lost repeatedly — into a result built by ``crash_result(task, message)``, so one
input can never take the rest of the batch down.

Executors never change numbers: every task carries its own settings and seeds, so the same inputs give the
same results on every executor.
"""

from __future__ import annotations

import logging
import os
import pickle
import queue as queue_mod
import signal
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from .errors import ConfigError

log = logging.getLogger("msdkit.batch")

Report = Callable[[str, int, int], None]
FramesCallback = Callable[[str, int, int], None]
CrashResult = Callable[[Any, str], Any]

_POLL_S = 0.2
#: Seconds to wait for an outside Dask scheduler to answer before giving up.
DASK_CONNECT_TIMEOUT_S = 20.0
_WORKER_QUEUE = None  # set in local worker processes by _init_worker
_WORKER_SEND_EVERY_S = 0.5


def default_n_workers() -> int:
    """Return the number of CPU cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


class SerialExecutor:
    """Run tasks one after another in this process (for debugging and tiny batches)."""

    kind = "serial"

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        return None

    def describe(self) -> str:
        """Say where tasks run (for the log)."""
        return "serial (this process)"

    def run(self, fn, tasks: Iterable, *, crash_result: CrashResult, on_frames: FramesCallback | None = None,
            on_idle: Callable[[], None] | None = None) -> Iterator[tuple[Any, Any]]:
        """Yield ``(task, fn(task, report))`` for every task, in completion order."""
        for task in tasks:
            yield task, fn(task, on_frames)


# ------------------------------------------------------------------------------------- local processes
def _die_with_parent(parent_pid: int) -> None:
    """Have Linux kill this worker when the batch process dies (even by SIGKILL): no orphan keeps writing."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, int(signal.SIGKILL))  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        return
    if os.getppid() != parent_pid:  # the parent died before prctl took effect
        os._exit(1)


#: Environment variables that set the thread count of numpy's math libraries in worker processes.
_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _init_worker(q, parent_pid: int) -> None:
    global _WORKER_QUEUE
    _WORKER_QUEUE = q
    _die_with_parent(parent_pid)


def _queue_report() -> Report | None:
    q = _WORKER_QUEUE
    if q is None:
        return None
    last: dict[str, float] = {}

    def report(stack: str, done: int, total: int) -> None:
        now = time.monotonic()
        if done >= total or now - last.get(stack, 0.0) >= _WORKER_SEND_EVERY_S:
            last[stack] = now
            try:
                q.put_nowait((stack, int(done), int(total)))
            except Exception:  # progress must never fail a task
                pass

    return report


def _terminate_workers(pool: ProcessPoolExecutor) -> None:
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        try:
            proc.terminate()
        except Exception:  # already gone
            pass


def _call_in_worker(fn, task):
    return fn(task, _queue_report())


class ProcessExecutor:
    """Run tasks in a pool of local worker processes (``spawn`` start method, so it is safe with threads).

    At most ``n_workers`` tasks are in flight. If a worker process dies, the tasks that were in flight are
    rerun one at a time, each alone in a fresh process: the one that kills its process again is reported as
    failed, the innocent ones complete normally.
    """

    kind = "local"

    def __init__(self, n_workers: int | None = None) -> None:
        import multiprocessing as mp

        self.n_workers = n_workers or default_n_workers()
        self._ctx = mp.get_context("spawn")
        self._queue = None

    def describe(self) -> str:
        """Say where tasks run (for the log)."""
        return f"local processes ({self.n_workers} workers)"

    def __enter__(self):
        self._queue = self._ctx.Queue()
        # One math-library thread per worker: the workers already fill the cores, and multithreaded matrix
        # products in several processes at once oversubscribe them (common practice). Variables the user set
        # are left alone; the parent's own values are restored on exit.
        self._saved_env = {k: os.environ.get(k) for k in _THREAD_VARS}
        for k in _THREAD_VARS:
            os.environ.setdefault(k, "1")
        return self

    def __exit__(self, *exc) -> None:
        if self._queue is not None:
            self._queue.close()
            self._queue.join_thread()
            self._queue = None
        for k, v in getattr(self, "_saved_env", {}).items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        self._saved_env = {}

    def _pool(self, n: int) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=n, mp_context=self._ctx, initializer=_init_worker,
                                   initargs=(self._queue, os.getpid()))

    def _drain(self, on_frames: FramesCallback | None) -> None:
        while True:
            try:
                msg = self._queue.get_nowait()
            except queue_mod.Empty:
                return
            except (OSError, ValueError, EOFError):  # queue closed
                return
            if on_frames is not None:
                on_frames(*msg)

    def run(self, fn, tasks: Iterable, *, crash_result: CrashResult, on_frames: FramesCallback | None = None,
            on_idle: Callable[[], None] | None = None) -> Iterator[tuple[Any, Any]]:
        """Yield ``(task, fn(task, report))`` for every task, in completion order."""
        try:
            pickle.dumps(fn)
        except Exception as exc:
            raise TypeError(
                f"the per-input function {fn!r} cannot be sent to worker processes ({exc}); define it at the "
                "top level of an importable module, or use executor kind 'serial'."
            ) from None
        todo = list(tasks)
        todo.reverse()  # pop() from the end keeps input order
        suspects: list = []

        def idle():
            self._drain(on_frames)
            if on_idle is not None:
                on_idle()

        while todo or suspects:
            # Rerun tasks that were in flight when a worker died, each alone in a fresh process.
            while suspects:
                task = suspects.pop(0)
                with self._pool(1) as pool:
                    fut = pool.submit(_call_in_worker, fn, task)
                    while not fut.done():
                        wait([fut], timeout=_POLL_S)
                        idle()
                    try:
                        result = fut.result()
                    except BrokenProcessPool:
                        result = crash_result(task, "the worker process ended abruptly while processing "
                                               "this input (crash or out of memory)")
                    except Exception as exc:
                        result = crash_result(task, f"{type(exc).__name__}: {exc}")
                idle()
                yield task, result
            if not todo:
                break
            n = max(1, min(self.n_workers, len(todo)))
            pool = self._pool(n)
            in_flight: dict[Future, Any] = {}
            broken = finished = False
            try:
                while (todo or in_flight) and not broken:
                    while todo and len(in_flight) < n:
                        task = todo.pop()
                        in_flight[pool.submit(_call_in_worker, fn, task)] = task
                    done, _ = wait(list(in_flight), timeout=_POLL_S, return_when=FIRST_COMPLETED)
                    idle()
                    for fut in done:
                        task = in_flight.pop(fut)
                        try:
                            result = fut.result()
                        except BrokenProcessPool:
                            broken = True
                            suspects.append(task)
                            continue
                        except Exception as exc:  # e.g. a result that cannot be pickled
                            result = crash_result(task, f"{type(exc).__name__}: {exc}")
                        yield task, result
                if broken:
                    log.warning("a worker process died; rerunning the %d input(s) that were in flight one by "
                                "one to find the culprit", len(suspects) + len(in_flight))
                    suspects.extend(in_flight.values())
                    in_flight.clear()
                finished = True
            finally:
                if not finished:  # interrupted (Ctrl-C, consumer closed us): stop our workers now
                    _terminate_workers(pool)
                pool.shutdown(wait=finished and not broken, cancel_futures=True)
        idle()


# ------------------------------------------------------------------------------------------------------- dask
_DASK_HINT = "Install it with: pip install 'msdkit[distributed]' (or pip install 'dask[distributed]')."


def _import_distributed():
    try:
        import distributed
    except ImportError as exc:
        raise ConfigError(f"executor.kind 'dask' needs the dask.distributed package, which is not installed "
                          f"({exc}). {_DASK_HINT}") from None
    return distributed


class DaskExecutor:
    """Run tasks on a Dask cluster: an existing scheduler (``address``) or a local cluster started on demand.

    With ``address`` the workers must see the same file paths as this machine (a shared file system) and have
    msdkit installed. Without it a ``distributed.LocalCluster`` on 127.0.0.1 with ``n_workers``
    single-threaded worker processes is started for the batch and closed after it.
    """

    kind = "dask"

    def __init__(self, address: str | None = None, n_workers: int | None = None,
                 connect_timeout_s: float | None = None) -> None:
        self.address = address
        self.n_workers = n_workers
        self.connect_timeout_s = DASK_CONNECT_TIMEOUT_S if connect_timeout_s is None else connect_timeout_s
        self.client = None
        self._cluster = None

    def describe(self) -> str:
        """Say where tasks run (for the log)."""
        if self.address:
            return f"Dask scheduler at {self.address}"
        return f"local Dask cluster on 127.0.0.1 ({self.n_workers} workers)"

    def __enter__(self):
        distributed = _import_distributed()
        if self.address:
            try:
                self.client = distributed.Client(self.address, timeout=f"{self.connect_timeout_s}s",
                                                 set_as_default=False)
            except (OSError, TimeoutError) as exc:
                raise ConfigError(
                    f"executor.address: cannot reach a Dask scheduler at {self.address!r} ({exc}). Start the "
                    "scheduler (dask scheduler) and its workers, or fix the address (tcp://host:port)."
                ) from None
        else:
            self.n_workers = self.n_workers or default_n_workers()
            self._cluster = distributed.LocalCluster(
                n_workers=self.n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                # free ports on loopback: never clash with another cluster on this machine
                scheduler_port=0, dashboard_address="127.0.0.1:0",
            )
            self.client = distributed.Client(self._cluster, set_as_default=False)
        return self

    def __exit__(self, *exc) -> None:
        if self.client is not None:
            self.client.close()
            self.client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def run(self, fn, tasks: Iterable, *, crash_result: CrashResult, on_frames: FramesCallback | None = None,
            on_idle: Callable[[], None] | None = None) -> Iterator[tuple[Any, Any]]:
        """Yield ``(task, fn(task, report))`` for every task, in completion order."""
        import uuid

        distributed = _import_distributed()
        tasks = list(tasks)
        if not tasks:
            return
        token = uuid.uuid4().hex[:8]
        futures = {}
        for i, task in enumerate(tasks):
            fut = self.client.submit(fn, task, None, key=f"msdkit-{token}-{i}", pure=False)
            futures[fut.key] = (fut, task)
        try:
            for fut in distributed.as_completed([f for f, _ in futures.values()], loop=self.client.loop):
                _, task = futures.pop(fut.key)
                try:
                    result = fut.result()
                except distributed.KilledWorker:
                    result = crash_result(task, "the Dask worker processing this input died repeatedly "
                                           "(crash or out of memory)")
                except Exception as exc:
                    result = crash_result(task, f"{type(exc).__name__}: {exc}")
                if on_idle is not None:
                    on_idle()
                yield task, result
        finally:
            for fut, _ in futures.values():
                fut.cancel()


def make_executor(kind: str = "local", *, n_workers: int | None = None, address: str | None = None,
                  n_tasks: int | None = None):
    """Build the executor named by ``executor.kind`` (``local``, ``serial`` or ``dask``).

    ``n_tasks`` caps the number of local worker processes (no idle processes for a short batch).
    """
    if kind == "serial":
        return SerialExecutor()
    if kind == "local":
        n = n_workers or default_n_workers()
        if n_tasks is not None:
            n = max(1, min(n, n_tasks))
        return ProcessExecutor(n)
    if kind == "dask":
        if address is None and n_tasks is not None:
            n_workers = max(1, min(n_workers or default_n_workers(), n_tasks))
        return DaskExecutor(address=address, n_workers=n_workers)
    raise ConfigError(f"executor.kind must be one of local, serial, dask; got {kind!r}. Fix the config.")
