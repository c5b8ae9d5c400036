"""Atomic file writers and streamed file checksums.

Every writer puts the data into a temporary file in the destination folder, flushes it to disk (``fsync``)
and renames it over the destination with :func:`os.replace`. A reader therefore sees either the old file or
the complete new one, never a half-written file, even if the writing process is killed (SIGKILL, power cut)
mid-way. A killed writer can leave its temporary file behind; its name starts with a dot and contains
``TEMP_MARKER``, and :func:`remove_stale_temp_files` deletes such leftovers (the batch runner does so before
it starts).

All writers take the data first and the destination path second, create missing parent folders and return
the destination as a :class:`~pathlib.Path`.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import secrets
import sys
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import Future
from contextlib import contextmanager
from pathlib import Path
from typing import IO, Any

#: Part of the name of every temporary file the writers create: ``.<name>.msdkit-tmp-<random>``.
TEMP_MARKER = ".msdkit-tmp-"

_CHUNK_BYTES = 1 << 20


def _fsync_dir(folder: Path) -> None:
    """Make a rename durable by syncing the folder entry (POSIX only; ignored where unsupported)."""
    if os.name != "posix":
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextmanager
def _atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success sync it and rename it over ``path``.

    If the body raises, the temporary file is removed and the destination is left untouched.
    """
    dest = Path(path)
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.parent / f".{dest.name}{TEMP_MARKER}{secrets.token_hex(6)}"
    try:
        yield tmp
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, dest)
    except BaseException:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
        raise
    _fsync_dir(dest.parent)


def _write_with(path: str | os.PathLike, mode: str, writer: Callable[[IO], None], **open_kw) -> Path:
    with _atomic_path(path) as tmp:
        with open(tmp, mode, **open_kw) as fh:
            writer(fh)
    return Path(path)


def write_bytes_atomic(data: bytes, path: str | os.PathLike) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file, fsync, rename)."""
    return _write_with(path, "wb", lambda fh: fh.write(data))


def write_text_atomic(text: str, path: str | os.PathLike, *, encoding: str = "utf-8") -> Path:
    """Write ``text`` to ``path`` atomically; newlines are written as given (no platform translation)."""
    return _write_with(path, "w", lambda fh: fh.write(text), encoding=encoding, newline="")


def to_jsonable(obj: Any) -> Any:
    """Convert ``obj`` into plain JSON types.

    NaN and ±inf become ``None`` (JSON has no such numbers); numpy scalars and arrays, tuples, sets, paths,
    dataclasses, pandas Series and timestamps are converted; dict keys become strings. Anything else that
    JSON cannot hold raises ``TypeError``.
    """
    import numpy as np

    if obj is None or isinstance(obj, (str, bool)):
        return obj
    if isinstance(obj, int) and not isinstance(obj, bool):
        return int(obj)
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        items = sorted(obj, key=str) if isinstance(obj, (set, frozenset)) else obj
        return [to_jsonable(v) for v in items]
    if isinstance(obj, np.ndarray):
        return [to_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: to_jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if hasattr(obj, "isoformat"):  # datetime, pandas Timestamp
        return obj.isoformat()
    if hasattr(obj, "tolist"):  # pandas Series / Index
        return to_jsonable(obj.tolist())
    raise TypeError(f"cannot write a {type(obj).__name__} to JSON: {obj!r:.80}")


def write_json_atomic(obj: Any, path: str | os.PathLike, *, indent: int | None = 2) -> Path:
    """Write ``obj`` as JSON to ``path`` atomically.

    The object is passed through :func:`to_jsonable` first: NaN/inf → ``null``, numpy types → Python
    numbers. The result is strict JSON (``allow_nan=False``) that any JSON reader accepts.
    """
    text = json.dumps(to_jsonable(obj), indent=indent, allow_nan=False, ensure_ascii=False) + "\n"
    return write_text_atomic(text, path)


def write_csv_atomic(df, path: str | os.PathLike, *, index: bool = False, **to_csv_kw) -> Path:
    """Write a DataFrame to CSV atomically (no index by default; NaN written as an empty field).

    Without further options the text is formatted by pyarrow (:func:`msdkit.io.csvtext.csv_bytes`), the same
    bytes as ``df.to_csv(index=False)`` in a fraction of the time; tables with other column types, and any
    call with options, are written by pandas.
    """
    pd = sys.modules.get("pandas")
    if not index and not to_csv_kw and pd is not None and isinstance(df, pd.DataFrame):
        from .csvtext import csv_bytes

        data = csv_bytes(df)
        if data is not None:
            return write_bytes_atomic(data, path)
    return _write_with(
        path, "w", lambda fh: df.to_csv(fh, index=index, **to_csv_kw), encoding="utf-8", newline=""
    )


#: Share of its size that zstd must save on a column's first values for the column to be stored with zstd;
#: columns it barely shrinks (measured positions: random low digits, 3 % saved at 2-3 x the cost of snappy)
#: get snappy.
ZSTD_MIN_SAVING = 0.1
_CODEC_SAMPLE_BYTES = 1 << 20


def parquet_codecs(table) -> dict[str, str]:
    """Compression of each column of a pyarrow Table: ``zstd`` where it pays, ``snappy`` elsewhere.

    Each column's first ``_CODEC_SAMPLE_BYTES`` of values are compressed with zstd once (a few ms); a column
    that loses less than :data:`ZSTD_MIN_SAVING` of its size gets snappy, which costs a fraction of the time
    on data that does not compress (20,000-track table: track, frame and time_s shrink 100-fold with zstd;
    x_um and y_um by 3 %, for 0.25 s of the 0.45 s the whole write takes). Decoded, the file is the same
    whichever codecs it holds; both are in every Parquet reader.
    """
    import pyarrow as pa

    codecs = {}
    for name, column in zip(table.column_names, table.columns, strict=True):
        codec = "zstd"
        typ = column.type
        if (pa.types.is_integer(typ) or pa.types.is_floating(typ)) and column.num_chunks and len(column):
            width = typ.bit_width // 8
            first = column.chunk(0)
            sample = first.slice(0, min(len(first), _CODEC_SAMPLE_BYTES // width))
            if sample.null_count == 0 and len(sample):
                raw = sample.buffers()[1]
                raw = raw[sample.offset * width : (sample.offset + len(sample)) * width]
                packed = pa.compress(raw, codec="zstd", asbytes=False)
                if packed.size > (1 - ZSTD_MIN_SAVING) * raw.size:
                    codec = "snappy"
        codecs[name] = codec
    return codecs


def write_parquet_atomic(df, path: str | os.PathLike, *, compression: str | dict | None = None) -> Path:
    """Write a DataFrame to Parquet atomically with pyarrow (the index is not stored).

    ``compression``: a codec for every column, a dict by column, or None: each column's own
    (:func:`parquet_codecs`: zstd where it pays, snappy elsewhere).
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(df, preserve_index=False)
    if compression is None:
        compression = parquet_codecs(table)
    with _atomic_path(path) as tmp:
        # plain encoding: dictionaries of ten-million-row float (and id) columns cost time and do not
        # shrink them
        pq.write_table(table, tmp, compression=compression, use_dictionary=False)
    return Path(path)


