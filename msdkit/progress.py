"""Progress display and log files for batch runs.

On a terminal the batch shows a bar for the whole batch (stacks) and one bar per stack being processed
(frames); elsewhere (a pipe, a cluster job's log) it writes plain log lines instead. Every run also writes
``msdkit.log`` in its output folder; worker processes append to the same file.

The per-stack frames callback handed to :func:`msdkit.pipeline.process_input` has the signature
``progress(frames_done: int, frames_total: int) -> None``; it is cheap to call after every chunk.
"""

from __future__ import annotations

import logging
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Literal

ProgressMode = Literal["bars", "log", "off"]

LOG_FORMAT = "%(asctime)s %(process)d %(levelname)s %(name)s: %(message)s"

_log = logging.getLogger("msdkit.batch")
_lock = threading.Lock()
_file_handlers: dict[str, list] = {}  # resolved path -> [handler, refcount]
_saved_level = [logging.NOTSET]  # level of the "msdkit" logger before the first file handler was attached


def choose_mode(progress: bool | str | None) -> ProgressMode:
    """Resolve the ``progress`` argument of :func:`msdkit.batch.run_batch` to a display mode.

    ``True`` (default) shows bars on a terminal and log lines otherwise; ``False``/``None`` shows neither;
    ``"bars"``, ``"log"`` and ``"off"`` force a mode.
    """
    if progress in ("bars", "log", "off"):
        return progress  # type: ignore[return-value]
    if not progress:
        return "off"
    stream = sys.stderr
    return "bars" if stream is not None and hasattr(stream, "isatty") and stream.isatty() else "log"


@contextmanager
def log_to_file(path: str | Path) -> Iterator[None]:
    """Append msdkit's log records (INFO and above) to ``path`` while the block runs.

    Re-entrant and shared: nested or concurrent uses with the same file (the batch runner and in-process
    workers) attach one handler only. The ``msdkit`` logger is lowered to INFO for the duration if needed.
    """
    key = str(Path(path).resolve())
    logger = logging.getLogger("msdkit")
    with _lock:
        entry = _file_handlers.get(key)
        if entry is None:
            if not _file_handlers:
                _saved_level[0] = logger.level
                if logger.getEffectiveLevel() > logging.INFO:
                    logger.setLevel(logging.INFO)
            Path(key).parent.mkdir(parents=True, exist_ok=True)
            handler = logging.FileHandler(key, mode="a", encoding="utf-8")
            handler.setLevel(logging.INFO)
            handler.setFormatter(logging.Formatter(LOG_FORMAT))
            logger.addHandler(handler)
            entry = _file_handlers[key] = [handler, 0]
        entry[1] += 1
    try:
        yield
    finally:
        with _lock:
            entry[1] -= 1
            if entry[1] == 0:
                handler = _file_handlers.pop(key)[0]
                logger.removeHandler(handler)
                handler.close()
                if not _file_handlers:
                    logger.setLevel(_saved_level[0])


class _TqdmHandler(logging.Handler):
    """Console handler that prints above the progress bars instead of through them."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            from tqdm import tqdm

            tqdm.write(self.format(record), file=sys.stderr)
        except Exception:  # pragma: no cover - logging must never raise
            self.handleError(record)


@contextmanager
def console_logging(mode: ProgressMode) -> Iterator[None]:
    """Route msdkit's console messages for the duration of a batch.

    ``log``: INFO lines on stderr. ``bars``: warnings and errors printed above the bars. ``off``: warnings
    and errors only. Records are not passed on to the root logger meanwhile, so a root handler set up by the
    caller cannot print INFO lines through the bars; the log file still gets everything.
    """
    logger = logging.getLogger("msdkit")
    handler: logging.Handler = _TqdmHandler() if mode == "bars" else logging.StreamHandler(sys.stderr)
    handler.setLevel(logging.INFO if mode == "log" else logging.WARNING)
    handler.setFormatter(logging.Formatter("%(levelname)s %(message)s" if mode != "log" else
                                           "%(asctime)s %(message)s", datefmt="%H:%M:%S"))
    old_propagate = logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.propagate = old_propagate


class BatchProgress:
    """Batch progress: a stacks bar plus per-stack frame bars (``bars``), log lines (``log``) or nothing.

    Call from one thread only (the batch runner's); worker processes send their frame counts through the
    executor, which hands them to :meth:`frames`.
    """

    def __init__(self, n_total: int, *, n_done: int = 0, mode: ProgressMode = "log",
                 log_every_s: float = 15.0) -> None:
        self.mode = mode
        self.n_total = n_total
        self.n_done = n_done
        self._log_every_s = log_every_s
        self._last_logged: dict[str, float] = {}
        self._bars: dict[str, object] = {}
        self._finished: set[str] = set()  # frame counts can arrive after the stack's result: ignore them
        self._main = None
        if mode == "bars":
            from tqdm import tqdm

            self._main = tqdm(total=n_total, initial=n_done, desc="stacks", unit="stack", position=0,
                              dynamic_ncols=True, file=sys.stderr)

    def _free_position(self) -> int:
        used = {getattr(b, "pos", 0) for b in self._bars.values()}
        used = {abs(p) for p in used}
        pos = 1
        while pos in used:
            pos += 1
        return pos

    def frames(self, stack: str, frames_done: int, frames_total: int) -> None:
        """Record that ``stack`` has ``frames_done`` of ``frames_total`` frames processed."""
        if stack in self._finished:
            return
        if self.mode == "bars":
            from tqdm import tqdm

            bar = self._bars.get(stack)
            if bar is None:
                bar = self._bars[stack] = tqdm(
                    total=frames_total, desc=stack[:24], unit="frame", position=self._free_position(),
                    leave=False, dynamic_ncols=True, file=sys.stderr,
                )
            if bar.total != frames_total:
                bar.total = frames_total
            bar.update(max(0, frames_done - bar.n))
        elif self.mode == "log":
            now = time.monotonic()
            last = self._last_logged.get(stack)
            if last is None:
                self._last_logged[stack] = now
            elif now - last >= self._log_every_s:
                self._last_logged[stack] = now
                _log.info("%s: %d/%d frames", stack, frames_done, frames_total)

    def finished(self, row) -> None:
        """Record a completed stack (a :class:`msdkit.batch.StackRow`)."""
        self.n_done += 1
        self._finished.add(row.stack)
        self._last_logged.pop(row.stack, None)
        bar = self._bars.pop(row.stack, None)
        if bar is not None:
            bar.close()
        if self._main is not None:
            self._main.update(1)
        if row.status == "ok":
            _log.info("[%d/%d] %s: ok, %d tracks, D = %.4g µm²/s (%.1f s)", self.n_done, self.n_total,
                      row.stack, row.n_tracks, row.D_um2_s, row.run_s)
        # failures are logged as warnings by the batch runner (visible in every mode)

    def close(self) -> None:
        """Close every bar."""
        for bar in self._bars.values():
            bar.close()
        self._bars.clear()
        if self._main is not None:
            self._main.close()
            self._main = None
