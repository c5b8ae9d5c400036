"""Many inputs through the pipeline: executors, failure isolation, resume, batch summary and report.

``run_batch`` expands the config's inputs, gives each a unique stack name (its file stem, with ``_2``,
``_3`` … appended when two inputs share one), skips inputs finished by an earlier run with the same
settings and the same input file, runs the rest on the configured executor and writes ``batch_summary.csv``
after every input.

Guarantees
----------
* **Failure isolation.** Any exception while processing one input — and even a worker process that dies —
  gives that input ``status failed`` with a one-line error in ``batch_summary.csv`` and the full traceback in
  ``DIR/<stack>/error.log``; the other inputs complete. The exit code is 1 if any input failed, else 0.
* **Resume.** When an input finishes, ``DIR/<stack>/.done.json`` records the settings hash (the config without
  ``inputs``, ``output_dir`` and ``executor``), the input file's SHA-256 and the size of every output file. A
  rerun skips an input only if all of these still match; ``force=True`` recomputes everything. Failed inputs
  are always retried.
* **Crash safety.** Every file is written to a temporary name and renamed (:mod:`msdkit.io.atomic`), the batch
  summary is rewritten after each input, and ``.done.json`` is written last; a run killed at any moment and
  rerun therefore ends with every output complete.
* **Same numbers on every executor.** Each task carries the full config, including ``analysis.seed``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import threading
import time
import traceback
import warnings
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ._version import __version__
from .errors import ConfigError, MsdkitError

log = logging.getLogger("msdkit.batch")

SUMMARY_FILE = "batch_summary.csv"
LOG_FILE = "msdkit.log"
DONE_FILE = ".done.json"
ERROR_FILE = "error.log"
_STACK_SUFFIXES = (".ome.tiff", ".ome.tif", ".csv.gz", ".tsv.gz")
_MAX_ERROR_CHARS = 400
_TAIL_COLUMNS = ("n_warnings", "input", "run_s", "resumed")

#: Signature of the per-input function: ``process(input_path, cfg, stack_dir, *, stack_name, progress)``.
ProcessInput = Callable[..., Any]


# ------------------------------------------------------------------------------------------------- rows
@dataclass(frozen=True)
class StackRow:
    """One input's line of the batch summary."""

    stack: str
    status: str  # "ok" | "failed"
    error: str = ""
    n_tracks: int = 0
    D_um2_s: float = math.nan
    alpha: float = math.nan
    radius_nm: float = math.nan
    flags: tuple[str, ...] = ()
    input_path: str = ""
    run_s: float = math.nan
    resumed: bool = False
    n_warnings: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    def record(self) -> dict[str, Any]:
        """Flat dict for the summary table: contract columns, extra numbers, then the tail columns."""
        failed = self.status != "ok"
        rec: dict[str, Any] = {
            "stack": self.stack,
            "status": self.status,
            "error": self.error,
            "n_tracks": None if failed else int(self.n_tracks),
            "D_um2_s": self.D_um2_s,
            "alpha": self.alpha,
            "radius_nm": self.radius_nm,
            "flags": ";".join(self.flags),
        }
        for k, v in self.extra.items():
            rec.setdefault(k, v)
        rec.update(n_warnings=int(self.n_warnings), input=self.input_path, run_s=self.run_s,
                   resumed=self.resumed)
        return rec

    def to_json(self) -> dict[str, Any]:
        """JSON-ready dict (used in ``.done.json``)."""
        d = dataclasses.asdict(self)
        d["flags"] = list(self.flags)
        return d

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> StackRow:
        """Inverse of :meth:`to_json` (``None`` numbers become NaN)."""
        names = {f.name for f in dataclasses.fields(cls)}
        kw = {k: v for k, v in d.items() if k in names}
        for k in ("D_um2_s", "alpha", "radius_nm", "run_s"):
            if kw.get(k) is None:
                kw[k] = math.nan
        kw["flags"] = tuple(kw.get("flags") or ())
        kw["extra"] = dict(kw.get("extra") or {})
        return cls(**kw)