#: Digests of files hashed by this process, by (path, size, modification and change times, inode): an
#: input's checksum is needed by the batch (resume record) and by the pipeline (provenance); read once.
_DIGESTS: dict[tuple, Future] = {}
_DIGESTS_LOCK = threading.Lock()
_DIGESTS_MAX = 64


def _digest_key(p: Path) -> tuple | None:
    try:
        st = p.stat()
    except OSError:
        return None
    if not p.is_file():
        return None  # folders: their files can change without the folder's own time changing
    return (str(p.resolve()), st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino)


def start_file_sha256(path: str | os.PathLike) -> Future:
    """Start hashing a file on a background thread (hashlib and file reads release the GIL).

    Returns a :class:`concurrent.futures.Future` of the hex digest; a later :func:`file_sha256` of the same,
    unchanged file waits for it instead of reading the file again. Folders and unreadable paths are hashed
    on the spot (the future is then already done, with the digest or the error).
    """
    p = Path(path)
    key = _digest_key(p)
    if key is None:
        fut: Future = Future()
        try:
            fut.set_result(file_sha256(p))
        except BaseException as exc:  # noqa: BLE001  (handed to whoever asks for the result)
            fut.set_exception(exc)
        return fut
    with _DIGESTS_LOCK:
        fut = _DIGESTS.get(key)
        if fut is not None:
            return fut
        fut = Future()
        _DIGESTS[key] = fut
        while len(_DIGESTS) > _DIGESTS_MAX:
            _DIGESTS.pop(next(iter(_DIGESTS)))

    def work() -> None:
        try:
            fut.set_result(_sha256_of(p, _CHUNK_BYTES))
        except BaseException as exc:  # noqa: BLE001
            with _DIGESTS_LOCK:
                if _DIGESTS.get(key) is fut:
                    del _DIGESTS[key]
            fut.set_exception(exc)

    threading.Thread(target=work, name="msdkit-sha256", daemon=True).start()
    return fut


def file_sha256(path: str | os.PathLike, *, chunk_bytes: int = _CHUNK_BYTES) -> str:
    """Return the SHA-256 hex digest of a file, read in chunks (memory does not grow with file size).

    A folder (an image-sequence input) is hashed over its files' relative names and contents, in sorted order.
    A file already hashed by this process (or being hashed, :func:`start_file_sha256`) and unchanged since
    (same size, modification time and inode) is not read again.
    """
    p = Path(path)
    key = _digest_key(p)
    if key is None:
        return _sha256_of(p, chunk_bytes)
    with _DIGESTS_LOCK:
        fut = _DIGESTS.get(key)
        if fut is None:
            fut = Future()
            fut.set_running_or_notify_cancel()
            _DIGESTS[key] = fut
            mine = True
        else:
            mine = False
    if not mine:
        return fut.result()
    try:
        digest = _sha256_of(p, chunk_bytes)
    except BaseException as exc:
        with _DIGESTS_LOCK:
            if _DIGESTS.get(key) is fut:
                del _DIGESTS[key]
        fut.set_exception(exc)
        raise
    fut.set_result(digest)
    return digest


def _sha256_of(p: Path, chunk_bytes: int) -> str:
    h = hashlib.sha256()
    if p.is_dir():
        for f in sorted(q for q in p.rglob("*") if q.is_file()):
            h.update(f.relative_to(p).as_posix().encode() + b"\0")
            h.update(bytes.fromhex(_sha256_of(f, chunk_bytes)))
        return h.hexdigest()
    with open(p, "rb") as fh:
        while chunk := fh.read(chunk_bytes):
            h.update(chunk)
    return h.hexdigest()


def remove_stale_temp_files(folder: str | os.PathLike, *, recursive: bool = False) -> list[Path]:
    """Delete temporary files left in ``folder`` by writers that were killed; return what was deleted."""
    root = Path(folder)
    if not root.is_dir():
        return []
    pattern = f".*{TEMP_MARKER}*"
    found = root.rglob(pattern) if recursive else root.glob(pattern)
    removed = []
    for f in found:
        try:
            f.unlink()
            removed.append(f)
        except (FileNotFoundError, IsADirectoryError, PermissionError):
            pass
    return removed
