"""How many threads one analysis may use, and a helper that runs independent stages beside each other.

The stages of :func:`msdkit.pipeline.analyze_tracks` that only read the tracks (the step-model fits of the
motion classes, the size distribution, the ensemble MSD) can run in a second thread while the per-track fits
run in the calling one: their heavy parts are compiled kernels that release the GIL (``nogil=True``), FFTs,
matrix products and whole-array numpy operations, which release it too. Each stage does exactly the
arithmetic it does alone, so the results are the same numbers whichever way they run.

Thread limit: the CPUs this process may run on, capped by ``NUMBA_NUM_THREADS`` and ``OMP_NUM_THREADS`` when
they are set, and one when the machine is busy (load average at or above the CPUs). msdkit's local worker
processes and Dask's worker processes get ``OMP_NUM_THREADS=1`` (the workers already fill the cores; common
practice), so there every stage runs in the calling thread, in order.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import Future, ThreadPoolExecutor

#: A flag one thread sets to tell work started ahead of need in another thread to stop (threading.Event).
StopFlag = threading.Event

#: Environment variable that sets the threads of one analysis whatever the machine's load (capped as below).
THREADS_VAR = "MSDKIT_THREADS"

#: Environment variables that cap the threads of one process (the first two are set to 1 in worker processes).
_LIMIT_VARS = ("OMP_NUM_THREADS", "NUMBA_NUM_THREADS")


#: Fewest positions (table rows) for which an analysis uses a second thread: on small tables the stages are
#: many small numpy operations that hold the GIL, and a second thread only adds switching (150 tracks of
#: 20-80 points, 7,500 rows: 0.92 s with two threads against 0.83 s with one; 10 M rows: 10-11 s against
#: 16-17 s). Sizes in between were not measured; the cut is a round number well below the large case.
MIN_ROWS_FOR_THREADS = 100_000


def _threads_set_by_user() -> int | None:
    """Return the thread count ``MSDKIT_THREADS`` sets (a whole number >= 1), or None."""
    chosen = os.environ.get(THREADS_VAR, "").strip()
    return int(chosen) if chosen.isdigit() and int(chosen) >= 1 else None


def analysis_threads(*, load: float | None = None) -> int:
    """Threads one analysis may use (>= 1).

    The usable CPUs, capped by OMP_NUM_THREADS / NUMBA_NUM_THREADS; one only when the machine is busy:
    ``load`` (default: the 1-minute load average, which counts this process too) at or above the number of
    CPUs. Measured on a shared 2-core machine (20,000-track table): at load 1.5–1.6 the analysis took 10.0–
    10.7 s with two threads against 16.1–17.2 s with one; at load 4–6 two threads were no faster and used
    ~10 % more CPU time and ~0.3 GB more memory, so a busy machine runs the stages one after another. The
    numbers are the same either way. ``MSDKIT_THREADS`` (a whole number >= 1) sets the count instead of the
    load, within the caps above.
    """
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        n = os.cpu_count() or 1
    for var in _LIMIT_VARS:
        value = os.environ.get(var, "").strip()
        if value.isdigit() and int(value) >= 1:
            n = min(n, int(value))
    chosen = _threads_set_by_user()
    if chosen is not None:
        return max(1, min(n, chosen))
    if load is None:
        try:
            load = os.getloadavg()[0]
        except (AttributeError, OSError):  # no load average on this system
            load = 0.0
    return 1 if float(load) >= n else max(1, n)


class Beside:
    """Run callables in one extra thread, in the order given, while the caller goes on.

    With a thread limit of 1 (or ``threads=1``, or ``rows`` below :data:`MIN_ROWS_FOR_THREADS` unless
    ``MSDKIT_THREADS`` is set) each callable runs at once in the calling thread. ``submit``
    returns a :class:`concurrent.futures.Future`; ``result()`` re-raises the callable's exception in the
    caller. Used as a context manager (any number of times), leaving the block with an error cancels the
    callables not yet started and waits for the running one, so that no work outlives the failed call;
    leaving it normally lets them run on (collect them with ``result()``). The thread ends when the object
    is closed or dropped.
    """

    def __init__(self, threads: int | None = None, *, rows: int | None = None) -> None:
        n = analysis_threads() if threads is None else int(threads)
        forced = _threads_set_by_user() is not None
        if threads is None and rows is not None and rows < MIN_ROWS_FOR_THREADS and not forced:
            n = 1  # a small table (``rows`` positions): see MIN_ROWS_FOR_THREADS
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="msdkit-stage") if n > 1 else None

    @property
    def threaded(self) -> bool:
        """Whether callables run in the extra thread (False: at once, in the calling thread)."""
        return self._pool is not None

    def submit(self, fn, /, *args, **kwargs) -> Future:
        if self._pool is not None:
            return self._pool.submit(fn, *args, **kwargs)
        done: Future = Future()
        try:
            done.set_result(fn(*args, **kwargs))
        except Exception as exc:  # handed to the caller by result(), as from a thread
            done.set_exception(exc)
        return done

    def close(self, *, cancel: bool = False) -> None:
        """Take no more callables; with ``cancel``, drop those not started and wait for the running one."""
        if self._pool is not None:
            self._pool.shutdown(wait=cancel, cancel_futures=cancel)

    def __enter__(self) -> Beside:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            self.close(cancel=True)

    def __del__(self) -> None:
        pool = getattr(self, "_pool", None)
        if pool is not None:
            pool.shutdown(wait=False)