def summary_table(rows: Iterable[StackRow]):
    """Build the batch summary table: the contract's columns, extras, n_warnings, input, run_s, resumed."""
    import numpy as np
    import pandas as pd

    from .schema import BATCH_SUMMARY_COLUMNS

    records = [r.record() for r in rows]
    cols = list(BATCH_SUMMARY_COLUMNS)
    for rec in records:
        cols += [k for k in rec if k not in cols and k not in _TAIL_COLUMNS]
    cols += list(_TAIL_COLUMNS)
    df = pd.DataFrame.from_records(records, columns=cols)
    df["n_tracks"] = pd.array([rec["n_tracks"] for rec in records], dtype="Int64")
    for c in ("D_um2_s", "alpha", "radius_nm", "run_s"):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype("float64")
    # Extra numbers: keep whole numbers whole (nullable integers) despite the gaps of failed rows.
    for c in cols[len(BATCH_SUMMARY_COLUMNS):-len(_TAIL_COLUMNS)]:
        vals = [rec.get(c) for rec in records]
        present = [v for v in vals if v is not None]
        if present and all(isinstance(v, int | np.integer) and not isinstance(v, bool) for v in present):
            df[c] = pd.array([None if v is None else int(v) for v in vals], dtype="Int64")
    df["error"] = df["error"].fillna("").astype(str)
    df["flags"] = df["flags"].fillna("").astype(str)
    return df


def write_summary(rows: Iterable[StackRow], output_dir: Path) -> Path:
    """Write ``batch_summary.csv`` atomically."""
    from .io.atomic import write_csv_atomic

    return write_csv_atomic(summary_table(rows), Path(output_dir) / SUMMARY_FILE)


@dataclass(frozen=True)
class BatchResult:
    """What a batch produced: one row per input (input order), the output folder and the exit code."""

    rows: tuple[StackRow, ...]
    output_dir: Path
    exit_code: int

    @property
    def n_ok(self) -> int:
        """Inputs with status ok."""
        return sum(r.status == "ok" for r in self.rows)

    @property
    def n_failed(self) -> int:
        """Inputs with status failed."""
        return sum(r.status != "ok" for r in self.rows)

    @property
    def n_resumed(self) -> int:
        """Inputs taken from an earlier run instead of being recomputed."""
        return sum(r.resumed for r in self.rows)

    @property
    def summary_path(self) -> Path:
        """Path of ``batch_summary.csv``."""
        return self.output_dir / SUMMARY_FILE

    def table(self):
        """Return the batch summary as a DataFrame."""
        return summary_table(self.rows)


# ------------------------------------------------------------------------------------------ names, hashes
def stack_name(path: str | Path) -> str:
    """Return the stack name of one input: its file stem (``a.ome.tif`` → ``a``), or a folder's name."""
    p = Path(path)
    name = p.name
    lower = name.lower()
    for suf in _STACK_SUFFIXES:
        if lower.endswith(suf) and len(name) > len(suf):
            name = name[: -len(suf)]
            break
    else:
        if not p.is_dir():
            name = Path(name).stem
    name = name.strip().lstrip(".")
    return name or "input"


def unique_stack_names(paths: Iterable[str | Path]) -> list[str]:
    """Stack names for a list of inputs, made unique (case-insensitively) by appending ``_2``, ``_3`` …."""
    used: set[str] = set()
    names = []
    for p in paths:
        base = stack_name(p)
        name, k = base, 2
        while name.lower() in used:
            name, k = f"{base}_{k}", k + 1
        used.add(name.lower())
        names.append(name)
    return names


def settings_hash(cfg) -> str:
    """SHA-256 of the settings that change one input's results.

    The config without ``inputs`` (adding files to a batch does not invalidate the others), ``output_dir`` and
    ``executor`` (where and how the batch runs does not change the numbers).
    """
    data = cfg.model_dump(mode="json", exclude={"inputs", "output_dir", "executor"})
    return hashlib.sha256(json.dumps(data, sort_keys=True, default=str).encode()).hexdigest()


def _safe_sha256(path: Path) -> str | None:
    from .io.atomic import file_sha256

    try:
        return file_sha256(path)
    except OSError:
        return None


def _future_sha256(future) -> str | None:
    try:
        return future.result()
    except OSError:
        return None


def _output_files(stack_dir: Path) -> dict[str, int]:
    from .io.atomic import TEMP_MARKER

    return {
        f.relative_to(stack_dir).as_posix(): f.stat().st_size
        for f in sorted(stack_dir.rglob("*"))
        if f.is_file() and f.name not in (DONE_FILE, ERROR_FILE) and TEMP_MARKER not in f.name
    }


def _read_done(stack_dir: Path) -> dict[str, Any] | None:
    try:
        done = json.loads((stack_dir / DONE_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return done if isinstance(done, dict) else None


def _outputs_intact(stack_dir: Path, done: dict[str, Any]) -> bool:
    files = done.get("files")
    if not isinstance(files, dict):
        return False
    for name, size in files.items():
        f = stack_dir / name
        try:
            if f.stat().st_size != size:
                return False
        except OSError:
            return False
    if "summary.json" in files:
        try:
            json.loads((stack_dir / "summary.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return False
    return True


# ----------------------------------------------------------------------------------------------- one task
@dataclass(frozen=True)
class StackTask:
    """Everything a worker needs to process one input (picklable)."""

    index: int
    input_path: str
    stack: str
    stack_dir: str
    cfg: Any
    settings_hash: str
    log_path: str
    input_sha256: str | None = None
    process: ProcessInput | None = None


def one_line_error(exc: BaseException) -> str:
    """Describe ``exc`` in one line: msdkit's own errors by their message, others with the type name."""
    msg = " ".join(str(exc).split())
    if not isinstance(exc, MsdkitError):
        msg = f"{type(exc).__name__}: {msg}" if msg else type(exc).__name__
    if len(msg) > _MAX_ERROR_CHARS:
        msg = msg[: _MAX_ERROR_CHARS - 1] + "…"
    return msg or "unknown error"


def _write_error_log(task: StackTask, message: str, tb: str | None) -> None:
    from .io.atomic import write_text_atomic

    now = datetime.now(UTC).isoformat(timespec="seconds")
    text = (
        f"stack: {task.stack}\ninput: {task.input_path}\ntime: {now}\nmsdkit: {__version__}\n"
        f"error: {message}\n\n{tb or ''}"
    )
    try:
        write_text_atomic(text, Path(task.stack_dir) / ERROR_FILE)
    except OSError as exc:  # the output folder itself is unwritable; the summary still records the error
        log.error("%s: cannot write %s: %s", task.stack, ERROR_FILE, exc)


def failed_row(task: StackTask, message: str, *, run_s: float = math.nan, tb: str | None = None) -> StackRow:
    """Record a failure of ``task``: write its ``error.log`` and return its summary row."""
    _write_error_log(task, message, tb)
    log.info("%s: failed (details in %s/%s)", task.stack, task.stack, ERROR_FILE)
    return StackRow(stack=task.stack, status="failed", error=message, input_path=task.input_path, run_s=run_s)


def _as_float(v) -> float:
    try:
        return float(v) if v is not None else math.nan
    except (TypeError, ValueError):
        return math.nan


def _row_from_outcome(outcome, task: StackTask, run_s: float) -> StackRow:
    status = getattr(outcome, "status", None)
    if status not in ("ok", "failed"):
        raise TypeError(f"the per-input function returned {type(outcome).__name__} with status {status!r}; "
                        "expected an InputOutcome with status 'ok' or 'failed'")
    flags = getattr(outcome, "flags", ()) or ()
    if isinstance(flags, str):
        flags = [f for f in flags.split(";") if f]
    return StackRow(
        stack=task.stack,
        status=status,
        error=" ".join(str(getattr(outcome, "error", "") or "").split()),
        n_tracks=int(getattr(outcome, "n_tracks", 0) or 0),
        D_um2_s=_as_float(getattr(outcome, "D_um2_s", None)),
        alpha=_as_float(getattr(outcome, "alpha", None)),
        radius_nm=_as_float(getattr(outcome, "radius_nm", None)),
        flags=tuple(str(f) for f in flags),
        input_path=task.input_path,
        run_s=run_s,
        extra=dict(getattr(outcome, "extra", None) or {}),
    )


def _default_process() -> ProcessInput:
    from .pipeline import process_input

    return process_input


def run_task(task: StackTask, report: Callable[[str, int, int], None] | None = None) -> StackRow:
    """Process one input in the current process and return its summary row; never raises ``Exception``.

    Clears the stack folder's completion record and old error log, calls the per-input function, and on
    success writes ``.done.json`` (last, atomically). Any exception becomes a failed row plus ``error.log``.
    """
    from .io.atomic import remove_stale_temp_files, start_file_sha256, write_json_atomic
    from .progress import log_to_file

    t0 = time.perf_counter()
    stack_dir = Path(task.stack_dir)
    with log_to_file(task.log_path):
        try:
            stack_dir.mkdir(parents=True, exist_ok=True)
            for name in (DONE_FILE, ERROR_FILE):
                (stack_dir / name).unlink(missing_ok=True)
            remove_stale_temp_files(stack_dir)
            log.info("%s: started (%s)", task.stack, task.input_path)
            # the checksum is read on a background thread while the input is analysed (the pipeline's
            # provenance record waits for the same digest instead of reading the file a second time)
            sha_future = None if task.input_sha256 else start_file_sha256(task.input_path)
            process = task.process or _default_process()
            frames_cb = None
            if report is not None:
                def frames_cb(done: int, total: int, _stack=task.stack) -> None:
                    report(_stack, done, total)
            with _warnings_to_log(task.stack) as caught:
                outcome = process(Path(task.input_path), task.cfg, stack_dir, stack_name=task.stack,
                                  progress=frames_cb)
            row = _row_from_outcome(outcome, task, time.perf_counter() - t0)
            row = dataclasses.replace(row, n_warnings=len(caught))
            sha = task.input_sha256 or _future_sha256(sha_future)
            if row.status != "ok":
                message = _name_input(task, row.error or "the input could not be analysed")
                return failed_row(task, message, run_s=row.run_s)
            done = {
                "format": 1,
                "stack": task.stack,
                "input_path": task.input_path,
                "input_sha256": sha,
                "settings_hash": task.settings_hash,
                "msdkit_version": __version__,
                "finished_utc": datetime.now(UTC).isoformat(timespec="seconds"),
                "files": _output_files(stack_dir),
                "row": row.to_json(),
            }
            write_json_atomic(done, stack_dir / DONE_FILE)
            return row
        except (Exception, SystemExit) as exc:
            return failed_row(task, _name_input(task, one_line_error(exc)), run_s=time.perf_counter() - t0,
                              tb=traceback.format_exc())


def _name_input(task: StackTask, message: str) -> str:
    """Start an error message with the input's file name unless it already names it."""
    name = Path(task.input_path).name
    return message if name in message else f"{name}: {message}"


@contextmanager
def _warnings_to_log(stack: str) -> Iterator[list]:
    """Record warnings raised while one input is processed and write each distinct one to the log.

    A warning must never fail an input, whatever the caller's warning filters say. Only done on the main
    thread: warning filters are process-wide, so threads (a multithreaded Dask worker) leave them alone.
    """
    if threading.current_thread() is not threading.main_thread():
        yield []
        return
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield caught
        finally:
            seen: dict[tuple, int] = {}
            for w in caught:
                key = (w.category.__name__, str(w.message), w.filename, w.lineno)
                seen[key] = seen.get(key, 0) + 1
            for (cat, msg, filename, lineno), n in seen.items():
                times = f" ({n} times)" if n > 1 else ""
                log.warning("%s: %s: %s%s [%s:%d]", stack, cat, msg, times, Path(filename).name, lineno)


def _crash_row(task: StackTask, message: str) -> StackRow:
    return failed_row(task, message)


# ---------------------------------------------------------------------------------------------- the batch
def _write_report(output_dir: Path, rows: list[StackRow]) -> None:
    import importlib

    try:
        report = importlib.import_module("msdkit.report")
    except ImportError as exc:
        log.info("report.html not written: the report module is not available (%s)", exc)
        return
    write_report = getattr(report, "write_report", None)
    if write_report is None:
        log.info("report.html not written: msdkit.report has no write_report yet")
        return
    try:
        write_report(output_dir, rows)
    except Exception as exc:  # the numbers are written; a report failure must not fail the batch
        log.warning("report.html not written: %s", one_line_error(exc))
        log.info("report traceback:\n%s", traceback.format_exc())


def run_batch(
    cfg,
    *,
    output_dir: str | Path | None = None,
    force: bool = False,
    process: ProcessInput | None = None,
    progress: bool | str = True,
) -> BatchResult:
    """Analyse every input of a config on its executor; return the summary rows and the exit code.

    Parameters
    ----------
    cfg : msdkit.config.Config
        The run's config; ``executor`` selects ``local`` (default: one process per core), ``serial`` or
        ``dask`` (``address`` of an existing scheduler, or a local cluster on 127.0.0.1 started for the
        batch).
    output_dir : str or Path, optional
        Overrides ``cfg.output_dir`` (relative paths resolve against the current folder).
    force : bool, default=False
        Recompute inputs even when an earlier run finished them with the same settings and input file.
    process : callable, optional
        The per-input function, ``process(input_path, cfg, stack_dir, *, stack_name, progress)`` returning an
        object with the fields of :class:`msdkit.pipeline.InputOutcome` (default:
        :func:`msdkit.pipeline.process_input`). For ``local`` and ``dask`` it must be importable by name.
    progress : bool or {"bars", "log", "off"}, default=True
        ``True``: progress bars on a terminal, plain log lines otherwise.

    Returns
    -------
    BatchResult
        ``rows`` in input order and ``exit_code`` (0 every input ok, 1 some failed).

    Raises
    ------
    ConfigError
        No input matched the config's ``inputs``, or the executor cannot start (Dask missing or scheduler
        unreachable); nothing has been run.
    """
    from .executors import make_executor
    from .io.atomic import remove_stale_temp_files
    from .progress import BatchProgress, choose_mode, console_logging, log_to_file

    out = Path(output_dir) if output_dir is not None else cfg.output_path()
    out = out.resolve()
    paths = [Path(p).resolve() for p in cfg.input_paths()]
    if not paths:
        raise ConfigError(
            f"{cfg.source}: inputs: no file matched {', '.join(map(repr, cfg.inputs))} (looked in "
            f"{Path(cfg.base_dir).resolve()}); expected at least one movie or track table. Check the "
            "patterns."
        )
    out.mkdir(parents=True, exist_ok=True)
    names = unique_stack_names(paths)
    s_hash = settings_hash(cfg)
    log_path = out / LOG_FILE
    mode = choose_mode(progress)
    ex_cfg = cfg.executor

    with log_to_file(log_path), console_logging(mode):
        # A run killed while writing leaves hidden temporary files; no writer of this batch is running yet.
        remove_stale_temp_files(out)
        for name in names:
            remove_stale_temp_files(out / name, recursive=True)
        log.info("msdkit %s: %d input(s) -> %s", __version__, len(paths), out)
        if ex_cfg.kind != "dask" and ex_cfg.address:
            log.info("executor.address is not used with executor.kind %r", ex_cfg.kind)

        # Resume: keep inputs whose completion record matches settings, input checksum and output files.
        rows: dict[int, StackRow] = {}
        tasks: list[StackTask] = []
        candidates = {}
        for i, name in enumerate(names):
            if not force and (done := _read_done(out / name)) is not None:
                candidates[i] = done
        hashes = _hash_many([paths[i] for i in candidates])
        for i, (path, name) in enumerate(zip(paths, names, strict=True)):
            sha = None
            if i in candidates:
                sha = hashes[paths[i]]
                done = candidates[i]
                recorded = (done.get("input_sha256"), done.get("settings_hash"))
                same = sha is not None and recorded == (sha, s_hash)
                if same and _outputs_intact(out / name, done) and isinstance(done.get("row"), dict):
                    prev = StackRow.from_json(done["row"])
                    rows[i] = dataclasses.replace(prev, stack=name, input_path=str(path), resumed=True)
                    continue
            tasks.append(StackTask(index=i, input_path=str(path), stack=name, stack_dir=str(out / name),
                                   cfg=cfg, settings_hash=s_hash, log_path=str(log_path), input_sha256=sha,
                                   process=process))
        if rows:
            log.info("%d input(s) already complete from an earlier run (use force to recompute)", len(rows))
        if tasks and ex_cfg.kind == "serial" and tasks[0].input_sha256 is None:
            # this process runs the first input next: its checksum is read (GIL released) while the
            # summary's modules are imported; run_task then takes the same digest
            from .io.atomic import start_file_sha256

            start_file_sha256(tasks[0].input_path)
        if tasks or not (out / SUMMARY_FILE).exists():
            write_summary([rows[i] for i in sorted(rows)], out)

        bar = BatchProgress(len(paths), n_done=len(rows), mode=mode)
        try:
            if tasks:
                executor = make_executor(ex_cfg.kind, n_workers=ex_cfg.n_workers, address=ex_cfg.address,
                                         n_tasks=len(tasks))
                with executor as ex:
                    log.info("running %d input(s) on %s", len(tasks), ex.describe())
                    for task, row in ex.run(run_task, tasks, crash_result=_crash_row, on_frames=bar.frames):
                        rows[task.index] = row
                        if row.status != "ok":
                            log.warning("%s: failed: %s", row.stack, row.error)
                        write_summary([rows[i] for i in sorted(rows)], out)
                        bar.finished(row)
        finally:
            bar.close()

        ordered = tuple(rows[i] for i in sorted(rows))
        write_summary(ordered, out)
        n_failed = sum(r.status != "ok" for r in ordered)
        log.info("batch finished: %d ok, %d failed, %d taken from an earlier run",
                 len(ordered) - n_failed, n_failed, sum(r.resumed for r in ordered))
        _write_report(out, list(ordered))
    return BatchResult(rows=ordered, output_dir=out, exit_code=1 if n_failed else 0)


def _hash_many(paths: list[Path]) -> dict[Path, str | None]:
    """SHA-256 of several files, read in parallel threads (hashlib releases the GIL)."""
    if not paths:
        return {}
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=min(4, len(paths))) as pool:
        return dict(zip(paths, pool.map(_safe_sha256, paths), strict=True))
